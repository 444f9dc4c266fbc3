"""Scene descriptions for synthetic photos: camera, lighting, sensor, and the parts on the table.

A scene file (YAML) for ``gripsight render CELL --scene scene.yaml``::

    camera:   {centre_mm: [200, 0, 760], focal_px: null, tilt_deg: 0, k1: 0, k2: 0}   # null: fit the markers
    lighting: {brightness: 1.0, white_balance: [1, 1, 1], gradient: 0.15}
    sensor:   {noise: 1.5, jpeg_quality: 92}
    table_seed: 0
    surface: plywood          # or wood_grain, cutting_mat, printed_text, checker_cloth
    parts:
      - {id: t1, class: red, x_mm: 200, y_mm: 10, yaw_deg: 15}           # size, height, shape from the cell
      - {id: t2, class: odd, lab: [55, 65, -25], shape: cylinder, size_mm: [30], height_mm: 14, x_mm: 250, y_mm: -60}

The cell is used for its markers, work area and part classes only (this module knows nothing of arms).
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Annotated, Literal

import numpy as np
from pydantic import BaseModel, ConfigDict, Field

from gripsight.vision.camera import Camera
from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.polygon import points_in_polygon
from gripsight.vision.synth.surfaces import Surface

__all__ = ["Scene", "ScenePart", "ResolvedPart", "resolve_parts", "make_camera", "random_scene",
           "marker_paper_corners_mm"]

#: the farthest coordinate a scene may give (100 m, as the cell file): 1e308 is a typo, and would overflow
#: the renderer's fixed-point pixels
LIMIT_MM = 1.0e5
Number = Annotated[float, Field(allow_inf_nan=False, ge=-LIMIT_MM, le=LIMIT_MM)]
Positive = Annotated[float, Field(gt=0, allow_inf_nan=False)]


class _Model(BaseModel):
    model_config = ConfigDict(extra="forbid", allow_inf_nan=False)


class CameraSpec(_Model):
    centre_mm: Annotated[list[Number], Field(min_length=3, max_length=3)] | None = None
    focal_px: Positive | None = None
    width_px: Annotated[int, Field(ge=64, le=8192)] = 1280
    height_px: Annotated[int, Field(ge=64, le=8192)] = 960
    tilt_deg: Annotated[float, Field(ge=0, le=30)] = 0.0
    tilt_azimuth_deg: Number = 0.0
    roll_deg: Number = 0.0
    k1: Annotated[float, Field(ge=-0.5, le=0.5)] = 0.0
    k2: Annotated[float, Field(ge=-0.5, le=0.5)] = 0.0
    principal_offset_px: Annotated[list[Annotated[float, Field(ge=-200, le=200)]], Field(min_length=2, max_length=2)] = [0.0, 0.0]


class LightingSpec(_Model):
    brightness: Annotated[float, Field(gt=0, le=3)] = 1.0
    white_balance: Annotated[list[Positive], Field(min_length=3, max_length=3)] = [1.0, 1.0, 1.0]  # R, G, B gains
    gradient: Annotated[float, Field(ge=0, le=0.8)] = 0.15
    gradient_azimuth_deg: Number = 30.0
    vignette: Annotated[float, Field(ge=0, le=0.8)] = 0.12
    light_azimuth_deg: Number = 135.0
    light_elevation_deg: Annotated[float, Field(ge=20, le=90)] = 55.0
    ambient: Annotated[float, Field(ge=0, le=1)] = 0.35
    shadow: Annotated[float, Field(ge=0, le=0.9)] = 0.45
    shadow_blur_mm: Annotated[float, Field(ge=0, le=30)] = 3.0
    spot_radius_mm: Positive | None = None     # a spot light: full light within about this radius ...
    spot_centre_mm: Annotated[list[Number], Field(min_length=2, max_length=2)] | None = None   # ... of here
    spot_floor: Annotated[float, Field(ge=0.05, le=1)] = 0.3   # light far outside the spot, as a fraction


class SensorSpec(_Model):
    noise: Annotated[float, Field(ge=0, le=30)] = 1.5          # Gaussian sigma, 8-bit levels
    jpeg_quality: Annotated[int, Field(ge=30, le=100)] = 92
    blur_px: Annotated[float, Field(ge=0, le=5)] = 0.0         # Gaussian lens/focus blur, sigma in photo px


class ScenePart(_Model):
    id: str | None = None
    class_name: str = Field(alias="class")
    lab: Annotated[list[Number], Field(min_length=3, max_length=3)] | None = None
    shape: Literal["box", "cylinder"] | None = None
    size_mm: Annotated[list[Positive], Field(min_length=1, max_length=2)] | None = None
    height_mm: Positive | None = None
    x_mm: Number
    y_mm: Number
    yaw_deg: Number = 0.0

    model_config = ConfigDict(extra="forbid", allow_inf_nan=False, populate_by_name=True)


class GripperMarkerSpec(_Model):
    """A marker held by the gripper (drawn last, over everything): centre in table mm, yaw about z,
    pitch of its top edge (see :mod:`vision.synth.gripper`)."""

    id: Annotated[int, Field(ge=0)]
    size_mm: Positive
    margin_mm: Annotated[float, Field(ge=0, le=50)] = 5.0
    centre_mm: Annotated[list[Number], Field(min_length=3, max_length=3)]
    yaw_deg: Number = 0.0
    pitch_deg: Annotated[float, Field(ge=-80, le=80)] = 0.0


class Scene(_Model):
    camera: CameraSpec = CameraSpec()
    lighting: LightingSpec = LightingSpec()
    sensor: SensorSpec = SensorSpec()
    table_seed: int = 0
    table_lab: Annotated[list[Number], Field(min_length=3, max_length=3)] | None = None   # bench colour
    parts: list[ScenePart] = []
    base_disc: bool = True            # draw the arm's base as a dark cylinder at the table origin
    surface: Surface = Surface.PLYWOOD   # the bench under the markers (vision/synth/surfaces.py)
    gripper_marker: GripperMarkerSpec | None = None


@dataclass(frozen=True)
class ResolvedPart:
    """A part with every property known, ready to render (sizes in mm, yaw in degrees)."""

    id: str
    class_name: str
    known: bool
    lab: tuple[float, float, float]
    shape: str
    length_mm: float
    width_mm: float
    height_mm: float
    x_mm: float
    y_mm: float
    yaw_deg: float

    def footprint_mm(self, n_round: int = 96) -> np.ndarray:
        """Footprint outline (K, 2) in table mm, counter-clockwise seen from above."""
        if self.shape == "cylinder":
            t = np.linspace(0, 2 * np.pi, n_round, endpoint=False)
            pts = np.column_stack([0.5 * self.length_mm * np.cos(t), 0.5 * self.width_mm * np.sin(t)])
        else:
            hl, hw = self.length_mm / 2, self.width_mm / 2
            pts = np.array([[hl, -hw], [hl, hw], [-hl, hw], [-hl, -hw]])
        yaw = np.radians(self.yaw_deg)
        rot = np.array([[np.cos(yaw), -np.sin(yaw)], [np.sin(yaw), np.cos(yaw)]])
        return pts @ rot.T + [self.x_mm, self.y_mm]


def resolve_parts(scene: Scene, cell) -> list[ResolvedPart]:
    """Fill each scene part's missing properties from its class in the cell.

    Raises
    ------
    ValueError
        For a part of a class the cell does not know and no ``lab``/``size_mm``/``height_mm`` of its own.
    """
    out = []
    for i, p in enumerate(scene.parts):
        cls = cell.parts.get(p.class_name)
        if cls is None and (p.lab is None or p.size_mm is None or p.height_mm is None):
            raise ValueError(f"parts.{i}: class '{p.class_name}' is not in the cell; give lab, size_mm and height_mm")
        size = p.size_mm or list(cls.footprint_mm)
        if len(size) == 1:
            size = [size[0], size[0]]
        out.append(ResolvedPart(
            id=p.id or f"t{i + 1}", class_name=p.class_name, known=cls is not None,
            lab=tuple(p.lab or cls.lab), shape=p.shape or (cls.shape if cls else "box"),
            length_mm=float(size[0]), width_mm=float(size[1]),
            height_mm=float(p.height_mm or cls.height_mm), x_mm=p.x_mm, y_mm=p.y_mm, yaw_deg=p.yaw_deg))
    return out


def make_camera(spec: CameraSpec, cell) -> Camera:
    """The scene's camera; with no centre it sits 760 mm above the middle of the markers, and with no
    focal length the focal length is chosen so every marker's paper fits with 3 % to spare."""
    corners = np.concatenate([marker_paper_corners_mm(m, cell.markers.size_mm, cell.markers.margin_mm)
                              for m in cell.markers.layout.values()])
    lo, hi = corners[:, :2].min(axis=0), corners[:, :2].max(axis=0)
    centre = np.array(spec.centre_mm) if spec.centre_mm is not None else np.array([*(lo + hi) / 2, 760.0])
    focal = spec.focal_px
    if focal is None:
        nadir = Camera.create(centre, 1.0, spec.width_px, spec.height_px)
        pc = nadir.to_camera(corners)
        ax = np.abs(pc[:, 0] / pc[:, 2]).max()
        ay = np.abs(pc[:, 1] / pc[:, 2]).max()
        focal = 0.97 * min((spec.width_px / 2) / ax, (spec.height_px / 2) / ay)
    return Camera.create(centre, focal, spec.width_px, spec.height_px, spec.tilt_deg, spec.tilt_azimuth_deg,
                         spec.roll_deg, spec.k1, spec.k2, principal_offset_px=tuple(spec.principal_offset_px))


