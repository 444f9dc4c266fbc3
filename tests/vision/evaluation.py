"""Scoring detections against render truth files, for the tests (the scoring itself is the product's
own ``planning.truthcheck``, which the batch report uses too)."""

from __future__ import annotations

import cv2

from gripsight.app.truthcheck import TruthComparison as Score
from gripsight.app.truthcheck import compare_with_truth
from gripsight.vision.calibration import calibrate
from gripsight.vision.markers import detect_markers
from gripsight.vision.parts import detect_parts

__all__ = ["Score", "score", "detect_with_own_calibration", "score_photo"]


def score(parts, truth, work_area=None) -> Score:
    return compare_with_truth(parts, truth, work_area)


def detect_with_own_calibration(image, cell, **kwargs):
    """Calibrate from the photo's own markers, then detect (the photo and its markers, nothing else)."""
    dets = detect_markers(image, cell.markers.dictionary)
    cal = calibrate(dets, cell, (image.shape[1], image.shape[0]))
    return detect_parts(image, cal.mapping, cal.camera_centre_mm, cell, dets, **kwargs), cal


def score_photo(path, cell, truth, **kwargs) -> Score:
    image = cv2.imread(str(path))
    detection, _ = detect_with_own_calibration(image, cell, **kwargs)
    return score(detection.parts, truth, cell.work_area)
