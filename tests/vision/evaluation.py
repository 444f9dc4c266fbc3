"""Scoring detections against render truth files: recall, false parts, footprint-centre errors."""

from __future__ import annotations

from dataclasses import dataclass, field

import cv2
import numpy as np

from vision.calibration import calibrate
from vision.markers import detect_markers
from vision.parts import detect_parts

MATCH_MM = 10.0


@dataclass
class Score:
    expected: int = 0              # fully visible known-colour parts
    found: int = 0                 # of those, found with the right class and status ok
    false_parts: int = 0           # ok detections with no truth part within MATCH_MM
    errors_mm: list = field(default_factory=list)
    unknown_expected: int = 0
    unknown_found: int = 0

    @property
    def recall(self) -> float:
        return self.found / self.expected if self.expected else 1.0

    @property
    def rms_mm(self) -> float:
        return float(np.sqrt(np.mean(np.square(self.errors_mm)))) if self.errors_mm else 0.0

    @property
    def max_mm(self) -> float:
        return float(np.max(self.errors_mm)) if self.errors_mm else 0.0

    def add(self, other: "Score") -> "Score":
        return Score(self.expected + other.expected, self.found + other.found, self.false_parts + other.false_parts,
                     self.errors_mm + other.errors_mm, self.unknown_expected + other.unknown_expected,
                     self.unknown_found + other.unknown_found)


def _inside_work_area(part, work_area) -> bool:
    """The part's whole footprint lies in the work-area polygon (else it is rightly cut_by_edge)."""
    from matplotlib.path import Path as PolyPath

    r = 0.5 * float(np.hypot(*part["size_mm"]))
    c = np.asarray(part["centre_mm"], float)
    ring = c + r * np.column_stack([np.cos(np.linspace(0, 2 * np.pi, 16)), np.sin(np.linspace(0, 2 * np.pi, 16))])
    return bool(PolyPath(np.asarray(work_area, float)).contains_points(ring).all())


def score(parts, truth, work_area=None) -> Score:
    """Match detections to the in-view truth parts (nearest within MATCH_MM). Expected: known-colour
    parts whose footprint lies inside the work area; a detection of a part across its edge counts
    neither way."""
    s = Score()
    truth_parts = [p for p in truth["parts"] if p["in_view"]]
    inside = [work_area is None or _inside_work_area(p, work_area) for p in truth_parts]
    centres = np.array([p["centre_mm"] for p in truth_parts]) if truth_parts else np.zeros((0, 2))
    matched = set()
    for d in parts:
        if not len(centres):
            s.false_parts += d.status in ("ok", "unknown_colour")
            continue
        dist = np.linalg.norm(centres - d.xy_mm, axis=1)
        j = int(np.argmin(dist))
        if dist[j] > MATCH_MM:
            s.false_parts += d.status in ("ok", "unknown_colour")
            continue
        t = truth_parts[j]
        if t["known_class"] and inside[j] and d.status == "ok" and d.class_name == t["class"] and j not in matched:
            matched.add(j)
            s.errors_mm.append(float(dist[j]))
        if not t["known_class"] and d.status == "unknown_colour":
            s.unknown_found += 1
    s.expected = sum(1 for p, ok in zip(truth_parts, inside) if p["known_class"] and ok)
    s.found = len(matched)
    s.unknown_expected = sum(1 for p in truth_parts if not p["known_class"])
    return s


def detect_with_own_calibration(image, cell, **kwargs):
    """Calibrate from the photo's own markers, then detect (the photo and its markers, nothing else)."""
    dets = detect_markers(image, cell.markers.dictionary)
    cal = calibrate(dets, cell, (image.shape[1], image.shape[0]))
    return detect_parts(image, cal.mapping, cal.camera_centre_mm, cell, dets, **kwargs), cal


def score_photo(path, cell, truth, **kwargs) -> Score:
    image = cv2.imread(str(path))
    detection, _ = detect_with_own_calibration(image, cell, **kwargs)
    return score(detection.parts, truth, cell.work_area)
