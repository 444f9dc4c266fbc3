"""Unkind scenes: what photos of a real bench show that a plain render does not (issue 15, item 7).

- a spot light: hard directional shadows (low sun-like elevation, little blur, dark), light falling off
  outside the spot;
- warm, dim light from one side (white balance toward red, a strong one-sided gradient);
- a wood-grain or busy table (:mod:`gripsight.vision.synth.surfaces`);
- distractors of colours no class has (orange, purple) and thin white cards;
- a part 1.5-5 mm from a marker's paper;
- a class's colour in the other shape (a cube's colour as a disc, a disc's as a cube);
- a camera of its own (:func:`hard_camera`): tilted up to 2 degrees, 700-800 mm up and off the
  markers' middle, its principal point up to 12 px off the image centre.

:func:`hard_conditions` draws the light, sensor and surface; :func:`add_hard_parts` adds the parts to a
scene from :func:`gripsight.vision.synth.scene.random_scene`. Both only use the generator they are given.
"""

from __future__ import annotations

import numpy as np

from gripsight.vision.polygon import points_in_polygon
from gripsight.vision.synth.scene import CameraSpec, LightingSpec, Scene, ScenePart, SensorSpec
from gripsight.vision.synth.surfaces import Surface

__all__ = ["DISTRACTORS", "hard_conditions", "hard_camera", "add_hard_parts"]

# distractors: (CIELAB, shape, size_mm, height_mm); colours of no demo class
DISTRACTORS = {
    "orange": ((66.0, 42.0, 68.0), "box", [22.0], 22.0),
    "purple": ((38.0, 42.0, -40.0), "cylinder", [30.0], 14.0),
    "white_card": ((93.0, 0.0, 3.0), "box", [45.0, 28.0], 0.8),
}


def hard_conditions(rng: np.random.Generator, surface: Surface | None = None, cell=None) -> dict:
    """Random unkind light, sensor and surface (and, given the cell, camera), as keyword arguments for
    ``random_scene``."""
    side_deg = float(rng.uniform(0, 360))
    warm = float(rng.uniform(0.0, 1.0))
    lighting = LightingSpec(
        brightness=float(rng.uniform(0.4, 0.8)),
        white_balance=[1.0 + 0.3 * warm, 1.0, 1.0 - 0.35 * warm],
        gradient=float(rng.uniform(0.3, 0.6)), gradient_azimuth_deg=side_deg,
        light_azimuth_deg=side_deg + 180.0, light_elevation_deg=float(rng.uniform(30, 55)),
        ambient=float(rng.uniform(0.15, 0.3)), shadow=float(rng.uniform(0.55, 0.8)),
        shadow_blur_mm=float(rng.uniform(0.3, 1.5)),
        spot_radius_mm=float(rng.uniform(220, 380)),
        spot_centre_mm=[float(rng.uniform(150, 280)), float(rng.uniform(-120, 120))],
        spot_floor=float(rng.uniform(0.35, 0.6)))
    sensor = SensorSpec(noise=float(rng.uniform(2.0, 5.0)), blur_px=float(rng.uniform(0.3, 1.0)),
                        jpeg_quality=int(rng.integers(70, 90)))
    if surface is None:
        surface = Surface.WOOD_GRAIN if rng.random() < 0.6 else Surface(str(rng.choice(
            [Surface.PLYWOOD.value, Surface.CUTTING_MAT.value, Surface.PRINTED_TEXT.value])))
    out = {"lighting": lighting, "sensor": sensor, "surface": surface}
    if cell is not None:
        out["camera"] = hard_camera(cell, rng)
    return out


def hard_camera(cell, rng: np.random.Generator) -> CameraSpec:
    """A camera mounted by hand: 700-800 mm up (not the cell's tape-measured figure), up to 30 mm off the
    markers' middle, tilted up to 2 degrees, its principal point up to 12 px off the image centre (the
    outside photo set's cameras: 4-11 px); the focal length fits the markers as ``make_camera`` does."""
    xy = np.array([[m.x, m.y] for m in cell.markers.layout.values()], float)
    middle = 0.5 * (xy.min(axis=0) + xy.max(axis=0))
    return CameraSpec(centre_mm=[float(middle[0] + rng.uniform(-30, 30)), float(middle[1] + rng.uniform(-30, 30)),
                                 float(rng.uniform(700, 800))],
                      tilt_deg=float(rng.uniform(0.0, 2.0)), tilt_azimuth_deg=float(rng.uniform(0, 360)),
                      principal_offset_px=[float(v) for v in rng.uniform(-12.0, 12.0, 2)])


