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

import functools
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
_MAP_ROWS = 16000               # ... and at most this tall
_ACROSS = np.linspace(0.0, 1.0, _P)
_END = 3                        # the ink and paper levels: mean of the profile's first / last 3 samples


def sample_image(image: np.ndarray, x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Bilinear samples of a float32 image at any number of points (edges replicated), same shape as ``x``.

    Points given as rows (R, L) with L at most ``_MAP_WIDTH`` (one row per marker, say) go to
    ``cv2.remap`` as they are, in blocks of rows; any other shape as a map of rows ``_MAP_WIDTH`` wide.
    Either way the count has no limit."""
    shape = np.shape(x)
    n = int(np.prod(shape))
    if n == 0:
        return np.zeros(shape, np.float32)
    if len(shape) == 2 and shape[1] <= _MAP_WIDTH:
        mx, my = np.ascontiguousarray(x, np.float32), np.ascontiguousarray(y, np.float32)
    else:
        rows = -(-n // _MAP_WIDTH)
        width = min(n, _MAP_WIDTH)
        mx = np.zeros(rows * width, np.float32)
        my = np.zeros(rows * width, np.float32)
        mx[:n] = np.ravel(x)
        my[:n] = np.ravel(y)
        mx, my = mx.reshape(rows, width), my.reshape(rows, width)
    if len(mx) <= _MAP_ROWS:
        out = cv2.remap(image, mx, my, cv2.INTER_LINEAR, borderMode=cv2.BORDER_REPLICATE)
    else:
        out = np.empty(mx.shape, np.float32)
        for r0 in range(0, len(mx), _MAP_ROWS):      # the map's height is bounded too
            out[r0:r0 + _MAP_ROWS] = cv2.remap(image, mx[r0:r0 + _MAP_ROWS], my[r0:r0 + _MAP_ROWS], cv2.INTER_LINEAR,
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


@functools.lru_cache(maxsize=4)
def _spread(count: int) -> np.ndarray:
    return np.linspace(0.0, 1.0, count)


def _edge_frames(corners):
    """Each marker's edges: start corners (M, 4, 2), edge vectors (M, 4, 2), lengths (M, 4) and unit
    normals from ink to paper (M, 4, 2). Both passes sample from the detector's corners, so once."""
    a = corners
    b = corners[:, [1, 2, 3, 0]]
    d = b - a
    length = np.sqrt((d * d).sum(axis=-1))                                 # (M, 4)
    t_dir = d / np.maximum(length, 1e-9)[..., None]
    normal = np.stack([t_dir[..., 1], -t_dir[..., 0]], axis=-1)
    centre = corners.mean(axis=1, keepdims=True)
    outward = np.sign(np.einsum("mkj,mkj->mk", normal, (a + b) / 2 - centre))[..., None]
    normal = normal * np.where(outward == 0, 1.0, outward)                 # from ink to paper
    return a, d, length, normal


def _profiles(lin, frames, inside_px, outside_px, end_gap_px, offsets_px, per_half=_S):
    """Sample the profiles of every marker (edges ``frames`` from :func:`_edge_frames`): returns the
    points along each edge as x and y (M, 4, 2S) each, the across-edge offsets (M, P) and the profiles
    (M, 4, 2S, P)."""
    a, d, length, normal = frames
    m = len(a)
    # along each edge: S places on each half, from end_gap from the corner to 45 % of the edge
    f0 = np.minimum(np.maximum(end_gap_px[:, None] / length, 0.08), 0.3)  # (M, 4)
    first = f0[..., None] + (0.45 - f0[..., None]) * _spread(per_half)     # (M, 4, S)
    along = np.concatenate([first, 1.0 - first[..., ::-1]], axis=-1)        # (M, 4, 2S)
    base_x = a[:, :, None, 0] + along * d[:, :, None, 0]
    base_y = a[:, :, None, 1] + along * d[:, :, None, 1]
    across = -inside_px[:, None] + (inside_px + outside_px)[:, None] * _ACROSS[None, :]     # (M, P)
    acr = across.astype(np.float32)[:, None, None, :]
    if offsets_px is None:
        bx, by = base_x.astype(np.float32), base_y.astype(np.float32)
    else:
        off = np.asarray(offsets_px, float)
        bx, by = (base_x + off[:, None, None, 0]).astype(np.float32), (base_y + off[:, None, None, 1]).astype(np.float32)
    nrm = normal.astype(np.float32)
    px = bx[..., None] + acr * nrm[:, :, None, None, 0]
    py = by[..., None] + acr * nrm[:, :, None, None, 1]
    prof = sample_image(lin, px.reshape(m, -1), py.reshape(m, -1)).reshape(px.shape)   # one row per marker
    return base_x, base_y, across, prof


def _crossings(prof, across, blur_px=None, widths=True):
    """Edge points along each profile: the 50 % crossing from ink to paper, its validity, and the 25-75 %
    width of each profile (px; None unless ``widths``).

    With ``blur_px`` (M,) known, the ink and paper levels read at the profile's ends are corrected for
    the light the blurred edge spills onto them (a Gaussian edge of that sigma: a fraction
    Phi(-distance / sigma) of the other side), which matters on small markers where the ink end is only
    half a cell from the edge. A crossing is found on the samples themselves (the first at or above
    ink + level x (paper - ink)) and interpolated between that sample and the one before."""
    k = _END
    ink = functools.reduce(np.add, [prof[..., j] for j in range(k)]) / np.float32(k)           # (M, 4, 2S)
    paper = functools.reduce(np.add, [prof[..., j] for j in range(_P - k, _P)]) / np.float32(k)
    if blur_px is not None:
        step0 = (across[:, -1] - across[:, 0]) / (_P - 1)
        sigma = np.maximum(blur_px, 0.3)
        spill = ndtr(np.concatenate([-(-across[:, 0] - step0) / sigma,       # onto the ink end
                                     -(across[:, -1] - step0) / sigma]))       # onto the paper end
        p_ink, p_paper = spill[:len(sigma), None, None], spill[len(sigma):, None, None]
        det = (1 - p_ink) * (1 - p_paper) - p_ink * p_paper
        ink, paper = ((1 - p_paper) * ink - p_ink * paper) / det, ((1 - p_ink) * paper - p_paper * ink) / det
        ink, paper = ink.astype(np.float32), paper.astype(np.float32)
    contrast = paper - ink
    step = (across[:, -1] - across[:, 0]) / (_P - 1)                                    # (M,)
    flat = prof.reshape(-1, _P)
    rows_p = np.arange(0, flat.size, _P)[:, None]                                     # each row's first sample
    per = len(flat) // len(across)
    start = np.repeat(across[:, 0], per)[:, None]
    steps = np.repeat(step, per)[:, None]

    def crossings(fracs):
        """The first crossing of each level (R, L) and whether there is one (all levels at once)."""
        level = ink.reshape(-1, 1) + np.asarray(fracs, np.float32) * contrast.reshape(-1, 1)
        first = np.argmax(flat[:, None, :] >= level[:, :, None], axis=-1)
        idx = rows_p + np.clip(first, 1, _P - 1)
        l0, l1 = prof.ravel()[idx - 1], prof.ravel()[idx]
        rise = l1 - l0
        frac = np.clip((level - l0) / np.where(rise > 0, rise, np.float32(1.0)), 0.0, 1.0)
        return start + (idx - rows_p - 1 + frac) * steps, first > 0

    if widths:
        at, ok = crossings((0.5, 0.25, 0.75))
        width = np.maximum(at[:, 2] - at[:, 1], 0.0).reshape(ink.shape)
    else:
        at, ok = crossings((0.5,))
    at50, ok50 = at[:, 0].reshape(ink.shape), ok[:, 0].reshape(ink.shape)
    lo = across[:, None, None, 0] + (k - 1) * step[:, None, None]
    hi = across[:, None, None, -1] - (k - 1) * step[:, None, None]
    valid = ok50 & (contrast > 12.0) & (at50 > lo) & (at50 < hi)
    return at50, valid, (width if widths else None)


def median_where(values, mask, empty):
    """Median over the last axis of the values where ``mask``; ``empty`` where none is (sorted with the
    others last, then the middle of the valid ones: much faster than ``np.nanmedian`` on small rows)."""
    v = np.sort(np.where(mask, values, np.inf), axis=-1)
    n = mask.sum(axis=-1)
    flat = v.reshape(-1, v.shape[-1])
    rows = np.arange(len(flat))
    nf = n.ravel()
    lo = flat[rows, np.maximum((nf - 1) // 2, 0)].reshape(n.shape)
    hi = flat[rows, np.maximum(nf // 2, 0)].reshape(n.shape)
    with np.errstate(invalid="ignore"):
        mid = 0.5 * (lo + hi)
    return np.where(n > 0, mid, empty)


def _fit_lines(px, py, valid):
    """Total-least-squares lines (mean point, unit direction) through the valid points (x ``px``, y ``py``)
    of each group (last axis: points), in closed form (principal axis of the 2 x 2 scatter), and the
    signed distance of every point from its line."""
    w = valid.astype(float)
    n = np.maximum(w.sum(axis=-1), 1.0)
    dot = functools.partial(np.einsum, "...i,...i->...")                  # sums of products, no temporaries
    mx, my = dot(px, w) / n, dot(py, w) / n
    ux, uy = px - mx[..., None], py - my[..., None]
    dx, dy = ux * w, uy * w                                                 # w is 0 or 1: dx * ux = dx * dx
    sxx, syy, sxy = dot(dx, ux), dot(dy, uy), dot(dx, uy)
    theta = 0.5 * np.arctan2(2.0 * sxy, sxx - syy)
    cos, sin = np.cos(theta), np.sin(theta)
    resid = ux * -sin[..., None] + uy * cos[..., None]
    return np.stack([mx, my], axis=-1), np.stack([cos, sin], axis=-1), resid


def _robust_lines(px, py, valid):
    """Lines through each group's points, refitted without points off the first line by more than
    3 robust sigmas (at least 0.15 px). Returns mean, direction, kept mask, RMS residual, count kept."""
    mean, direc, resid = _fit_lines(px, py, valid)
    off = np.abs(resid)
    sigma = 1.4826 * median_where(off, valid, 0.0)
    keep = valid & (off <= np.maximum(3.0 * sigma, 0.15)[..., None])
    again = np.nonzero((keep != valid).any(axis=-1))                      # only groups that lost points
    if len(again[0]):
        mean[again], direc[again], resid[again] = _fit_lines(px[again], py[again], keep[again])
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


def _pass(lin, frames, side_px, cell_px, blur_px, offsets_px, blur_in=None):
    """One refinement pass from the corners of ``frames``: corners, per-corner standard error, per-marker
    RMS, per-corner success (the blur is measured before, by :func:`_blur`)."""
    reach = np.maximum(3.0, 2.5 * blur_px)
    inside = np.minimum(0.5 * cell_px, reach)                              # never past the border cell
    outside = np.minimum(np.maximum(cell_px, 1.5), reach)                  # at most a cell into the quiet zone
    end_gap = 2.0 * blur_px + 0.5
    base_x, base_y, across, prof = _profiles(lin, frames, inside, outside, end_gap, offsets_px)
    at50, valid, _ = _crossings(prof, across, blur_in, widths=False)
    normal = frames[3]
    m = len(normal)
    px = base_x + at50 * normal[:, :, None, 0]                             # (M, 4, 2S) edge points
    py = base_y + at50 * normal[:, :, None, 1]
    h_mean, h_dir, _, h_rms, h_n = _robust_lines(px.reshape(m, 4, 2, _S), py.reshape(m, 4, 2, _S),
                                                 valid.reshape(m, 4, 2, _S))   # (M, 4, 2, ...)
    h_ok = (h_n >= 5) & (h_rms <= STRAIGHT_RMS_PX)
    use_mean, use_dir, use_rms, use_n, line_ok = h_mean, h_dir, h_rms, h_n, h_ok
    if not h_ok.all():
        # a half edge that is not straight: the whole edge's line stands in if that one is (fitted only
        # for the markers that need it)
        bad = np.flatnonzero(~h_ok.all(axis=(1, 2)))
        e_mean, e_dir, _, e_rms, e_n = _robust_lines(px[bad], py[bad], valid[bad])   # (B, 4, ...)
        e_ok = (e_n >= 8) & (e_rms <= STRAIGHT_RMS_PX)
        hb = h_ok[bad]
        use_mean, use_dir, use_rms, use_n, line_ok = h_mean.copy(), h_dir.copy(), h_rms.copy(), h_n.copy(), h_ok.copy()
        use_mean[bad] = np.where(hb[..., None], h_mean[bad], e_mean[:, :, None, :])
        use_dir[bad] = np.where(hb[..., None], h_dir[bad], e_dir[:, :, None, :])
        use_rms[bad] = np.where(hb, h_rms[bad], e_rms[:, :, None])
        use_n[bad] = np.where(hb, h_n[bad], e_n[:, :, None])
        line_ok[bad] = hb | e_ok[:, :, None]
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


def _blur(lin, frames, cell_px, offsets_px):
    """Each marker's edge blur (Gaussian sigma, px) from a few profiles across its edges (3 per half
    edge, reaching 3 px or half a cell), read at the detector's corners: the 25-75 % width / 1.349."""
    inside = np.minimum(0.5 * cell_px, 3.0)
    outside = np.minimum(np.maximum(cell_px, 1.5), 3.0)
    m = len(cell_px)
    _, _, across, prof = _profiles(lin, frames, inside, outside, np.full(m, 2.5), offsets_px, per_half=3)
    _, valid, width = _crossings(prof, across)
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
    frames = _edge_frames(rough)
    side_px = frames[2].mean(axis=1)
    cell_px = side_px / cells_per_side
    blur = _blur(lin, frames, cell_px, offsets_px)
    out, sig, rms, ok = _pass(lin, frames, side_px, cell_px, np.clip(blur, 0.5, None), offsets_px, blur)
    limit = 0.3 + cell_px[:, None] / 3.0 + blur[:, None] + 3.0 * sig
    moved_ok = np.linalg.norm(out - rough, axis=-1) <= limit
    good = (ok & moved_ok).all(axis=1)
    return RefinedCorners(np.where(good[:, None, None], out, rough), good, np.where(good, rms, np.nan), blur)
