"""Point in polygon, the one implementation (even-odd rule, vectorised; any vertex order)."""

from __future__ import annotations

import numpy as np

__all__ = ["points_in_polygon"]


def points_in_polygon(points, polygon) -> np.ndarray:
    """Mask (N,) of points (N, 2) inside a polygon (K, 2), both in the same frame (e.g. table mm)."""
    pts = np.asarray(points, float).reshape(-1, 2)
    poly = np.asarray(polygon, float)
    x0, y0 = poly[:, 0], poly[:, 1]
    x1, y1 = np.roll(x0, -1), np.roll(y0, -1)
    px, py = pts[:, :1], pts[:, 1:2]
    with np.errstate(divide="ignore", invalid="ignore"):
        crosses = ((y0 > py) != (y1 > py)) & (px < x0 + (py - y0) * (x1 - x0) / (y1 - y0))
    return crosses.sum(axis=1) % 2 == 1
