"""Marker corners refined from the edges of the black square, to a small fraction of a pixel.

``cv2.aruco``'s subpixel refinement (``cornerSubPix``) is made for chessboard saddle points; on the
L-shaped corners of a marker in a gamma-encoded photo it lands about 0.4 px inside the true corner. So:

1. the grey image is linearised (inverse sRGB curve), where a pixel's value is proportional to how much
   of it is covered by paper, so the 50 % level between ink and paper is the edge itself;
2. along each edge, intensity profiles are sampled across it. Every length scales with the marker: a
   profile starts at the middle of the black border cell (never reaching the marker's own white cells)
   and ends at most a cell out into the quiet zone; the ink and paper levels are read at its two ends,
   and the 50 % crossing is an edge point. A first pass measures the edge blur (the 25-75 % width of the
   profiles); the second, started from the first pass's corners, reaches as far as that blur needs
   (within the same limits) and keeps its profiles that far from the corners;
3. each half edge (the half next to a corner, so lens curvature stays small) gets a total-least-squares
   line, refitted without points off it by more than 3 robust sigmas. A half edge whose points still do
   not lie on a line (RMS residual over :data:`STRAIGHT_RMS_PX`) is not used: the whole edge's line
   stands in for it if that one is straight, otherwise the marker keeps the detector's corners;
4. each corner is the intersection of its two lines. It may move from the detector's corner by at most
   0.3 px plus a third of a cell, the edge blur (the detector's corners are off by about that much on
   blurred edges) and three times its own standard error (from the fit's residuals); a marker with
   any corner that would move farther keeps the detector's corners.

Every sample is read with one ``cv2.remap`` over a 2-D map of bounded width (:func:`sample_image`), so
any number of markers can be refined at once.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import cv2
import numpy as np

__all__ = ["RefinedCorners", "refine_corners", "sample_image", "median_where", "STRAIGHT_RMS_PX"]

_ERFC = np.frompyfunc(math.erfc, 1, 1)


def ndtr(x) -> np.ndarray:
    """The standard normal CDF, Phi(x) = erfc(-x / sqrt 2) / 2, through the C library's erfc (one value per
    marker here, so a ufunc over Python floats is cheap; scipy.special costs 60-500 ms to import)."""
    return 0.5 * _ERFC(-np.asarray(x, float) / math.sqrt(2.0)).astype(float)

STRAIGHT_RMS_PX = 0.35          # a half edge whose points scatter more than this about their line is not used
_S = 10                         # profiles per half edge
_P = 25                         # samples per profile
_MAP_WIDTH = 4096               # remap maps are at most this wide (OpenCV refuses 32767 or more)
_ACROSS = np.linspace(0.0, 1.0, _P)
_END = 3                        # the ink and paper levels: mean of the profile's first / last 3 samples


def sample_image(image: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Bilinear samples of a float32 image at any number of points (edges replicated), same shape as ``x``.

    The points go to ``cv2.remap`` as a map of rows ``_MAP_WIDTH`` wide, so the count has no limit."""
    shape = np.shape(x)
    n = int(np.prod(shape))
    if n == 0:
        return np.zeros(shape, np.float32)
    rows = -(-n // _MAP_WIDTH)
    width = min(n, _MAP_WIDTH)
    mx = np.zeros(rows * width, np.float32)
    my = np.zeros(rows * width, np.float32)
    mx[:n] = np.ravel(x)
    my[:n] = np.ravel(y)
    mx, my = mx.reshape(rows, width), my.reshape(rows, width)
    out = np.empty((rows, width), np.float32)
    for r0 in range(0, rows, 16000):      # the map's height is bounded too
        out[r0:r0 + 16000] = cv2.remap(image, mx[r0:r0 + 16000], my[r0:r0 + 16000], cv2.INTER_LINEAR,
                                       borderMode=cv2.BORDER_REPLICATE)
    return out.ravel()[:n].reshape(shape)


@dataclass(frozen=True)
class RefinedCorners:
    """Refined corners of M markers and how the refinement went.

    corners_px : (M, 4, 2) refined where ``refined``, else the detector's corners
    refined : (M,) bool
    edge_rms_px : (M,) RMS distance of the used edge points from their lines (nan if not refined)
    blur_px : (M,) edge blur, the Gaussian sigma that gives the profiles' 25-75 % width
    """

    corners_px: np.ndarray
    refined: np.ndarray
    edge_rms_px: np.ndarray
    blur_px: np.ndarray


def _profiles(lin, corners, inside_px, outside_px, end_gap_px, offsets_px, per_half=_S):
    """Sample the profiles of every marker: returns the points along each edge (M, 4, 2S, 2), the outward
    normals (M, 4, 2), the across-edge offsets (M, P) and the profiles (M, 4, 2S, P)."""
    m = len(corners)
    a = corners
    b = np.roll(corners, -1, axis=1)
    d = b - a
    length = np.linalg.norm(d, axis=-1, keepdims=True)                     # (M, 4, 1)
    t_dir = d / np.maximum(length, 1e-9)
    normal = np.stack([t_dir[..., 1], -t_dir[..., 0]], axis=-1)
    centre = corners.mean(axis=1, keepdims=True)
    outward = np.sign(np.einsum("mkj,mkj->mk", normal, (a + b) / 2 - centre))[..., None]
    normal = normal * np.where(outward == 0, 1.0, outward)                 # from ink to paper
    # along each edge: S places on each half, from end_gap from the corner to 45 % of the edge
    f0 = np.clip(end_gap_px[:, None] / length[..., 0], 0.08, 0.3)          # (M, 4)
    half = np.linspace(0.0, 1.0, per_half)
    first = f0[..., None] + (0.45 - f0[..., None]) * half                   # (M, 4, S)
    along = np.concatenate([first, 1.0 - first[..., ::-1]], axis=-1)        # (M, 4, 2S)
    base = a[:, :, None, :] + along[..., None] * d[:, :, None, :]
    across = -inside_px[:, None] + (inside_px + outside_px)[:, None] * _ACROSS[None, :]     # (M, P)
    off = np.zeros((m, 2)) if offsets_px is None else np.asarray(offsets_px, float)
    acr = across.astype(np.float32)[:, None, None, :]
    px = (base[..., 0] + off[:, None, None, 0]).astype(np.float32)[..., None] + acr * normal[:, :, None, None, 0].astype(np.float32)
    py = (base[..., 1] + off[:, None, None, 1]).astype(np.float32)[..., None] + acr * normal[:, :, None, None, 1].astype(np.float32)
    prof = sample_image(lin, px, py)                                          # (M, 4, 2S, P)
    return base, normal, across, prof


def _crossings(prof, across, blur_px=None, widths=True):
    """Edge points along each profile: the 50 % crossing from ink to paper, its validity, and the 25-75 %
    width of each profile (px; None unless ``widths``).

    With ``blur_px`` (M,) known, the ink and paper levels read at the profile's ends are corrected for
    the light the blurred edge spills onto them (a Gaussian edge of that sigma: a fraction
    Phi(-distance / sigma) of the other side), which matters on small markers where the ink end is only
    half a cell from the edge."""
    k = _END
    ink = prof[..., :k].mean(axis=-1, keepdims=True)
    paper = prof[..., -k:].mean(axis=-1, keepdims=True)
    if blur_px is not None:
        step0 = (across[:, -1] - across[:, 0]) / (_P - 1)
        sigma = np.maximum(blur_px, 0.3)
        p_ink = ndtr(-(-across[:, 0] - step0) / sigma)[:, None, None, None]       # spill onto the ink end
        p_paper = ndtr(-(across[:, -1] - step0) / sigma)[:, None, None, None]
        det = (1 - p_ink) * (1 - p_paper) - p_ink * p_paper
        ink, paper = ((1 - p_paper) * ink - p_ink * paper) / det, ((1 - p_ink) * paper - p_paper * ink) / det
    ink, paper = ink.astype(np.float32), paper.astype(np.float32)
    contrast = (paper - ink)[..., 0]
    level = (prof - ink) / np.where(np.abs(paper - ink) < 1e-6, np.float32(1e-6), paper - ink)   # 0 ink .. 1 paper
    step = (across[:, -1] - across[:, 0]) / (_P - 1)                                    # (M,)
    flat = level.reshape(-1, _P)
    rows = np.arange(len(flat))
    start = np.broadcast_to(across[:, None, None, 0], level.shape[:-1]).ravel()
    steps = np.broadcast_to(step[:, None, None], level.shape[:-1]).ravel()

    def crossing(frac_level):
        first = np.argmax(flat >= frac_level, axis=-1)
        idx = np.clip(first, 1, _P - 1)
        l0, l1 = flat[rows, idx - 1], flat[rows, idx]
        frac = np.clip((frac_level - l0) / np.where(np.abs(l1 - l0) < 1e-9, 1e-9, l1 - l0), 0.0, 1.0)
        return (start + (idx - 1 + frac) * steps).reshape(level.shape[:-1]), (first > 0).reshape(level.shape[:-1])

    at50, ok50 = crossing(0.5)
    lo = across[:, None, None, 0] + (k - 1) * step[:, None, None]
    hi = across[:, None, None, -1] - (k - 1) * step[:, None, None]
    valid = ok50 & (contrast > 12.0) & (at50 > lo) & (at50 < hi)
    if not widths:
        return at50, valid, None
    return at50, valid, np.maximum(crossing(0.75)[0] - crossing(0.25)[0], 0.0)


def median_where(values, mask, empty):
    """Median over the last axis of the values where ``mask``; ``empty`` where none is (sorted with the
    others last, then the middle of the valid ones: much faster than ``np.nanmedian`` on small rows)."""
    v = np.sort(np.where(mask, values, np.inf), axis=-1)
    n = mask.sum(axis=-1)
    lo = np.take_along_axis(v, np.maximum((n - 1) // 2, 0)[..., None], axis=-1)[..., 0]
    hi = np.take_along_axis(v, np.maximum(n // 2, 0)[..., None], axis=-1)[..., 0]
    with np.errstate(invalid="ignore"):
        mid = 0.5 * (lo + hi)
    return np.where(n > 0, mid, empty)


def _fit_lines(points, valid):
    """Total-least-squares lines (mean point, unit direction) through the valid points of each group
    (last axis: points), in closed form (principal axis of the 2 x 2 scatter), and the RMS distance of
    those points from their line."""
    w = valid.astype(float)
    n = np.maximum(w.sum(axis=-1), 1.0)
    px, py = points[..., 0], points[..., 1]
    mx, my = (px * w).sum(axis=-1) / n, (py * w).sum(axis=-1) / n
    dx, dy = (px - mx[..., None]) * w, (py - my[..., None]) * w
    sxx, syy, sxy = (dx * dx).sum(axis=-1), (dy * dy).sum(axis=-1), (dx * dy).sum(axis=-1)
    theta = 0.5 * np.arctan2(2.0 * sxy, sxx - syy)
    direc = np.stack([np.cos(theta), np.sin(theta)], axis=-1)
    resid = (px - mx[..., None]) * -direc[..., 1:2] + (py - my[..., None]) * direc[..., 0:1]
    return np.stack([mx, my], axis=-1), direc, resid


def _robust_lines(points, valid):
    """Lines through each group's points, refitted without points off the first line by more than
    3 robust sigmas (at least 0.15 px). Returns mean, direction, kept mask, RMS residual, count kept."""
    mean, direc, resid = _fit_lines(points, valid)
    sigma = 1.4826 * median_where(np.abs(resid), valid, 0.0)
    keep = valid & (np.abs(resid) <= np.maximum(3.0 * sigma, 0.15)[..., None])
    mean, direc, resid = _fit_lines(points, keep)
    count = keep.sum(axis=-1)
    rms = np.sqrt((resid ** 2 * keep).sum(axis=-1) / np.maximum(count, 1))
    return mean, direc, keep, rms, count


def _intersect(p1, d1, p2, d2):
    """Where the lines p1 + t d1 and p2 + u d2 meet (Cramer's rule), and whether they are not parallel."""
    det = d1[..., 1] * d2[..., 0] - d1[..., 0] * d2[..., 1]          # det [d1, -d2]
    safe = np.abs(det) > 1e-3
    rx, ry = p2[..., 0] - p1[..., 0], p2[..., 1] - p1[..., 1]
    t = np.where(safe, (ry * d2[..., 0] - rx * d2[..., 1]) / np.where(safe, det, 1.0), 0.0)
    return p1 + t[..., None] * d1, safe


def _pass(lin, corners, side_px, cell_px, blur_px, offsets_px, blur_in=None):
    """One refinement pass from ``corners``: corners, per-corner standard error, per-marker RMS,
    per-corner success (the blur is measured before, by :func:`_blur`)."""
    reach = np.maximum(3.0, 2.5 * blur_px)
    inside = np.minimum(0.5 * cell_px, reach)                              # never past the border cell
    outside = np.minimum(np.maximum(cell_px, 1.5), reach)                  # at most a cell into the quiet zone
    end_gap = 2.0 * blur_px + 0.5
    base, normal, across, prof = _profiles(lin, corners, inside, outside, end_gap, offsets_px)
    at50, valid, _ = _crossings(prof, across, blur_in, widths=False)
    m = len(corners)
    points = base + at50[..., None] * normal[:, :, None, :]                # (M, 4, 2S, 2)
    halves = points.reshape(m, 4, 2, _S, 2)
    hv = valid.reshape(m, 4, 2, _S)
    h_mean, h_dir, _, h_rms, h_n = _robust_lines(halves, hv)               # (M, 4, 2, ...)
    e_mean, e_dir, _, e_rms, e_n = _robust_lines(points, valid)           # (M, 4, ...)
    h_ok = (h_n >= 5) & (h_rms <= STRAIGHT_RMS_PX)
    e_ok = (e_n >= 8) & (e_rms <= STRAIGHT_RMS_PX)
    # a half edge that is not straight: the whole edge's line stands in if that one is
    use_mean = np.where(h_ok[..., None], h_mean, e_mean[:, :, None, :])
    use_dir = np.where(h_ok[..., None], h_dir, e_dir[:, :, None, :])
    use_rms = np.where(h_ok, h_rms, e_rms[:, :, None])
    use_n = np.where(h_ok, h_n, e_n[:, :, None])
    line_ok = h_ok | e_ok[:, :, None]
    # corner k: the half of edge k-1 next to it (half 1) and the half of edge k next to it (half 0)
    prev = (np.arange(4) - 1) % 4
    out, safe = _intersect(use_mean[:, prev, 1], use_dir[:, prev, 1], use_mean[:, :, 0], use_dir[:, :, 0])
    ok = safe & line_ok[:, prev, 1] & line_ok[:, :, 0]
    # standard error of the corner: each line's offset error rms / sqrt(n), grown by the lever from the
    # points' mean to the corner (slope error rms / sqrt(sum t^2))
    def line_sigma(mean, direc, rms, n, corner):
        lever = np.abs(np.einsum("mkj,mkj->mk", corner - mean, direc))
        span = np.maximum(0.4 * side_px[:, None], 1.0)                    # spread of a half edge's points
        return rms / np.sqrt(np.maximum(n, 1)) * np.sqrt(1.0 + 12.0 * (lever / span) ** 2)
    sig = np.hypot(line_sigma(use_mean[:, prev, 1], use_dir[:, prev, 1], use_rms[:, prev, 1], use_n[:, prev, 1], out),
                   line_sigma(use_mean[:, :, 0], use_dir[:, :, 0], use_rms[:, :, 0], use_n[:, :, 0], out))
    used_rms = np.sqrt((use_rms ** 2).mean(axis=(1, 2)))
    return out, sig, used_rms, ok


def _blur(lin, corners, cell_px, offsets_px):
    """Each marker's edge blur (Gaussian sigma, px) from a few profiles across its edges (3 per half
    edge, reaching 3 px or half a cell), read at the detector's corners: the 25-75 % width / 1.349."""
    inside = np.minimum(0.5 * cell_px, 3.0)
    outside = np.minimum(np.maximum(cell_px, 1.5), 3.0)
    _, _, across, prof = _profiles(lin, corners, inside, outside, np.full(len(corners), 2.5), offsets_px, per_half=3)
    _, valid, width = _crossings(prof, across)
    m = len(corners)
    return median_where(width.reshape(m, -1), valid.reshape(m, -1), 1.349) / 1.349


def refine_corners(lin: np.ndarray, corners: np.ndarray, cells_per_side: int, offsets_px=None) -> RefinedCorners:
    """Edge-based refinement of the detector's corners (M, 4, 2) of markers ``cells_per_side`` cells across
    (border included).

    ``lin`` is the linearised photo (float32), or patches of it with each marker's ``offsets_px`` (M, 2)
    from photo to patch pixels.
    """
    rough = np.asarray(corners, float).reshape(-1, 4, 2)
    m = len(rough)
    if m == 0:
        empty = np.zeros(0)
        return RefinedCorners(rough.copy(), np.zeros(0, bool), empty, empty)
    side_px = np.linalg.norm(rough - np.roll(rough, -1, axis=1), axis=-1).mean(axis=1)
    cell_px = side_px / cells_per_side
    blur = _blur(lin, rough, cell_px, offsets_px)
    out, sig, rms, ok = _pass(lin, rough, side_px, cell_px, np.clip(blur, 0.5, None), offsets_px, blur)
    limit = 0.3 + cell_px[:, None] / 3.0 + blur[:, None] + 3.0 * sig
    moved_ok = np.linalg.norm(out - rough, axis=-1) <= limit
    good = (ok & moved_ok).all(axis=1)
    return RefinedCorners(np.where(good[:, None, None], out, rough), good, np.where(good, rms, np.nan), blur)
