"""Sets of synthetic photos on disk: one photo plus its ``.truth.yaml``, random sets, and the demo set.

The demo set (``sample_images/``) is made by :func:`write_sample_set`, deterministically from a seed:

- ``calibration.jpg``: markers only, the demo camera;
- ``bumped/``: the camera knocked about 10 mm and 2 degrees: ``calibration.jpg`` and 3 photos;
- ``demo/``: 8 photos of the token sorter in order, 4-8 tokens each, some far out of reach, two
  touching, one of an unknown colour;
- ``batch/``: 40 photos under varied light, white balance, noise, JPEG quality and lens distortion.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import yaml

from gripsight.app.fileio import write_bytes_atomic, write_text_atomic
from gripsight.app.truthcheck import truth_path
from gripsight.vision.synth.render import Rendered, encode_photo, render_scene
from gripsight.vision.synth.scene import CameraSpec, LightingSpec, Scene, ScenePart, SensorSpec, make_camera, random_scene

__all__ = ["write_photo", "read_truth", "truth_path", "demo_camera_spec", "write_sample_set", "UNKNOWN_LAB"]

UNKNOWN_LAB = [55.0, 65.0, -25.0]       # a magenta token: no class of the demo cell


def write_photo(path, rendered: Rendered, jpeg_quality: int) -> Path:
    """Write the photo (JPEG or PNG by suffix) and its truth file beside it, each atomically."""
    path = Path(path)
    write_bytes_atomic(path, encode_photo(rendered.image_bgr, path.suffix, jpeg_quality))
    truth = dict(rendered.truth, photo=path.name)
    write_text_atomic(truth_path(path), yaml.safe_dump(truth, sort_keys=False, default_flow_style=None, width=120))
    return path


def read_truth(photo) -> dict | None:
    """The truth record beside a photo, or None if there is none."""
    p = truth_path(Path(photo))
    return yaml.safe_load(p.read_text()) if p.is_file() else None


def demo_camera_spec(cell, **changes) -> CameraSpec:
    """The demo cell's camera: 760 mm above the markers' middle, focal length fitted to the markers,
    a webcam-like lens (k1 = -0.05, k2 = 0.01) and a mount that is not perfectly level (0.6 degrees)."""
    base = dict(tilt_deg=0.6, tilt_azimuth_deg=70.0, k1=-0.05, k2=0.01)
    base.update(changes)
    return CameraSpec(**base)


def _far_part(rng, cell, classes) -> dict:
    """A token in a work-area corner far from the base (typically beyond the arm's reach)."""
    wa = np.array(cell.work_area, float)
    far = wa[np.argmax(np.hypot(wa[:, 0], wa[:, 1]) + rng.uniform(0, 1, len(wa)))]
    towards = wa.mean(axis=0) - far
    towards /= np.linalg.norm(towards)
    p = far + towards * rng.uniform(22, 30)
    return {"class": str(rng.choice(classes)), "x_mm": float(p[0]), "y_mm": float(p[1]),
            "yaw_deg": float(rng.uniform(-90, 90))}


def _with_extra(scene: Scene, extra: list[dict]) -> Scene:
    parts = [p.model_dump(by_alias=True, exclude_none=True) for p in scene.parts]
    for e in extra:
        if all(np.hypot(e["x_mm"] - p["x_mm"], e["y_mm"] - p["y_mm"]) > 40 for p in parts):
            parts.append(e)
    for i, p in enumerate(parts):
        p["id"] = f"t{i + 1}"
    return scene.model_copy(update={"parts": [ScenePart.model_validate(p) for p in parts]})


def _varied_conditions(rng) -> tuple[LightingSpec, SensorSpec, dict]:
    lighting = LightingSpec(
        brightness=float(rng.uniform(0.6, 1.25)),
        white_balance=[float(rng.uniform(0.85, 1.2)), 1.0, float(rng.uniform(0.7, 1.15))],
        gradient=float(rng.uniform(0.0, 0.3)), gradient_azimuth_deg=float(rng.uniform(0, 360)),
        vignette=float(rng.uniform(0.0, 0.25)), light_azimuth_deg=float(rng.uniform(0, 360)),
        light_elevation_deg=float(rng.uniform(45, 80)), ambient=float(rng.uniform(0.25, 0.5)),
        shadow=float(rng.uniform(0.2, 0.55)))
    sensor = SensorSpec(noise=float(rng.uniform(0.5, 4.0)), jpeg_quality=int(rng.integers(80, 96)))
    lens = {"k1": float(rng.uniform(-0.15, 0.02)), "k2": float(rng.uniform(0.0, 0.04))} if rng.random() < 0.5 \
        else {"k1": -0.05, "k2": 0.01}
    return lighting, sensor, lens


def write_sample_set(cell, out_dir, seed: int = 2026, progress=None) -> list[Path]:
    """Render the demo photo set into ``out_dir`` (see the module docstring); returns the photo paths."""
    out = Path(out_dir)
    rng = np.random.default_rng(seed)
    classes = list(cell.parts)
    jobs: list[tuple[Path, Scene]] = []
    cam = demo_camera_spec(cell)
    quiet = SensorSpec(noise=1.2, jpeg_quality=90)
    jobs.append((out / "calibration.jpg", Scene(camera=cam, sensor=quiet, table_seed=int(rng.integers(2**31)))))
    # the bump: the camera centre moves 10 mm sideways and the mount turns by about 2 degrees
    demo_cam = make_camera(cam, cell)
    shift = rng.normal(size=2)
    shift = 10.0 * shift / np.linalg.norm(shift)
    bumped = demo_camera_spec(cell, tilt_deg=2.4, tilt_azimuth_deg=95.0, focal_px=float(demo_cam.K[0, 0]),
                              centre_mm=[float(demo_cam.centre_mm[0] + shift[0]),
                                         float(demo_cam.centre_mm[1] + shift[1]), float(demo_cam.centre_mm[2])])
    jobs.append((out / "bumped" / "calibration.jpg", Scene(camera=bumped, sensor=quiet, table_seed=int(rng.integers(2**31)))))
    for i in range(3):
        sc = random_scene(cell, rng, camera=bumped, sensor=quiet)
        jobs.append((out / "bumped" / f"bumped_{i + 1:02d}.jpg", sc))
    for i in range(8):
        sc = random_scene(cell, rng, n_parts=(4, 7), touching=(i == 2), unknown_lab=UNKNOWN_LAB if i == 4 else None,
                          camera=cam, sensor=quiet)
        if i in (1, 5, 6):
            sc = _with_extra(sc, [_far_part(rng, cell, classes)])
        jobs.append((out / "demo" / f"demo_{i + 1:02d}.jpg", sc))
    for i in range(40):
        lighting, sensor, lens = _varied_conditions(rng)
        sc = random_scene(cell, rng, n_parts=(3, 8), touching=rng.random() < 0.2,
                          unknown_lab=UNKNOWN_LAB if rng.random() < 0.2 else None,
                          camera=demo_camera_spec(cell, **lens), lighting=lighting, sensor=sensor)
        jobs.append((out / "batch" / f"batch_{i + 1:02d}.jpg", sc))
    paths = []
    for path, scene in jobs:
        rendered = render_scene(cell, scene)
        paths.append(write_photo(path, rendered, scene.sensor.jpeg_quality))
        if progress is not None:
            progress(path)
    return paths
