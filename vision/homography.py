"""Plane-to-plane homographies and the pixel -> table mapping.

Transforms are named destination-from-source: ``H_table_from_pixel`` maps ideal (undistorted) pixels to
table millimetres; :class:`TableMapping` adds the lens, so ``mapping(uv_px)`` takes photo pixels to
table mm (``table_from_pixel``) and ``mapping.inverse(xy_mm)`` table mm to photo pixels.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.vision.lens import NoLens

__all__ = ["apply_homography", "fit_homography_dlt", "normalising_transform", "TableMapping", "FitFailure"]


class FitFailure(ValueError):
    """Points that cannot determine a homography (too few, coincident, or collinear)."""


def apply_homography(H, pts) -> np.ndarray:
    """Apply a 3x3 homography to points (N, 2): returns (N, 2)."""
    p = np.asarray(pts, dtype=float)
    q = p @ H[:, :2].T + H[:, 2]
    return q[:, :2] / q[:, 2:3]


def normalising_transform(pts) -> np.ndarray:
    """Similarity T moving the centroid to the origin with mean distance sqrt(2) (Hartley normalisation)."""
    p = np.asarray(pts, dtype=float)
    c = p.mean(axis=0)
    d = np.linalg.norm(p - c, axis=1).mean()
    if d < 1e-12:
        raise FitFailure("all points coincide")
    s = np.sqrt(2.0) / d
    return np.array([[s, 0, -s * c[0]], [0, s, -s * c[1]], [0, 0, 1.0]])


def fit_homography_dlt(src, dst) -> np.ndarray:
    """Normalised direct linear transform (Hartley & Zisserman 2003, Algorithm 4.2).

    Both point sets are normalised (centroid at the origin, mean distance sqrt(2)); each
    correspondence x' = H x gives two rows of A h = 0::

        [ 0  0  0   -x -y -1   y'x  y'y  y' ]
        [ x  y  1    0  0  0  -x'x -x'y -x' ]

    h is the right singular vector of A with the smallest singular value; H = T'^-1 H_n T, scaled so
    H[2, 2] = 1.

    Parameters
    ----------
    src, dst : ndarray, shape (N, 2), N >= 4
        Corresponding points (source and destination frames).

    Raises
    ------
    FitFailure
        Fewer than 4 points, or points too close to a line to fix a homography.
    """
    src = np.asarray(src, dtype=float)
    dst = np.asarray(dst, dtype=float)
    if src.shape != dst.shape or src.ndim != 2 or src.shape[1] != 2:
        raise ValueError(f"src, dst: expected equal shapes (N, 2), got {src.shape} and {dst.shape}")
    if len(src) < 4:
        raise FitFailure(f"a homography needs at least 4 points, got {len(src)}")
    T, Tp = normalising_transform(src), normalising_transform(dst)
    s = apply_homography(T, src)
    d = apply_homography(Tp, dst)
    n = len(s)
    A = np.zeros((2 * n, 9))
    x, y, xp, yp = s[:, 0], s[:, 1], d[:, 0], d[:, 1]
    A[0::2, 3:6] = -np.column_stack([x, y, np.ones(n)])
    A[0::2, 6:9] = np.column_stack([yp * x, yp * y, yp])
    A[1::2, 0:3] = np.column_stack([x, y, np.ones(n)])
    A[1::2, 6:9] = -np.column_stack([xp * x, xp * y, xp])
    _, sv, vt = np.linalg.svd(A)
    if sv[-2] < 1e-9 * sv[0]:
        raise FitFailure("the points are (nearly) collinear: they do not fix a homography")
    Hn = vt[-1].reshape(3, 3)
    H = np.linalg.inv(Tp) @ Hn @ T
    if abs(H[2, 2]) < 1e-15:
        raise FitFailure("degenerate homography (H[2,2] = 0)")
    return H / H[2, 2]


@dataclass(frozen=True)
class TableMapping:
    """Photo pixels -> table mm through a lens and ``H_table_from_pixel`` (ideal pixels -> table z = 0)."""

    H_table_from_pixel: np.ndarray
    lens: object = NoLens()

    def __call__(self, uv_px) -> np.ndarray:
        """``table_from_pixel``: photo pixels (N, 2) -> table points (N, 2) mm on z = 0."""
        return apply_homography(self.H_table_from_pixel, self.lens.ideal(np.asarray(uv_px, float).reshape(-1, 2)))

    table_from_pixel = __call__

    def inverse(self, xy_mm) -> np.ndarray:
        """``pixel_from_table``: table points (N, 2) mm on z = 0 -> photo pixels (N, 2)."""
        ideal = apply_homography(np.linalg.inv(self.H_table_from_pixel), np.asarray(xy_mm, float).reshape(-1, 2))
        return self.lens.distort(ideal)

    pixel_from_table = inverse

    def mm_per_px(self, uv_px) -> np.ndarray:
        """Local scale (mm per pixel, geometric mean of the two axes) at photo pixels (N, 2)."""
        uv = np.asarray(uv_px, float).reshape(-1, 2)
        e = 0.5
        dx = self(uv + [e, 0]) - self(uv - [e, 0])
        dy = self(uv + [0, e]) - self(uv - [0, e])
        area = np.abs(dx[:, 0] * dy[:, 1] - dx[:, 1] * dy[:, 0]) / (2 * e) ** 2
        return np.sqrt(area)
