"""Comparing what a photo's analysis found with its render truth file (when one sits beside the photo).

A detection matches the nearest in-view truth part within 10 mm. Expected parts are the known-colour
parts whose whole footprint lies in the work area (one across its edge is rightly rejected and counts
neither way). Recall = matched / expected; precision = matched / parts reported ``ok``; the pick-point
error is the distance from the detected footprint centre (where the arm goes) to the true one.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from gripsight.vision.parts import PartStatus
from gripsight.vision.polygon import points_in_polygon

__all__ = ["TruthComparison", "compare_with_truth", "MATCH_MM"]

MATCH_MM = 10.0


@dataclass
class TruthComparison:
    expected: int = 0
    found: int = 0
    reported_ok: int = 0
    false_parts: int = 0
    errors_mm: list = field(default_factory=list)
    unknown_expected: int = 0
    unknown_found: int = 0

    @property
    def recall(self) -> float:
        return self.found / self.expected if self.expected else 1.0

    @property
    def precision(self) -> float:
        return self.found / self.reported_ok if self.reported_ok else 1.0

    @property
    def rms_mm(self) -> float:
        return float(np.sqrt(np.mean(np.square(self.errors_mm)))) if self.errors_mm else 0.0

    @property
    def max_mm(self) -> float:
        return float(np.max(self.errors_mm)) if self.errors_mm else 0.0

    def add(self, other: "TruthComparison") -> "TruthComparison":
        return TruthComparison(self.expected + other.expected, self.found + other.found,
                               self.reported_ok + other.reported_ok, self.false_parts + other.false_parts,
                               self.errors_mm + other.errors_mm, self.unknown_expected + other.unknown_expected,
                               self.unknown_found + other.unknown_found)

    def as_dict(self) -> dict:
        return {"expected": self.expected, "found": self.found, "reported_ok": self.reported_ok,
                "false_parts": self.false_parts, "recall": round(self.recall, 4), "precision": round(self.precision, 4),
                "pick_error_rms_mm": round(self.rms_mm, 3), "pick_error_max_mm": round(self.max_mm, 3),
                "unknown_expected": self.unknown_expected, "unknown_found": self.unknown_found}


def _footprint_inside(part, work_area) -> bool:
    r = 0.5 * float(np.hypot(*part["size_mm"]))
    c = np.asarray(part["centre_mm"], float)
    t = np.linspace(0, 2 * np.pi, 16, endpoint=False)
    ring = c + r * np.column_stack([np.cos(t), np.sin(t)])
    return bool(points_in_polygon(ring, work_area).all())


def compare_with_truth(parts, truth: dict, work_area=None) -> TruthComparison:
    """Score detected parts (objects with ``xy_mm``, ``status``, ``class_name``) against a truth record."""
    s = TruthComparison()
    truth_parts = [p for p in truth.get("parts", []) if p.get("in_view")]
    inside = [work_area is None or _footprint_inside(p, work_area) for p in truth_parts]
    centres = np.array([p["centre_mm"] for p in truth_parts], float).reshape(-1, 2)
    matched = set()
    for d in parts:
        reported = PartStatus(d.status).pickable
        s.reported_ok += d.status == PartStatus.OK
        if not len(centres):
            s.false_parts += reported
            continue
        dist = np.linalg.norm(centres - np.asarray(d.xy_mm, float), axis=1)
        j = int(np.argmin(dist))
        if dist[j] > MATCH_MM:
            s.false_parts += reported
            continue
        t = truth_parts[j]
        if t["known_class"] and d.status == PartStatus.OK and d.class_name == t["class"] and j not in matched:
            if inside[j]:
                matched.add(j)
                s.errors_mm.append(float(dist[j]))
            else:
                s.reported_ok -= 1        # a part across the work-area edge counts neither way
        if not t["known_class"] and d.status == PartStatus.UNKNOWN_COLOUR:
            s.unknown_found += 1
    s.expected = sum(1 for p, ok in zip(truth_parts, inside) if p["known_class"] and ok)
    s.found = len(matched)
    s.unknown_expected = sum(1 for p in truth_parts if not p["known_class"])
    return s


def truth_path(photo: Path) -> Path:
    """``demo/demo_01.jpg`` -> ``demo/demo_01.truth.yaml``: the truth file that may sit beside a photo."""
    photo = Path(photo)
    return photo.with_name(photo.stem + ".truth.yaml")
