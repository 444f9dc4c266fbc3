"""Finding the printed markers in a photo, with corners refined to a small fraction of a pixel.

``cv2.aruco.ArucoDetector`` finds and decodes the markers. Its subpixel refinement
(``cornerSubPix``) is made for chessboard saddle points; on the L-shaped corners of a marker in a
gamma-encoded photo it lands about 0.4 px inside the true corner (measured on our renders). So the
corners are refined here from the edges instead:

1. the grey image is linearised (inverse sRGB curve), where a pixel's value is proportional to how much
   of it is covered by paper, so the 50 % level between ink and paper is the edge itself;
2. along each edge of the black square, intensity profiles are sampled across the edge, and the 50 %
   crossing of each profile is an edge point;
3. each corner is the intersection of two lines, each fitted (total least squares) to the edge points
   on the half of the edge next to that corner (a half edge keeps lens curvature small).

Corners follow OpenCV's order: top-left, top-right, bottom-right, bottom-left of the marker image.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.colour import linear_from_srgb

__all__ = ["MarkerDetection", "detect_markers", "aruco_dictionary", "linearised_gray"]

_PROFILE_HALF_PX = 3.0
_PROFILE_STEP_PX = 0.25
_SAMPLES_PER_HALF_EDGE = 10
_LIN_LUT = (linear_from_srgb(np.arange(256) / 255.0) * 255.0).astype(np.float32)
# where each edge is profiled: 2 x S places along it (halves apart near the middle), P offsets across it
_ALONG_EDGE = np.concatenate([np.linspace(0.08, 0.45, _SAMPLES_PER_HALF_EDGE), np.linspace(0.55, 0.92, _SAMPLES_PER_HALF_EDGE)])
_ACROSS_EDGE_PX = np.arange(-_PROFILE_HALF_PX, _PROFILE_HALF_PX + 1e-9, _PROFILE_STEP_PX)


def aruco_dictionary(name: str):
    """OpenCV's predefined dictionary for a cell-file name such as ``aruco_4x4_50`` or ``apriltag_36h11``."""
    if name == "aruco_original":
        key = "DICT_ARUCO_ORIGINAL"
    elif name.startswith("aruco_"):
        key = "DICT_" + name[len("aruco_"):].upper()
    else:
        key = "DICT_" + name.upper()
    return cv2.aruco.getPredefinedDictionary(getattr(cv2.aruco, key))


@dataclass(frozen=True)
class MarkerDetection:
    """One marker seen in a photo: its id and corners (4, 2) in pixels (OpenCV's order)."""

    id: int
    corners_px: np.ndarray
    refined: bool = True      # False where the edge refinement fell back to the detector's corners


def linearised_gray(image) -> np.ndarray:
    """Grey image (float32, 0-255) proportional to linear light, from an 8-bit BGR or grey photo."""
    gray = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    if gray.dtype != np.uint8:
        gray = np.clip(gray, 0, 255).astype(np.uint8)
    return cv2.LUT(gray, _LIN_LUT)


@functools.lru_cache(maxsize=8)
def _detector(dictionary_name: str):
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_SUBPIX
    # sensor noise makes square outlines ragged; OpenCV's default 0.03 then misses clear markers
    params.polygonalApproxAccuracyRate = 0.05
    return cv2.aruco.ArucoDetector(aruco_dictionary(dictionary_name), params)


