"""Rendered photos of the gripper marker at the stops a *true* arm reaches (shared by the tests and
tests/bench/bench_armfit.py)."""

from __future__ import annotations

import numpy as np

from gripsight.planning import armfit as af
from gripsight.vision.synth.render import encode_photo, render_scene
from gripsight.vision.synth.scene import CameraSpec, GripperMarkerSpec, LightingSpec, Scene, SensorSpec

GRIPPER = {"id": 20, "size_mm": 30, "margin_mm": 5, "offset_mm": [0, 0, 20]}


def true_errors(rng, base_shift_mm=5.0, base_yaw_deg=2.0) -> af.ArmErrors:
    """Offsets up to +-5 deg, gains up to +-4 %, the base moved 5 mm and turned 2 deg (the yaw adds to
    the base servo's offset: both turn the arm about the base axis)."""
    off = rng.uniform(-5, 5, 3)
    off[0] += base_yaw_deg * rng.choice([-1, 1])
    gain = rng.uniform(-4, 4, 3)
    a = rng.uniform(0, 2 * np.pi)
    return af.ArmErrors(tuple(off), tuple(gain), (base_shift_mm * np.cos(a), base_shift_mm * np.sin(a)))


def marker_specs(arm, truth: af.ArmErrors, commanded_deg, mount: af.MarkerMount, cell) -> list[GripperMarkerSpec]:
    """Where the true arm holds the gripper marker at each commanded pose."""
    centres = af.marker_points_mm(arm, truth, commanded_deg, mount)
    q = truth.true_deg(commanded_deg)
    true_arm = truth.arm(arm)
    psi = np.degrees(true_arm.forearm_rad(np.radians(q[:, 1]), np.radians(q[:, 2])))
    g = cell.markers.on_gripper
    return [GripperMarkerSpec(id=g.id, size_mm=g.size_mm, margin_mm=g.margin_mm, centre_mm=c.tolist(),
                              yaw_deg=float(b), pitch_deg=0.0 if mount.level else float(p))
            for c, b, p in zip(centres, q[:, 0], psi)]


def render_photo(path, cell, camera: CameraSpec, lighting: LightingSpec, sensor: SensorSpec, seed: int,
                 marker: GripperMarkerSpec | None = None):
    scene = Scene(camera=camera, lighting=lighting, sensor=sensor, table_seed=seed, gripper_marker=marker)
    rendered = render_scene(cell, scene)
    path.write_bytes(encode_photo(rendered.image_bgr, path.suffix, sensor.jpeg_quality))
    return rendered
