"""Marker geometry on the table: where a laid marker's black square and its paper are, in table mm.

Calibration (which corners are which table points), detection (marker paper masked out of the part
search) and the renderer all take it from here.
"""

from __future__ import annotations

import numpy as np

__all__ = ["marker_paper_corners_mm"]


def marker_paper_corners_mm(placement, size_mm: float, margin_mm: float = 0.0) -> np.ndarray:
    """Corners (4, 3) in table mm of a marker's black square (margin 0) or its paper, in OpenCV's order
    (top-left, top-right, bottom-right, bottom-left of the marker image; yaw 0: image top toward +x)."""
    h = size_mm / 2 + margin_mm
    local = np.array([[h, h], [h, -h], [-h, -h], [-h, h]])       # (x, y): top edge toward +x, right toward -y
    yaw = np.radians(placement.yaw_deg)
    rot = np.array([[np.cos(yaw), -np.sin(yaw)], [np.sin(yaw), np.cos(yaw)]])
    xy = local @ rot.T + [placement.x, placement.y]
    return np.column_stack([xy, np.full(4, float(placement.z))])
