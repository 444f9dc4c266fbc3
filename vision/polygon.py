"""Plane polygons, the one implementation of each: point in polygon (even-odd rule, vectorised; any
vertex order), the convex hull, the area, and the overlap of two convex polygons."""

from __future__ import annotations

import numpy as np

__all__ = ["points_in_polygon", "convex_hull", "polygon_area", "convex_overlap"]


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


def _cross(o, a, b) -> float:
    return (a[0] - o[0]) * (b[1] - o[1]) - (a[1] - o[1]) * (b[0] - o[0])


def convex_hull(points) -> np.ndarray:
    """The convex hull (K, 2) of points (N, 2), counter-clockwise (x right, y up), collinear points
    dropped (Andrew's monotone chain)."""
    pts = sorted(map(tuple, np.asarray(points, float).reshape(-1, 2)))
    if len(pts) < 3:
        return np.array(pts, float).reshape(-1, 2)
    lower: list = []
    upper: list = []
    for p in pts:
        while len(lower) >= 2 and _cross(lower[-2], lower[-1], p) <= 0:
            lower.pop()
        lower.append(p)
    for p in reversed(pts):
        while len(upper) >= 2 and _cross(upper[-2], upper[-1], p) <= 0:
            upper.pop()
        upper.append(p)
    return np.array(lower[:-1] + upper[:-1], float)


def polygon_area(polygon) -> float:
    """Area of a simple polygon (K, 2) (shoelace formula; any vertex order)."""
    p = np.asarray(polygon, float).reshape(-1, 2)
    if len(p) < 3:
        return 0.0
    x, y = p[:, 0], p[:, 1]
    return 0.5 * abs(float(np.dot(x, np.roll(y, -1)) - np.dot(y, np.roll(x, -1))))


def convex_overlap(a, b) -> np.ndarray:
    """The overlap (K, 2) of two convex polygons (any vertex order), empty (0, 2) if they do not overlap:
    ``a`` clipped by each edge of ``b`` in turn (Sutherland and Hodgman, 1974)."""
    out = convex_hull(a)
    clip = convex_hull(b)
    if len(out) < 3 or len(clip) < 3:
        return np.zeros((0, 2))
    for c0, c1 in zip(clip, np.roll(clip, -1, axis=0)):
        if len(out) == 0:
            break
        side = (c1[0] - c0[0]) * (out[:, 1] - c0[1]) - (c1[1] - c0[1]) * (out[:, 0] - c0[0])   # > 0: inside
        kept = []
        for k in range(len(out)):
            j = (k + 1) % len(out)
            if side[k] >= 0:
                kept.append(out[k])
            if (side[k] >= 0) != (side[j] >= 0):
                t = side[k] / (side[k] - side[j])
                kept.append(out[k] + t * (out[j] - out[k]))
        out = np.array(kept, float).reshape(-1, 2)
    return out if len(out) >= 3 else np.zeros((0, 2))
