"""The camera centre of a pinhole camera (square pixels, no skew) from the calibration photo.

The calibration's homography G (table z = 0 -> ideal pixels) of a pinhole with intrinsics
K = [[f, 0, cx], [0, f, cy], [0, 0, 1]] is G ~ K [r1 r2 t] (Zhang, "A flexible new technique for camera
calibration", IEEE TPAMI 22(11), 2000, sec. 2.3). One plane gives two constraints on (f, cx, cy) (sec. 3.1):
a one-parameter family of cameras explains the table equally well. A tilted camera's homography fixes
its principal point for a given focal length; one looking straight down (the usual cell) hardly does,
and the focal length trades against the distance there. What decides:

* the raised markers: where their corners appear against where the layout puts them (they appear
  scaled about the nadir by k = C_z / (C_z - z)), which tells the distance and the nadir;
* the cell's ``camera.height_mm`` (a tape measure, good to about 10 %);
* the principal point lies near the image centre, or the lens's distortion centre (common practice;
  a lens file's K gives it outright).

:func:`fit_pinhole` weighs all of them in one maximum a posteriori fit over the marker corners
(reprojection error in ideal pixels, each source with its own standard deviation), so the nadir is
not put under the image centre when the homography shows the principal point elsewhere, and a
principal point the photo cannot show stays at its prior.
"""

from __future__ import annotations

import cv2
import numpy as np

__all__ = ["principal_point", "pose_for_focal", "fit_pinhole"]


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


def _project(p, xyz_mm):
    """Ideal pixels (N, 2) of table points (N, 3) for pinhole parameters (f, cx, cy, rvec, centre)."""
    R = cv2.Rodrigues(np.asarray(p[3:6], float))[0]
    cam = (xyz_mm - p[6:9]) @ R.T
    return p[0] * cam[:, :2] / cam[:, 2:3] + p[1:3]


def fit_pinhole(mapping, image_size, floor_px, floor_mm, raised_px=None, raised_mm=None, *,
                height_mm: float, height_sd_mm: float | None, pp_sd_px: float, noise_px: float):
    """The camera centre (3,) table mm, principal point (2,) px and focal length (px) of a pinhole with
    square pixels seen through the calibration's lens: a maximum a posteriori fit.

    Data: the table markers' corners (photo px (N, 2), table mm (N, 3) on z = 0) through the lens to
    ideal pixels, each with the measured noise ``noise_px``; raised markers' corners (N, 2) px and
    (N, 3) mm: where they appear against where the layout puts them tells the camera's distance and,
    through their parallax, where it stands. Priors: the principal point near
    :func:`principal_point` (standard deviation ``pp_sd_px``), the height near ``height_mm``
    (``height_sd_mm``; None: no prior). A tilted camera's table homography fixes its principal point
    for a given focal length (Zhang 2000, sec. 3.1: the two constraints a plane gives on the image of
    the absolute conic); a camera looking straight down leaves it to the prior.
    """
    from scipy.optimize import least_squares

    pp0 = principal_point(mapping, image_size)
    uv_floor = mapping.lens.ideal(np.asarray(floor_px, float))
    P_floor = np.asarray(floor_mm, float)
    have_raised = raised_px is not None and len(raised_px) >= 4
    if have_raised:
        uv_raised = mapping.lens.ideal(np.asarray(raised_px, float))
        P_raised = np.asarray(raised_mm, float)
    f0 = max(_focal_guess(mapping, pp0, height_mm), 2.0)
    R0, c0 = pose_for_focal(mapping, pp0, f0)
    start = np.concatenate([[f0], pp0, cv2.Rodrigues(R0)[0].ravel(), c0])

    def residual(p):
        out = [((_project(p, P_floor) - uv_floor) / noise_px).ravel(), (p[1:3] - pp0) / pp_sd_px]
        if have_raised:
            r = _project(p, P_raised) - uv_raised
            out.append((r / noise_px).ravel())
        if height_sd_mm is not None:
            out.append([(p[8] - height_mm) / height_sd_mm])
        return np.concatenate(out)

    scale = np.array([100.0, 10.0, 10.0, 0.01, 0.01, 0.01, 10.0, 10.0, 10.0])
    p = least_squares(residual, start, x_scale=scale, method="lm").x
    return p[6:9], p[1:3], float(p[0])