def random_scene(cell, rng: np.random.Generator, n_parts: tuple[int, int] = (4, 8), touching: bool = False,
                 unknown_lab: list[float] | None = None, camera: CameraSpec | None = None,
                 lighting: LightingSpec | None = None, sensor: SensorSpec | None = None,
                 surface: Surface = Surface.PLYWOOD) -> Scene:
    """A random valid scene: parts of the cell's classes spread over the work area without overlaps,
    optionally two same-class boxes touching face to face and one part of an unknown colour."""
    classes = list(cell.parts)
    poly = [tuple(p) for p in cell.work_area]
    xs, ys = zip(*poly)
    n = int(rng.integers(n_parts[0], n_parts[1] + 1))
    placed: list[tuple[float, float, float]] = []      # x, y, radius
    parts: list[dict] = []

    def radius_of(cls_name, size=None):
        fp = size or cell.parts[cls_name].footprint_mm
        return 0.5 * float(np.hypot(fp[0], fp[-1]))

    def free(x, y, r, gap=6.0):
        margin_ok = bool(points_in_polygon(np.array([[x + r, y], [x - r, y], [x, y + r], [x, y - r]]), poly).all())
        return margin_ok and all(np.hypot(x - px, y - py) > r + pr + gap for px, py, pr in placed)

    if touching:
        box_classes = [c for c in classes if cell.parts[c].shape == "box"] or classes
        cls = str(rng.choice(box_classes))
        fp = list(cell.parts[cls].length_width_mm)
        for _ in range(200):
            x, y = rng.uniform(min(xs), max(xs)), rng.uniform(min(ys), max(ys))
            yaw = float(rng.uniform(-90, 90))
            d = np.array([np.cos(np.radians(yaw)), np.sin(np.radians(yaw))]) * fp[0]
            r_pair = radius_of(cls) + fp[0] / 2
            cx, cy = x + d[0] / 2, y + d[1] / 2
            if free(cx, cy, r_pair):
                parts.append({"class": cls, "x_mm": float(x), "y_mm": float(y), "yaw_deg": yaw})
                parts.append({"class": cls, "x_mm": float(x + d[0]), "y_mm": float(y + d[1]), "yaw_deg": yaw})
                placed.append((cx, cy, r_pair))
                break
    if unknown_lab is not None:
        size = [26.0]
        for _ in range(200):
            x, y = rng.uniform(min(xs), max(xs)), rng.uniform(min(ys), max(ys))
            if free(x, y, 13.0):
                parts.append({"class": "unknown", "lab": list(unknown_lab), "shape": "cylinder", "size_mm": size,
                              "height_mm": 12.0, "x_mm": float(x), "y_mm": float(y)})
                placed.append((x, y, 13.0))
                break
    tries = 0
    while len(parts) < n and tries < 2000:
        tries += 1
        cls = str(rng.choice(classes))
        x, y = rng.uniform(min(xs), max(xs)), rng.uniform(min(ys), max(ys))
        r = radius_of(cls)
        if free(x, y, r):
            parts.append({"class": cls, "x_mm": float(x), "y_mm": float(y), "yaw_deg": float(rng.uniform(-90, 90))})
            placed.append((x, y, r))
    for i, p in enumerate(parts):
        p["id"] = f"t{i + 1}"
    return Scene(camera=camera or CameraSpec(), lighting=lighting or LightingSpec(), sensor=sensor or SensorSpec(),
                 table_seed=int(rng.integers(0, 2**31 - 1)), parts=[ScenePart.model_validate(p) for p in parts],
                 surface=Surface(surface))
