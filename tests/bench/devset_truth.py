"""Reading truth files for the benchmarks: the outside photo set's ``scene-truth/1`` format and gripsight's
own ``render-truth`` files, both as plain records, and scoring detections against them.

This reader lives in tests/ only: the product never reads either truth format (the outside set is for
measuring, never a fixture of the product).

Scoring (issue 15): every part whose colour is a class, fully in the photo and with its whole footprint
in the work area, is expected. A detection reported ``ok`` is a hit when it lies within 15 mm of an
expected part of its class (one detection per part, nearest first). An ``ok`` detection of a class part
that is not expected (across the work area's edge, partly out of the photo) counts neither way; every
other ``ok`` detection is a false part (a wrong class, a part of a colour that is no class, a duplicate,
nothing there). The pick-point error is the detected footprint centre minus the true one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import yaml

from gripsight.vision.polygon import points_in_polygon

__all__ = ["TruthPart", "PhotoTruth", "Score", "read_scene_truth", "read_render_truth", "score_photo", "HIT_MM"]

HIT_MM = 15.0


@dataclass(frozen=True)
class TruthPart:
    id: str
    class_name: str | None          # the cell's class, None for a colour or shape that is no class
    centre_mm: tuple[float, float]  # footprint centre (the pick point)
    expected: bool                  # a class part fully in the photo and in the work area


@dataclass(frozen=True)
class PhotoTruth:
    photo: Path
    calib_photo: Path | None
    parts: list[TruthPart]
    has_riser: bool


@dataclass
class Score:
    expected: int = 0
    hits: int = 0
    false_parts: int = 0
    errors_mm: list = field(default_factory=list)       # (dx, dy) per hit
    misses: list = field(default_factory=list)          # (photo, truth id, what was reported there)
    falses: list = field(default_factory=list)          # (photo, class, xy)

    def add(self, other: "Score") -> "Score":
        return Score(self.expected + other.expected, self.hits + other.hits, self.false_parts + other.false_parts,
                     self.errors_mm + other.errors_mm, self.misses + other.misses, self.falses + other.falses)

    def figures(self) -> dict:
        e = np.asarray(self.errors_mm, float).reshape(-1, 2)
        d = np.linalg.norm(e, axis=1)
        return {"expected": self.expected, "recall": self.hits / self.expected if self.expected else 1.0,
                "false_parts": self.false_parts,
                "rms_mm": float(np.sqrt(np.mean(d ** 2))) if len(d) else 0.0,
                "p95_mm": float(np.percentile(d, 95)) if len(d) else 0.0,
                "max_mm": float(d.max()) if len(d) else 0.0,
                "mean_mm": tuple(float(v) for v in e.mean(axis=0)) if len(d) else (0.0, 0.0)}


def _class_of(colour: str, shape: str, cell) -> str | None:
    """The cell's class for a truth part: its colour word starts the class name and its shape matches."""
    kind = {"cube": "box", "cylinder": "cylinder"}.get(shape)
    for name, cls in cell.parts.items():
        if kind is not None and name.split("_")[0] == colour and cls.shape == kind:
            return name
    return None


def _inside(points_mm, work_area) -> bool:
    return bool(points_in_polygon(np.asarray(points_mm, float), work_area).all())


def read_scene_truth(path: Path, cell) -> PhotoTruth:
    """A ``scene-truth/1`` record (the outside set)."""
    t = yaml.safe_load(Path(path).read_text())
    parts = []
    for p in t["parts"]:
        name = _class_of(p["colour"], p["shape"], cell)
        c = np.asarray(p["centre_xy_mm"], float)
        if p.get("footprint_corners_mm"):
            outline = np.asarray(p["footprint_corners_mm"], float)[:, :2]
        else:
            r = 0.5 * float(p["size_mm"][0])
            a = np.linspace(0, 2 * np.pi, 24, endpoint=False)
            outline = c + r * np.column_stack([np.cos(a), np.sin(a)])
        expected = name is not None and bool(p["fully_inside_image"]) and _inside(outline, cell.work_area)
        parts.append(TruthPart(str(p["id"]), name, (float(c[0]), float(c[1])), expected))
    calib = (Path(path).parent / t["calib_image"]).resolve() if t.get("calib_image") else None
    return PhotoTruth(Path(path).parent / t["image"], calib, parts, t.get("riser") is not None)


def read_render_truth(path: Path, cell) -> PhotoTruth:
    """A gripsight ``render-truth`` record (our own renders)."""
    t = yaml.safe_load(Path(path).read_text())
    parts = []
    for p in t["parts"]:
        if not p.get("in_view"):
            continue
        c = np.asarray(p["centre_mm"], float)
        r = 0.5 * float(np.hypot(*p["size_mm"])) if p.get("size_mm") else 0.0
        a = np.linspace(0, 2 * np.pi, 16, endpoint=False)
        ring = c + r * np.column_stack([np.cos(a), np.sin(a)])
        name = p["class"] if p.get("known_class") else None
        parts.append(TruthPart(str(p["id"]), name, (float(c[0]), float(c[1])),
                               name is not None and _inside(ring, cell.work_area)))
    photo = Path(path).with_name(t.get("photo") or Path(path).name.replace(".truth.yaml", ".jpg"))
    return PhotoTruth(photo, None, parts, any(m.get("z_mm", 0) > 0 for m in t.get("markers", [])))


def score_photo(detected, truth: PhotoTruth) -> Score:
    """Score one photo's detected parts (objects with ``xy_mm``, ``status``, ``class_name``)."""
    s = Score(expected=sum(p.expected for p in truth.parts))
    ok = [d for d in detected if str(getattr(d.status, "value", d.status)) == "ok"]
    if not truth.parts:
        s.false_parts = len(ok)
        return s
    centres = np.array([p.centre_mm for p in truth.parts], float)
    xy = np.array([d.xy_mm for d in ok], float).reshape(-1, 2)
    dist = np.linalg.norm(xy[:, None, :] - centres[None], axis=2)
    taken, used = set(), set()
    for i, j in sorted(np.ndindex(*dist.shape), key=lambda ij: dist[ij]):      # nearest pairs first
        if i in used or j in taken or dist[i, j] > HIT_MM:
            continue
        t, d = truth.parts[j], ok[i]
        if t.expected and t.class_name == d.class_name:
            taken.add(j)
            used.add(i)
            s.hits += 1
            s.errors_mm.append((float(xy[i, 0] - centres[j, 0]), float(xy[i, 1] - centres[j, 1])))
    for i, d in enumerate(ok):
        if i in used:
            continue
        near = np.flatnonzero(dist[i] <= HIT_MM) if len(centres) else []
        neutral = any(truth.parts[j].class_name == d.class_name and not truth.parts[j].expected for j in near)
        if not neutral:
            s.false_parts += 1
            s.falses.append((truth.photo.name, d.class_name, tuple(round(v, 1) for v in d.xy_mm)))
    for j, t in enumerate(truth.parts):
        if t.expected and j not in taken:
            near = [f"{d.class_name}:{getattr(d.status, 'value', d.status)}" for d in detected
                    if np.hypot(*(np.asarray(d.xy_mm) - centres[j])) <= HIT_MM]
            s.misses.append((truth.photo.name, t.id, t.class_name, near))
    return s