def _edge_points(lin: np.ndarray, corners: np.ndarray, offsets_px=None):
    """Subpixel edge points for the 8 half edges of each marker, read from ``lin`` (the photo, or patches
    of it with each marker's ``offsets_px`` (M, 2) from photo to patch pixels).

    Returns ``points`` (M, 8, S, 2) and ``valid`` (M, 8, S); half edge 2k + h is edge k (corner k to
    corner k+1), half h (0: next to corner k, 1: next to corner k+1).
    """
    m = len(corners)
    s = _SAMPLES_PER_HALF_EDGE
    offs = _ACROSS_EDGE_PX
    base, normal, flat = _profile_grid(np.ascontiguousarray(corners, float).tobytes(), m)
    if offsets_px is not None:
        flat = (flat.reshape(2, m, -1) + np.asarray(offsets_px, np.float32).T[:, :, None]).reshape(2, 1, -1)
    prof = cv2.remap(lin, flat[0], flat[1], cv2.INTER_LINEAR,
                     borderMode=cv2.BORDER_REPLICATE).reshape(m, 4, 2 * s, len(offs))     # (M, 4, 2S, P)
    k = max(2, int(round(0.8 / _PROFILE_STEP_PX)))
    ink = prof[..., :k].mean(axis=-1, keepdims=True)
    paper = prof[..., -k:].mean(axis=-1, keepdims=True)
    contrast = (paper - ink)[..., 0]
    level = (prof - ink) / np.where(np.abs(paper - ink) < 1e-6, 1e-6, paper - ink)     # 0 ink .. 1 paper
    above = level >= 0.5
    # first crossing from ink to paper
    first = np.argmax(above, axis=-1)
    idx = np.clip(first, 1, len(offs) - 1)
    l0 = np.take_along_axis(level, (idx - 1)[..., None], axis=-1)[..., 0]
    l1 = np.take_along_axis(level, idx[..., None], axis=-1)[..., 0]
    frac = np.clip((0.5 - l0) / np.where(np.abs(l1 - l0) < 1e-9, 1e-9, l1 - l0), 0.0, 1.0)
    crossing = offs[0] + (idx - 1 + frac) * _PROFILE_STEP_PX
    valid = (first > 0) & (contrast > 12.0) & (np.abs(crossing) < _PROFILE_HALF_PX - 0.8)
    points = base + crossing[..., None] * normal[:, :, None, :]
    points = points.reshape(m, 4, 2, s, 2).reshape(m, 8, s, 2)
    return points, valid.reshape(m, 8, s)


@functools.lru_cache(maxsize=16)
def _profile_grid(corners_bytes: bytes, m: int):
    """Where the edges of markers with these corners are profiled: the points along each edge (M, 4, 2S, 2),
    the outward normals (M, 4, 2) and every profile sample as remap maps (2, 1, M * 4 * 2S * P) float32.
    Remembered: a still camera's markers are profiled at the same expected corners in every photo."""
    corners = np.frombuffer(corners_bytes).reshape(m, 4, 2)
    a = corners                                       # (M, 4, 2)
    b = np.roll(corners, -1, axis=1)
    centre = corners.mean(axis=1, keepdims=True)
    d = b - a
    length = np.linalg.norm(d, axis=-1, keepdims=True)
    t_dir = d / length
    normal = np.stack([t_dir[..., 1], -t_dir[..., 0]], axis=-1)
    outward = np.sign(np.einsum("mkj,mkj->mk", normal, (a + b) / 2 - centre))[..., None]
    normal = normal * outward                         # points from ink to paper
    base = a[:, :, None, :] + _ALONG_EDGE[None, None, :, None] * d[:, :, None, :]       # (M, 4, 2S, 2)
    pts = base[..., None, :] + _ACROSS_EDGE_PX[None, None, None, :, None] * normal[:, :, None, None, :]
    flat = np.ascontiguousarray(np.moveaxis(pts.reshape(-1, 2).astype(np.float32), -1, 0)[:, None, :])
    for arr in (base, normal, flat):
        arr.flags.writeable = False
    return base, normal, flat


def _fit_lines(points: np.ndarray, valid: np.ndarray):
    """Total-least-squares lines (point, direction) through each half edge's valid points: the mean and
    the principal axis of the 2 x 2 scatter, in closed form (angle 0.5 atan2(2 sxy, sxx - syy))."""
    w = valid.astype(float)
    n = np.maximum(w.sum(axis=-1), 1.0)
    px, py = points[..., 0], points[..., 1]
    mx, my = (px * w).sum(axis=-1) / n, (py * w).sum(axis=-1) / n
    dx, dy = (px - mx[..., None]) * w, (py - my[..., None]) * w
    sxx, syy, sxy = (dx * dx).sum(axis=-1), (dy * dy).sum(axis=-1), (dx * dy).sum(axis=-1)
    theta = 0.5 * np.arctan2(2.0 * sxy, sxx - syy)
    return np.stack([mx, my], axis=-1), np.stack([np.cos(theta), np.sin(theta)], axis=-1), valid.sum(axis=-1)


def _intersect(p1, d1, p2, d2):
    """Where the lines p1 + t d1 and p2 + u d2 meet (Cramer's rule), and whether they are not parallel."""
    det = d1[..., 1] * d2[..., 0] - d1[..., 0] * d2[..., 1]          # det [d1, -d2]
    safe = np.abs(det) > 1e-9
    rx, ry = p2[..., 0] - p1[..., 0], p2[..., 1] - p1[..., 1]
    t = np.where(safe, (ry * d2[..., 0] - rx * d2[..., 1]) / np.where(safe, det, 1.0), 0.0)
    return p1 + t[..., None] * d1, safe


