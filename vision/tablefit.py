"""The table mapping fitted to markers' corners (the calibration's step 2, :mod:`vision.calibration`): a
homography from photo pixels to table mm, with the lens fixed or Fitzgibbon's division model free, by
``scipy.optimize.least_squares`` on the table-mm residuals from the normalised DLT; and the checks that the
markers can carry such a fit (at least 3, not in a line).

The markers are the calibration's ``MarkerFit`` records (``used``, ``corners_px``, ``corners_mm``, ``id``),
read by attribute only, so this module needs nothing of the calibration's.
"""

from __future__ import annotations

import numpy as np

from gripsight.vision.errors import CalibrationError
from gripsight.vision.homography import FitFailure, TableMapping, apply_homography, fit_homography_dlt, normalising_transform
from gripsight.vision.lens import DivisionLens, NoLens

__all__ = ["check_marker_geometry", "fit_table_mapping", "marker_residuals_mm", "fit_used_markers"]


def check_marker_geometry(fits: list, photo: str) -> None:
    """At least 3 markers in use, and not nearly in a line (else a :class:`CalibrationError`)."""
    used = [f for f in fits if f.used]
    if len(used) < 3:
        found = ", ".join(str(f.id) for f in fits) or "none"
        raise CalibrationError(f"{photo}: {len(used)} usable table marker(s) found (ids: {found}); at least 3 "
                               "not in a line are needed; check that the markers are in view, lit and in focus")
    centres = np.array([f.corners_mm[:, :2].mean(axis=0) for f in used])
    sv = np.linalg.svd(centres - centres.mean(axis=0), compute_uv=False)
    if sv[1] < 0.08 * sv[0]:
        ids = ", ".join(str(f.id) for f in used)
        raise CalibrationError(f"{photo}: the usable markers ({ids}) lie nearly in a line; the mapping across "
                               "the table would be unreliable; make sure markers on both sides of the work area are seen")


def fit_table_mapping(uv, xy, lens_kind: str, image_size, fixed_lens=None, start=None):
    """Least-squares fit from photo pixels to table mm; returns (mapping, residual vectors (N, 2) mm).

    ``lens_kind``: ``fixed`` (H only, through ``fixed_lens`` or none), ``division`` (H and lambda, centre
    at the image centre) or ``division_centre`` (H, lambda and the distortion centre; started from
    ``start``, a division fit).
    """
    w, h = image_size
    base = fixed_lens if fixed_lens is not None else DivisionLens.for_image(0.0, w, h)
    if start is not None:
        base = start.lens
    ideal0 = base.ideal(uv) if (fixed_lens is not None or start is not None) else uv
    T_px, T_mm = normalising_transform(ideal0), normalising_transform(xy)
    Hn0 = T_mm @ fit_homography_dlt(ideal0, xy) @ np.linalg.inv(T_px)
    Hn0 = Hn0 / Hn0[2, 2]
    free_lens = lens_kind in ("division", "division_centre")
    free_centre = lens_kind == "division_centre"
    centre0 = np.asarray(base.centre_px, float) if free_lens else None

    def lens_of(params):
        if not free_lens:
            return None
        centre = centre0 + (params[9:11] * base.scale_px if free_centre else 0.0)
        return DivisionLens(params[8], tuple(centre), base.scale_px)

    def residual(params):
        Hn = np.append(params[:8], 1.0).reshape(3, 3)
        ideal = lens_of(params).ideal(uv) if free_lens else ideal0
        pred = apply_homography(np.linalg.inv(T_mm) @ Hn @ T_px, ideal)
        return (pred - xy).ravel()

    A_mm = np.linalg.inv(T_mm)
    q_px = np.column_stack([ideal0, np.ones(len(ideal0))]) @ T_px.T        # (N, 3) normalised pixels

    def jacobian(params):
        """d residual / d Hn[:8] for a fixed lens, in closed form: z = A Hn q, pred = z[:2] / z[2]."""
        Hn = np.append(params[:8], 1.0).reshape(3, 3)
        z = q_px @ (A_mm @ Hn).T                                           # (N, 3)
        inv_w = 1.0 / z[:, 2]
        d_pred_dz = np.zeros((len(z), 2, 3))
        d_pred_dz[:, 0, 0] = d_pred_dz[:, 1, 1] = inv_w
        d_pred_dz[:, :, 2] = -z[:, :2] * (inv_w ** 2)[:, None]
        G = d_pred_dz @ A_mm                                               # (N, 2, 3): d pred / d (Hn q)
        J = G[:, :, :, None] * q_px[:, None, None, :]                      # (N, 2, 3 rows of Hn, 3 columns)
        return J.reshape(2 * len(z), 9)[:, :8]

    x0 = Hn0.ravel()[:8]
    if free_lens:
        x0 = np.append(x0, [base.lam if start is not None else 0.0] + ([0.0, 0.0] if free_centre else []))
    from scipy.optimize import least_squares     # 0.5 s to import: only when fitting

    sol = least_squares(residual, x0, jac="2-point" if free_lens else jacobian, method="lm",
                        xtol=1e-15, ftol=1e-15, gtol=1e-15, max_nfev=3000)
    Hn = np.append(sol.x[:8], 1.0).reshape(3, 3)
    H = np.linalg.inv(T_mm) @ Hn @ T_px
    lens = lens_of(sol.x) if free_lens else (fixed_lens or NoLens())
    return TableMapping(H / H[2, 2], lens), sol.fun.reshape(-1, 2)


def marker_residuals_mm(mapping: TableMapping, fits: list) -> np.ndarray:
    """RMS table-mm residual of each marker's corners under a mapping."""
    return np.array([np.sqrt(((mapping(f.corners_px) - f.corners_mm[:, :2]) ** 2).sum(axis=1).mean()) for f in fits])


def fit_used_markers(fits, lens_kind, image_size, fixed_lens, photo):
    """:func:`fit_table_mapping` over the corners of the markers in use (checked first)."""
    used = [f for f in fits if f.used]
    check_marker_geometry(fits, photo)
    uv = np.concatenate([f.corners_px for f in used])
    xy = np.concatenate([f.corners_mm[:, :2] for f in used])
    try:
        return fit_table_mapping(uv, xy, lens_kind, image_size, fixed_lens)
    except FitFailure as exc:
        raise CalibrationError(f"{photo}: {exc}") from None
