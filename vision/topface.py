"""The geometry of one blob, in table-mapped millimetres: where its part's footprint centre is.

A part of height h seen from the camera centre C appears scaled by k = C_z / (C_z - h) about the
nadir n. The top face's centre m_top gives the footprint centre c = n + (m_top - n) / k. The top face is
found by fitting the class's shape to the outer half of the blob's outline (:func:`fit_top_face`), the
half away from the nadir, which is always the top face's own edge whichever side faces the colour
threshold kept; a row of touching boxes is fitted as one longer box and cut (:func:`fit_row_of_tops`).
Where no fit holds, the two centroid formulas of DESIGN.md sec. 6 are chosen by the blob's area
(:func:`footprint_centre`).
"""

from __future__ import annotations

import cv2
import numpy as np

__all__ = ["polygon_area_centroid", "expected_area_mm2", "footprint_centre", "outward_normals",
           "fit_top_face", "fit_row_of_tops", "min_rect"]


def polygon_area_centroid(xy: np.ndarray):
    x, y = xy[:, 0], xy[:, 1]
    xn, yn = np.roll(x, -1), np.roll(y, -1)
    cross = x * yn - xn * y
    area = 0.5 * cross.sum()
    if abs(area) < 1e-9:
        return 0.0, xy.mean(axis=0)
    cx = ((x + xn) * cross).sum() / (6 * area)
    cy = ((y + yn) * cross).sum() / (6 * area)
    return abs(area), np.array([cx, cy])


def expected_area_mm2(cls) -> float:
    fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
    return float(np.pi / 4 * fp[0] * fp[1]) if cls.shape == "cylinder" else float(fp[0] * fp[1])


def footprint_centre(m, area_mapped, nadir, k, expected_mm2, mode: str):
    """(centre, model used) for a blob whose table-mapped centroid is m and area ``area_mapped``.

    ``auto`` predicts the blob's mapped area under each model and takes the nearer: the top face alone
    maps to k^2 A; the top face with the visible sides to about k A + (k - 1) r L, the hull of the
    footprint (scale 1) and the top face (scale k, shifted (k - 1) r away from the nadir), L = sqrt(A).
    """
    if mode == "auto":
        r = float(np.linalg.norm(m - nadir))
        a_top = k * k * expected_mm2
        a_sides = k * expected_mm2 + (k - 1) * r * np.sqrt(expected_mm2)
        mode = "silhouette" if abs(area_mapped - a_sides) < abs(area_mapped - a_top) else "top"
    if mode == "top":
        return nadir + (m - nadir) / k, "top"
    if mode == "silhouette":
        return nadir + (m - nadir) * 2.0 / (1.0 + k), "silhouette"
    return m, "none"


def outward_normals(outline: np.ndarray, step: int = 3) -> np.ndarray:
    """Unit outward normals (N, 2) of a closed outline, from its neighbours ``step`` points either side."""
    tangent = np.roll(outline, -step, axis=0) - np.roll(outline, step, axis=0)
    tangent /= np.maximum(np.linalg.norm(tangent, axis=1, keepdims=True), 1e-12)
    x, y = outline[:, 0], outline[:, 1]
    ccw = (x * np.roll(y, -1) - np.roll(x, -1) * y).sum() > 0
    normal = np.column_stack([tangent[:, 1], -tangent[:, 0]])
    return normal if ccw else -normal


def _robust_gauss_newton(residual, x0, iterations: int = 12, scale: float = 0.15):
    """Minimise sum rho(r_i), rho soft L1 with scale ``scale`` (mm), by Levenberg-Marquardt on
    iteratively reweighted least squares. ``residual`` takes parameter sets (P, n) and returns (P, N), so
    the forward-difference Jacobian is one call. Returns (x, residuals)."""
    def cost(r):
        return np.sum(np.sqrt(1.0 + (r / scale) ** 2) - 1.0, axis=-1)

    x = np.asarray(x0, float)
    n = len(x)
    eps = 1e-6 * np.maximum(1.0, np.abs(x))
    r = residual(x[None])[0]
    c = float(cost(r))
    damping = 1e-3
    for _ in range(iterations):
        rr = residual(np.vstack([x, x + np.diag(eps)]))
        J = ((rr[1:] - rr[0]) / eps[:, None]).T                     # (N, n)
        w = 1.0 / np.sqrt(1.0 + (r / scale) ** 2)                    # IRLS weights of soft L1
        A = J.T @ (J * w[:, None])
        g = J.T @ (w * r)
        diag = np.diag(np.diag(A) + 1e-12)
        # try several dampings at once; keep the least damped step that lowers the cost
        dampings = damping * 10.0 ** np.arange(4)
        try:
            steps = np.linalg.solve(A[None] + dampings[:, None, None] * diag[None], np.broadcast_to(g, (4, n))[..., None])[..., 0]
        except np.linalg.LinAlgError:
            break
        trials = x - steps
        r_trials = residual(trials)
        costs = cost(r_trials)
        ok = np.flatnonzero(costs < c)
        if not ok.size:
            break
        j = int(ok[0])
        step = steps[j]
        x, r, c = trials[j], r_trials[j], float(costs[j])
        damping = max(dampings[j] / 10.0, 1e-7)
        if np.abs(step).max() < 1e-3:           # mm and rad: far below what matters here
            break
    return x, r