def _radius(size, shape) -> float:
    size = list(size) * (2 if len(size) == 1 else 1)
    return 0.5 * float(np.hypot(*size[:2])) if shape == "box" else 0.5 * float(max(size))


def add_hard_parts(scene: Scene, cell, rng: np.random.Generator, distractors: int = 3, near_marker: bool = True,
                   other_shape: bool = True) -> Scene:
    """The scene with distractors, a part next to a marker and a class colour in the other shape added
    where they fit (6 mm from every other part; the near-marker part 1.5-5 mm from the marker's paper)."""
    poly = [tuple(p) for p in cell.work_area]
    xs, ys = zip(*poly)
    placed = []
    for p in scene.parts:
        cls = cell.parts.get(p.class_name)
        size = p.size_mm or (list(cls.footprint_mm) if cls else [26.0])
        placed.append((p.x_mm, p.y_mm, _radius(size, p.shape or (cls.shape if cls else "box"))))
    parts = list(scene.parts)

    def free(x, y, r, gap=6.0):
        return all(np.hypot(x - px, y - py) > r + pr + gap for px, py, pr in placed)

    def in_area(x, y, r):
        return bool(points_in_polygon(np.array([[x + r, y], [x - r, y], [x, y + r], [x, y - r]]), poly).all())

    def add(name, lab, shape, size, height, x, y, yaw):
        parts.append(ScenePart.model_validate({"id": f"h{len(parts) + 1}", "class": name, "lab": list(lab), "shape": shape,
                                               "size_mm": list(size), "height_mm": height, "x_mm": float(x),
                                               "y_mm": float(y), "yaw_deg": float(yaw)}))
        placed.append((x, y, _radius(size, shape)))

    def add_somewhere(name, lab, shape, size, height):
        r = _radius(size, shape)
        for _ in range(300):
            x, y = rng.uniform(min(xs), max(xs)), rng.uniform(min(ys), max(ys))
            if in_area(x, y, r) and free(x, y, r):
                add(name, lab, shape, size, height, x, y, rng.uniform(-90, 90))
                return

    for k in range(distractors):
        name = list(DISTRACTORS)[k % len(DISTRACTORS)]
        lab, shape, size, height = DISTRACTORS[name]
        add_somewhere(f"distractor_{name}", lab, shape, size, height)
    if other_shape and cell.parts:
        name = str(rng.choice(list(cell.parts)))
        cls = cell.parts[name]
        if cls.shape == "box":
            add_somewhere(f"{name}_as_disc", cls.lab, "cylinder", [30.0], 14.0)
        else:
            add_somewhere(f"{name}_as_cube", cls.lab, "box", [22.0], 22.0)
    if near_marker:
        _add_near_marker(cell, rng, add, free)
    return scene.model_copy(update={"parts": parts})


def _add_near_marker(cell, rng, add, free) -> None:
    """A class part beside a ground marker, on the side facing the work area, 1.5-5 mm from its paper."""
    centre = np.mean(np.array(cell.work_area, float), axis=0)
    ground = [(i, m) for i, m in cell.markers.layout.items() if m.z == 0]
    if not ground or not cell.parts:
        return
    half_paper = cell.markers.size_mm / 2 + cell.markers.margin_mm
    for _ in range(20):
        _, m = ground[int(rng.integers(len(ground)))]
        name = str(rng.choice(list(cell.parts)))
        cls = cell.parts[name]
        size = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
        yaw = np.radians(m.yaw_deg)
        axes = np.array([[np.cos(yaw), np.sin(yaw)], [-np.sin(yaw), np.cos(yaw)]])
        to_area = centre - [m.x, m.y]
        k = int(np.argmax(np.abs(axes @ to_area)))
        direction = axes[k] * np.sign(axes[k] @ to_area)
        gap = float(rng.uniform(1.5, 5.0))
        half_part = size[0] / 2                       # boxes turned with the marker; discs by radius
        x, y = np.array([m.x, m.y]) + direction * (half_paper + gap + half_part)
        r = _radius(cls.footprint_mm, cls.shape)
        clear = all(np.hypot(x - o.x, y - o.y) > np.sqrt(2) * half_paper + r + 2.0
                    for o in cell.markers.layout.values() if o is not m)
        if clear and free(x, y, r, gap=3.0):
            add(name, cls.lab, cls.shape, cls.footprint_mm, cls.height_mm, x, y, m.yaw_deg)
            return