def refine_corners(lin: np.ndarray, corners: np.ndarray, offsets_px=None):
    """Edge-based corner refinement; returns refined corners (M, 4, 2) and a per-marker success mask.
    ``lin`` is the linearised photo, or patches of it (see :func:`_edge_points`)."""
    points, valid = _edge_points(lin, corners, offsets_px)
    mean, direc, count = _fit_lines(points, valid)
    # corner k is where the half of edge k-1 next to it (half edge 2(k-1)+1) meets the half of edge k
    # next to it (half edge 2k)
    prev = (np.arange(4) * 2 - 1) % 8
    this = np.arange(4) * 2
    out, ok = _intersect(mean[:, prev], direc[:, prev], mean[:, this], direc[:, this])
    enough = (count[:, prev] >= 5) & (count[:, this] >= 5) & ok
    moved = np.linalg.norm(out - corners, axis=-1) < 2.5
    good = (enough & moved).all(axis=1)
    return np.where(good[:, None, None], out, corners), good


@functools.lru_cache(maxsize=256)
def _cells(dictionary_name: str, marker_id: int) -> np.ndarray:
    """The marker's cells, border included ((n + 2) x (n + 2), True where ink), in its image's orientation."""
    d = aruco_dictionary(dictionary_name)
    return d.generateImageMarker(marker_id, d.markerSize + 2) < 128


@functools.lru_cache(maxsize=8)
def _cell_grid(n: int) -> tuple[np.ndarray, np.ndarray]:
    """Where a marker of n x n cells (border included) is read, in cell units: every cell's centre, then a
    ring just outside (float32, (n * n + 4 n, 2)); and which cells are border cells."""
    centres = np.arange(n) + 0.5
    gx, gy = np.meshgrid(centres, centres)
    ring = np.concatenate([np.column_stack([centres, np.full(n, -0.5)]), np.column_stack([centres, np.full(n, n + 0.5)]),
                           np.column_stack([np.full(n, -0.5), centres]), np.column_stack([np.full(n, n + 0.5), centres])])
    border = np.zeros((n, n), bool)
    border[[0, -1], :] = border[:, [0, -1]] = True
    return np.concatenate([np.column_stack([gx.ravel(), gy.ravel()]), ring]).astype(np.float32), border.ravel()


def _cells_match(lin: np.ndarray, corners: np.ndarray, ids, dictionary_name: str, offsets_px=None) -> bool:
    """Whether every marker's cells, read at their centres through its corners, are its id's pattern
    (one cell in error allowed): the ink level from the border cells, the paper level from a ring just
    outside, the threshold half way."""
    n = aruco_dictionary(dictionary_name).markerSize + 2
    local, border = _cell_grid(n)
    square = np.float32([[0, 0], [n, 0], [n, n], [0, n]])
    offsets = np.zeros((len(corners), 2), np.float32) if offsets_px is None else np.asarray(offsets_px, np.float32)
    pts = np.concatenate([cv2.perspectiveTransform(local[None], cv2.getPerspectiveTransform(square, np.float32(c)))[0] + o
                          for c, o in zip(corners, offsets)])
    values = cv2.remap(lin, pts[:, 0].reshape(1, -1), pts[:, 1].reshape(1, -1), cv2.INTER_LINEAR,
                       borderMode=cv2.BORDER_REPLICATE).reshape(len(corners), -1)
    cells = values[:, : n * n]
    threshold = 0.5 * (np.median(cells[:, border], axis=1) + np.median(values[:, n * n:], axis=1))
    ink = cells < threshold[:, None]
    expected = np.array([_cells(dictionary_name, int(i)).ravel() for i in ids])
    return bool(((ink != expected).sum(axis=1) <= 1).all())