def fit_top_face(outline_mm: np.ndarray, normals: np.ndarray, centre, nadir, k, cls, yaw_guess_deg: float,
                  with_axis: bool = False):
    """Fit the class's top face (circle, or rectangle of the class's proportions; centre, yaw, size
    free) to the outer half of a blob's outline: the half away from the nadir, which is always the top
    face's own edge whichever side faces the segmentation kept (outline points facing away from the
    nadir, beyond the centre: the sides' own edges face the nadir). Two passes: the second keeps only the
    outline beyond the first fit's centre. A robust loss (soft L1, 0.15 mm) discounts the stretches of
    outline that run from the top face down the visible sides. Returns the top face's centre in
    table-mapped mm, or None if the outline does not look like the class's shape. With
    ``with_axis``, returns (centre, unit vector of the footprint's first axis, fitted scale)."""
    fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
    centre = np.asarray(centre, float)
    radial = centre - nadir
    e_r = radial / np.linalg.norm(radial) if np.linalg.norm(radial) > 1e-6 else None
    round_part = cls.shape == "cylinder"
    half = np.array([fp[0], fp[1]]) / 2.0
    facing_out = np.ones(len(outline_mm), bool) if e_r is None else normals @ e_r > -0.1
    params, res = None, None
    for _ in range(2):
        pts = outline_mm if e_r is None else outline_mm[((outline_mm - centre) @ e_r >= 0.0) & facing_out]
        if len(pts) < 12:
            return None
        if len(pts) > 60:
            pts = pts[:: int(np.ceil(len(pts) / 60))]
        px, py = pts[:, 0][None, :], pts[:, 1][None, :]
        if round_part:
            def circle(p, px=px, py=py):
                return np.hypot(px - p[:, :1], py - p[:, 1:2]) - p[:, 2:3]
            params, res = _robust_gauss_newton(circle, [centre[0], centre[1], 0.5 * k * fp[0]])
            scale = 2 * params[2] / fp[0]
        else:
            def rectangle(p, px=px, py=py):
                c, sn = np.cos(p[:, 2:3]), np.sin(p[:, 2:3])
                dx, dy = px - p[:, :1], py - p[:, 1:2]
                qx = np.abs(dx * c + dy * sn) - p[:, 3:4] * half[0]
                qy = np.abs(-dx * sn + dy * c) - p[:, 3:4] * half[1]
                outside = np.hypot(np.maximum(qx, 0.0), np.maximum(qy, 0.0))
                return np.where((qx > 0) | (qy > 0), outside, np.maximum(qx, qy))
            guesses = [yaw_guess_deg, yaw_guess_deg + 45.0] if params is None else [np.degrees(params[2])]
            best = None
            for yaw in guesses:
                trial = _robust_gauss_newton(rectangle, [centre[0], centre[1], np.radians(yaw), k])
                cost = np.sum(np.sqrt(1.0 + (trial[1] / 0.15) ** 2) - 1.0)
                if best is None or cost < best[0]:
                    best = (cost, *trial)
                if np.median(np.abs(trial[1])) < 0.1:     # a clean fit: the other start is not needed
                    break
            _, params, res = best
            scale = params[3]
        centre = params[:2]
    size_ratio = scale / k
    if not (0.85 < size_ratio < 1.15) or float(np.median(np.abs(res))) > 0.4:
        return None
    if with_axis:
        yaw = params[2] if not round_part else 0.0
        return np.array(params[:2]), np.array([np.cos(yaw), np.sin(yaw)]), float(scale)
    return np.array(params[:2])


class _Footprint:
    """A stand-in class with another footprint (for fitting a row of touching boxes as one box)."""

    def __init__(self, length_mm: float, width_mm: float):
        self.footprint_mm = [length_mm, width_mm]
        self.shape = "box"


def fit_row_of_tops(outline_mm, normals, m, nadir, k, cls, pieces):
    """Touching boxes face to face make one box n parts long: fit that (along either side of the class's
    footprint) to the blob's outline and cut it into n top faces. Returns each piece's top-face centre
    (table-mapped mm), in the pieces' order, or None if the row does not fit."""
    n = len(pieces)
    fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
    _, _, yaw_guess = min_rect(outline_mm, k)
    best = None
    for along, across in ((fp[0], fp[1]), (fp[1], fp[0])):
        fit = fit_top_face(outline_mm, normals, m, nadir, k, _Footprint(n * along, across), yaw_guess, with_axis=True)
        if fit is None:
            continue
        centre, axis, scale = fit
        tops = centre + np.outer((np.arange(n) - (n - 1) / 2) * along * scale, axis)
        piece_centres = np.array([p[0] for p in pieces])
        cost = np.linalg.norm(tops[:, None, :] - piece_centres[None], axis=2)
        order = np.argmin(cost, axis=0)                          # the top nearest each k-means piece
        if len(set(order.tolist())) != n or cost[order, np.arange(n)].max() > 0.5 * along * scale:
            continue
        spread = cost[order, np.arange(n)].max()
        if best is None or spread < best[0]:
            best = (spread, tops[order])
    return None if best is None else list(best[1])


def min_rect(points_mm: np.ndarray, scale: float):
    (_, _), (a, b), ang = cv2.minAreaRect(points_mm.astype(np.float32))
    if a >= b:
        length, width, yaw = a, b, ang
    else:
        length, width, yaw = b, a, ang + 90.0
    yaw = (yaw + 90.0) % 180.0 - 90.0
    return float(length / scale), float(width / scale), float(yaw)
