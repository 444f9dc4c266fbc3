"""The camera centre from the table homography of a pinhole camera (square pixels, no skew).

The calibration's homography G (table z = 0 -> ideal pixels) of a pinhole camera with intrinsics
K = [[f, 0, cx], [0, f, cy], [0, 0, 1]] is G ~ K [r1 r2 t] (Zhang, "A flexible new technique for camera
calibration", IEEE TPAMI 22(11), 2000, sec. 2.3): given the principal point and f, the rotation and the
camera centre C = -R^T t follow. Over a table seen almost straight down f is poorly fixed by the
plane alone (a frontal plane cannot tell the focal length from the distance), but the camera's tilt
is: so f is chosen to agree with what else is known of the camera's distance, and the centre then
comes with the tilt the homography shows (its nadir is not under the image centre when the camera
leans):

* :func:`centre_for_height`: the height from the cell (``camera.height_mm``, a tape measure);
* :func:`centre_from_raised`: the raised markers' corners, which appear scaled about the nadir by
  k = C_z / (C_z - z); one parameter (f) fitted to all their corners, where a free centre (three
  parameters) from one small raised marker leaves the height and the nadir poorly fixed.

The principal point is taken at the lens's distortion centre (the image centre without a lens model).
"""

from __future__ import annotations

import numpy as np

__all__ = ["principal_point", "pose_for_focal", "centre_for_height", "centre_from_raised"]


def principal_point(mapping, image_size) -> np.ndarray:
    """The lens's distortion centre (px), or the image centre when the lens model has none."""
    centre = getattr(mapping.lens, "centre_px", None)
    if centre is None and hasattr(mapping.lens, "K"):
        centre = (mapping.lens.K[0, 2], mapping.lens.K[1, 2])
    if centre is None:
        w, h = image_size
        centre = ((w - 1) / 2.0, (h - 1) / 2.0)
    return np.asarray(centre, float)


def pose_for_focal(mapping, pp, f: float) -> tuple[np.ndarray, np.ndarray]:
    """(R_camera_from_table, camera centre (3,) table mm) of the pinhole with focal length f (px) and
    principal point pp whose table homography is the mapping's (Zhang 2000, sec. 2.3 and appendix C:
    columns scaled by their mean norm, the rotation made orthonormal by SVD)."""
    G = np.linalg.inv(mapping.H_table_from_pixel)
    A = np.array([[1.0 / f, 0.0, -pp[0] / f], [0.0, 1.0 / f, -pp[1] / f], [0.0, 0.0, 1.0]]) @ G
    lam = 0.5 * (np.linalg.norm(A[:, 0]) + np.linalg.norm(A[:, 1]))
    A = A / lam
    if A[2, 2] < 0:                       # the table is in front of the camera: t_z > 0
        A = -A
    r1, r2 = A[:, 0], A[:, 1]
    Q = np.column_stack([r1, r2, np.cross(r1, r2)])
    u, _, vt = np.linalg.svd(Q)
    R = u @ vt
    if np.linalg.det(R) < 0:
        R = u @ np.diag([1.0, 1.0, -1.0]) @ vt
    centre = -R.T @ A[:, 2]
    return R, centre


def _focal_guess(mapping, pp, height_mm: float) -> float:
    """f (px) of a camera ``height_mm`` above the table looking straight down: height over mm per px."""
    return float(height_mm / mapping.mm_per_px(np.asarray(pp, float)[None])[0])


def centre_for_height(mapping, image_size, height_mm: float) -> np.ndarray:
    """The camera centre (3,) at ``height_mm`` above the table, with the tilt the homography shows."""
    pp = principal_point(mapping, image_size)

    def residual(p):
        return [pose_for_focal(mapping, pp, float(p[0]))[1][2] - height_mm]

    from scipy.optimize import least_squares     # 0.5 s to import: only when fitting

    f = least_squares(residual, [max(_focal_guess(mapping, pp, height_mm), 2.0)], x_scale=[100.0],
                      bounds=([1.0], [np.inf])).x[0]      # a focal length is positive (markers that fit no pinhole)
    return pose_for_focal(mapping, pp, float(f))[1]


def centre_from_raised(mapping, image_size, corners_px: np.ndarray, corners_mm: np.ndarray,
                       height_guess_mm: float) -> np.ndarray:
    """The camera centre (3,) from raised markers' corners (photo px (N, 2) and table mm (N, 3)): the
    focal length whose pinhole puts them where they appear through the table mapping."""
    pp = principal_point(mapping, image_size)
    q = mapping(corners_px)
    P = np.asarray(corners_mm, float)

    def residual(p):
        c = pose_for_focal(mapping, pp, float(p[0]))[1]
        k = c[2] / (c[2] - P[:, 2])
        return (c[:2] + (P[:, :2] - c[:2]) * k[:, None] - q).ravel()

    from scipy.optimize import least_squares

    f = least_squares(residual, [max(_focal_guess(mapping, pp, height_guess_mm), 2.0)], x_scale=[100.0],
                      bounds=([1.0], [np.inf])).x[0]      # a focal length is positive (markers that fit no pinhole)
    return pose_for_focal(mapping, pp, float(f))[1]