def _linearised_around(image, corners: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`linearised_gray` only around each marker (its corners' box grown by a quarter of its size
    and 8 px, room for the edge profiles and the ring outside its cells), the patches stacked in one
    small image; returns it and each marker's offset (M, 2) from photo to patch pixels (a whole-photo
    image would be mostly zeros, and writing it costs more than the patches)."""
    h, w = image.shape[:2]
    lo, hi = corners.min(axis=1), corners.max(axis=1)                       # (M, 2) each
    pad = 0.25 * (hi - lo).max(axis=1, keepdims=True) + 8.0
    lo = np.maximum(np.floor(lo - pad), 0).astype(int)
    hi = np.maximum(np.minimum(np.ceil(hi + pad), [w, h]).astype(int), lo)
    size = hi - lo
    rows = np.concatenate([[0], np.cumsum(size[:, 1] + 1)])                # one empty row between patches
    atlas = np.zeros((max(int(rows[-1]), 1), max(int(size[:, 0].max()), 1)), np.float32)
    for (x0, y0), (x1, y1), r in zip(lo.tolist(), hi.tolist(), rows[:-1].tolist()):
        if x1 > x0 and y1 > y0:
            atlas[r:r + y1 - y0, : x1 - x0] = linearised_gray(image[y0:y1, x0:x1])
    return atlas, np.column_stack([-lo[:, 0], rows[:-1] - lo[:, 1]]).astype(np.float32)


def _track(image, dictionary_name: str, expected: dict) -> list[MarkerDetection] | None:
    """The expected markers where they were (a camera that has not moved, or moved by a pixel or two):
    corners refined from the edges next to the expected ones, identities read from the cells. None if
    any marker is not found so (then the markers are searched for)."""
    ids = sorted(expected)
    rough = np.array([np.asarray(expected[i], float).reshape(4, 2) for i in ids])
    lin, offsets = _linearised_around(image, rough)
    refined, good = refine_corners(lin, rough, offsets)
    if good.all() and np.abs(refined - rough).max() > 0.25:
        refined, good = refine_corners(lin, refined, offsets)   # the camera shifted a little: again, from closer
    if not good.all() or not _cells_match(lin, refined, ids, dictionary_name, offsets):
        return None
    return [MarkerDetection(int(i), refined[k], True) for k, i in enumerate(ids)]


def _detect_in_windows(gray, detector, expected: dict):
    """Look for each expected marker only in a window around where it was: (ids, corners) or None if
    any expected marker is not found there (then the caller searches the whole photo)."""
    h, w = gray.shape
    ids, corners = [], []
    for marker_id, c in expected.items():
        c = np.asarray(c, float)
        size = np.ptp(c, axis=0).max()
        pad = 0.6 * size + 16
        x0, y0 = np.floor(c.min(axis=0) - pad).astype(int)
        x1, y1 = np.ceil(c.max(axis=0) + pad).astype(int)
        x0, y0, x1, y1 = max(x0, 0), max(y0, 0), min(x1, w), min(y1, h)
        if x1 - x0 < 16 or y1 - y0 < 16:
            return None
        found, found_ids, _ = detector.detectMarkers(gray[y0:y1, x0:x1])
        if found_ids is None or marker_id not in found_ids.ravel():
            return None
        for fc, fid in zip(found, found_ids.ravel()):
            if fid == marker_id:
                ids.append(int(fid))
                corners.append(fc.reshape(4, 2) + [x0, y0])
    return ids, corners


def detect_markers(image, dictionary_name: str, expected: dict | None = None) -> list[MarkerDetection]:
    """Markers in an 8-bit BGR or grey photo, sorted by id; duplicates are all returned.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3) or (H, W), uint8
    dictionary_name : str
        The cell file's dictionary name, e.g. ``aruco_4x4_50``.
    expected : dict of id -> corners (4, 2) px, optional
        Where the markers were at calibration. They are first refined from the edges right there and
        checked by their cells (a camera that has not moved); failing that, looked for in small windows
        there; if any is still missing, the whole photo is searched.
    """
    if expected:
        tracked = _track(image, dictionary_name, expected)
        if tracked is not None:
            return tracked
    gray = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    lin = linearised_gray(gray)
    detector = _detector(dictionary_name)
    windowed = _detect_in_windows(gray, detector, expected) if expected else None
    if windowed is not None:
        ids, corners = np.array(windowed[0]), windowed[1]
    else:
        corners, ids, _ = detector.detectMarkers(gray)
    if ids is None or len(ids) == 0:
        return []
    rough = np.array([np.asarray(c).reshape(4, 2) for c in corners], dtype=float)
    refined, good = refine_corners(lin, rough)
    found = [MarkerDetection(int(i), refined[k], bool(good[k])) for k, i in enumerate(np.ravel(ids))]
    return sorted(found, key=lambda d: d.id)
