"""Finding the printed markers in a photo, with corners refined to a small fraction of a pixel.

``cv2.aruco.ArucoDetector`` finds and decodes candidate markers; :mod:`gripsight.vision.markeredges`
refines their corners from the edges of the black square (any number of markers, any size down to
about 16 px across). Corners follow OpenCV's order: top-left, top-right, bottom-right, bottom-left of
the marker image.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.colour import linear_from_srgb
from gripsight.vision.markerdict import aruco_dictionary, cells_per_side
from gripsight.vision.markercheck import marker_evidence
from gripsight.vision.markeredges import RefinedCorners, refine_corners

__all__ = ["MarkerDetection", "detect_markers", "aruco_dictionary", "linearised_gray"]   # aruco_dictionary: from markerdict

_LIN_LUT = (linear_from_srgb(np.arange(256) / 255.0) * 255.0).astype(np.float32)


@functools.lru_cache(maxsize=16)
def _tone_lut(tone_power: float | None) -> np.ndarray:
    """Grey code -> light (0-255, float32): the sRGB curve (``None``) or ``255 (code / 255) ** tone_power``."""
    if tone_power is None:
        return _LIN_LUT
    return (255.0 * (np.arange(256) / 255.0) ** float(tone_power)).astype(np.float32)


@dataclass(frozen=True)
class MarkerDetection:
    """One marker seen in a photo: its id and corners (4, 2) in pixels (OpenCV's order)."""

    id: int
    corners_px: np.ndarray
    refined: bool = True      # False where the edge refinement fell back to the detector's corners


def linearised_gray(image, tone_power: float | None = None) -> np.ndarray:
    """Grey image (float32, 0-255) proportional to linear light, from an 8-bit BGR or grey photo whose
    codes encode light by the sRGB curve (``tone_power`` None, what cameras write) or by a power law
    (light = code ** ``tone_power``; 1 for codes linear in light; see :mod:`gripsight.vision.tonecurve`)."""
    gray = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    if gray.dtype != np.uint8:
        gray = np.clip(gray, 0, 255).astype(np.uint8)
    return cv2.LUT(gray, _tone_lut(tone_power))


def _params(accuracy_rate: float):
    params = cv2.aruco.DetectorParameters()
    params.cornerRefinementMethod = cv2.aruco.CORNER_REFINE_NONE    # refined from the edges here; see _fallback
    params.polygonalApproxAccuracyRate = accuracy_rate
    # OpenCV groups candidates whose corners are on average closer than minMarkerDistanceRate (default
    # 0.125) times the smaller one's perimeter and tries the largest of a group first. A marker's own
    # paper outline, on a table darker than the paper, is that close whenever the quiet zone is under
    # about 2 cells (1.5 cells on our printed sheets), and a marker whose group its paper leads is
    # sometimes lost. At 0.05 (OpenCV's default before 4.7) the outline stays a candidate of its own.
    params.minMarkerDistanceRate = 0.05
    return params


@functools.lru_cache(maxsize=8)
def _detector(dictionary_name: str):
    """The first search: OpenCV's default outline accuracy 0.03 (a coarser one turns the cells of a
    cutting mat or a chequered cloth into many more quadrilaterals, and OpenCV's grouping of them is
    quadratic: 1.3x the time over 100 busy renders, up to 2.5x on one)."""
    return cv2.aruco.ArucoDetector(aruco_dictionary(dictionary_name), _params(0.03))


@functools.lru_cache(maxsize=8)
def _second_detector(dictionary_name: str):
    """The second look for layout markers the first search missed: outline accuracy 0.05, which keeps
    markers whose outline sensor noise has made ragged."""
    return cv2.aruco.ArucoDetector(aruco_dictionary(dictionary_name), _params(0.05))


_ATLAS_HEIGHT = 8192          # patches are stacked in columns at most this tall (remap takes < 32767)


def _linearised_around(image, corners: np.ndarray, tone_power: float | None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`linearised_gray` only around each marker (its corners' box grown by a quarter of its size
    and 8 px, room for the edge profiles and the ring outside its cells), the patches stacked in columns
    of one small image; returns it and each marker's offset (M, 2) from photo to patch pixels (a
    whole-photo image would be mostly zeros, and writing it costs more than the patches)."""
    h, w = image.shape[:2]
    lo, hi = corners.min(axis=1), corners.max(axis=1)                       # (M, 2) each
    pad = 0.25 * (hi - lo).max(axis=1, keepdims=True) + 8.0
    lo = np.maximum(np.floor(lo - pad), 0).astype(int)
    hi = np.maximum(np.minimum(np.ceil(hi + pad), [w, h]).astype(int), lo)
    size = hi - lo
    at = np.zeros((len(lo), 2), int)                                         # (column x, row y) in the atlas
    x, y, col_w = 0, 0, 0
    for k, (sw, sh) in enumerate(size.tolist()):
        if y > 0 and y + sh > _ATLAS_HEIGHT:                                  # next column
            x, y, col_w = x + col_w + 1, 0, 0
        at[k] = (x, y)
        y += sh + 1                                                          # one empty row between patches
        col_w = max(col_w, sw)
    atlas = np.zeros((max(int((at[:, 1] + size[:, 1]).max()), 1), max(int((at[:, 0] + size[:, 0]).max()), 1)), np.float32)
    for (x0, y0), (x1, y1), (ax, ay) in zip(lo.tolist(), hi.tolist(), at.tolist()):
        if x1 > x0 and y1 > y0:
            atlas[ay:ay + y1 - y0, ax:ax + x1 - x0] = linearised_gray(image[y0:y1, x0:x1], tone_power)
    return atlas, (at - lo).astype(np.float32)


def _linearised_box(gray, corners: np.ndarray, tone_power: float | None) -> tuple[np.ndarray, np.ndarray]:
    """:func:`linearised_gray` of the one box holding every marker with the room
    :func:`_linearised_around` gives each (a quarter of its size and 8 px), and each marker's offset
    (M, 2) from photo to box pixels: markers on a sheet or a table seldom fill the photo, and the
    table of linear values is written only where it is read."""
    h, w = gray.shape[:2]
    lo, hi = corners.min(axis=1), corners.max(axis=1)                       # (M, 2) each
    pad = 0.25 * (hi - lo).max(axis=1, keepdims=True) + 8.0
    x0, y0 = np.maximum(np.floor((lo - pad).min(axis=0)), 0).astype(int)
    x1, y1 = np.minimum(np.ceil((hi + pad).max(axis=0)), [w, h]).astype(int)
    x1, y1 = max(x1, x0 + 1), max(y1, y0 + 1)
    return linearised_gray(gray[y0:y1, x0:x1], tone_power), np.tile(np.array([-x0, -y0], np.float64), (len(corners), 1))


def _track(image, dictionary_name: str, expected: dict, tone_power: float | None) -> list[MarkerDetection] | None:
    """The expected markers where they were (a camera that has not moved, or moved by a pixel or two):
    corners refined from the edges next to the expected ones, identities read from the cells. None if
    any marker is not found so (then the markers are searched for)."""
    ids = sorted(expected)
    rough = np.array([np.asarray(expected[i], float).reshape(4, 2) for i in ids])
    lin, offsets = _linearised_around(image, rough, tone_power)
    n = cells_per_side(dictionary_name)
    result = refine_corners(lin, rough, n, offsets)
    refined, good = result.corners_px, result.refined
    if good.all() and np.abs(refined - rough).max() > 0.25:
        result = refine_corners(lin, refined, n, offsets)   # the camera shifted a little: again, from closer
        refined, good = result.corners_px, result.refined
    if not good.all() or not marker_evidence(lin, refined, ids, dictionary_name, offsets).accepted.all():
        return None
    return [MarkerDetection(int(i), refined[k], True) for k, i in enumerate(ids)]


def _window(shape, corners) -> tuple[int, int, int, int] | None:
    """The window (x0, y0, x1, y1) around a marker's expected corners (4, 2) px, grown by 0.6 of its
    size and 16 px, clipped to the photo; None if less than 16 px of it is in the photo."""
    h, w = shape
    c = np.asarray(corners, float).reshape(4, 2)
    pad = 0.6 * np.ptp(c, axis=0).max() + 16
    x0, y0 = np.floor(c.min(axis=0) - pad).astype(int)
    x1, y1 = np.ceil(c.max(axis=0) + pad).astype(int)
    x0, y0, x1, y1 = max(x0, 0), max(y0, 0), min(x1, w), min(y1, h)
    return None if x1 - x0 < 16 or y1 - y0 < 16 else (x0, y0, x1, y1)


def _detect_in_windows(gray, detector, expected: dict, wanted=None, all_found: bool = True):
    """Look for each expected marker (those in ``wanted`` if given) only in a window around where it
    was: (ids, corners (4, 2) each). With ``all_found``, None if any is not found there (then the caller
    searches the whole photo)."""
    ids, corners = [], []
    for marker_id, c in expected.items():
        if wanted is not None and marker_id not in wanted:
            continue
        box = _window(gray.shape, c)
        if box is None:
            if all_found:
                return None
            continue
        x0, y0, x1, y1 = box
        found, found_ids, _ = detector.detectMarkers(gray[y0:y1, x0:x1])
        hit = found_ids is not None and marker_id in found_ids.ravel()
        if not hit and all_found:
            return None
        for fc, fid in zip(found, [] if found_ids is None else found_ids.ravel()):
            if fid == marker_id:
                ids.append(int(fid))
                corners.append(fc.reshape(4, 2) + [x0, y0])
    return ids, corners


def _fallback(gray, result):
    """Where the edge refinement failed, OpenCV's sub-pixel corners (``cv2.cornerSubPix``, run for those
    markers only) instead of the detector's raw ones."""
    if result.refined.all():
        return result
    corners = result.corners_px.copy()
    bad = np.flatnonzero(~result.refined)
    pts = corners[bad].reshape(-1, 1, 2).astype(np.float32)
    side = np.linalg.norm(corners[bad] - np.roll(corners[bad], -1, axis=1), axis=-1).mean()
    win = int(np.clip(side / 12, 2, 5))
    criteria = (cv2.TERM_CRITERIA_EPS + cv2.TERM_CRITERIA_MAX_ITER, 30, 0.1)     # OpenCV's aruco defaults
    cv2.cornerSubPix(gray, pts, (win, win), (-1, -1), criteria)
    corners[bad] = pts.reshape(-1, 4, 2)
    return RefinedCorners(corners, result.refined, result.edge_rms_px, result.blur_px)


def _one_per_id(found: list[MarkerDetection], score: list[tuple], expected: dict | None) -> list[MarkerDetection]:
    """Where an id was decoded more than once, keep the copy nearest its expected place (a calibrated
    camera), else the one with clearly the best evidence; copies that tie are all kept (calibration sets
    a duplicated id aside)."""
    if len({d.id for d in found}) == len(found):
        return sorted(found, key=lambda d: d.id)
    by_id: dict[int, list[int]] = {}
    for k, d in enumerate(found):
        by_id.setdefault(d.id, []).append(k)
    out = []
    for marker_id in sorted(by_id):
        copies = by_id[marker_id]
        if len(copies) > 1 and expected and marker_id in expected:
            where = np.asarray(expected[marker_id], float).reshape(4, 2).mean(axis=0)
            copies = [min(copies, key=lambda k: np.linalg.norm(found[k].corners_px.mean(axis=0) - where))]
        elif len(copies) > 1:
            best = min(score[k] for k in copies)
            copies = [k for k in copies if score[k] == best]
        out.extend(found[k] for k in copies)
    return out


def _size_fits(corners: np.ndarray, ids, expected: dict | None) -> np.ndarray:
    """Whether each candidate's side is within a quarter of the side the calibration predicts for its id
    (True where nothing is predicted)."""
    ok = np.ones(len(corners), bool)
    if not expected:
        return ok
    side = np.linalg.norm(corners - np.roll(corners, -1, axis=1), axis=-1).mean(axis=1)
    for k, marker_id in enumerate(ids):
        if expected and int(marker_id) in expected:
            c = np.asarray(expected[int(marker_id)], float).reshape(4, 2)
            predicted = np.linalg.norm(c - np.roll(c, -1, axis=0), axis=-1).mean()
            ok[k] = 0.75 < side[k] / predicted < 1.33
    return ok


def _checked(gray, ids, corners, dictionary_name: str, expected: dict | None, tone_power: float | None):
    """Refine the candidates (ids (M,), corners (M, 4, 2)) and keep those with the evidence of a printed
    marker and the size a calibration predicts: the kept detections and their evidence scores."""
    if len(ids) == 0:
        return [], []
    lin, offsets = _linearised_box(gray, corners, tone_power)
    result = _fallback(gray, refine_corners(lin, corners, cells_per_side(dictionary_name), offsets))
    evidence = marker_evidence(lin, result.corners_px, ids, dictionary_name, offsets)
    keep = np.flatnonzero(evidence.accepted & _size_fits(result.corners_px, ids, expected))
    found = [MarkerDetection(int(ids[k]), result.corners_px[k], bool(result.refined[k])) for k in keep]
    score = list(zip(evidence.undecided_cells[keep].tolist(), (-evidence.ring_fraction[keep]).tolist()))
    return found, score


def _as_arrays(ids, corners) -> tuple[np.ndarray, np.ndarray]:
    if ids is None or len(ids) == 0:
        return np.zeros(0, int), np.zeros((0, 4, 2))
    return np.ravel(ids).astype(int), np.concatenate(corners, axis=0).astype(float).reshape(-1, 4, 2)


def detect_markers(image, dictionary_name: str, expected: dict | None = None,
                   layout_ids=None, search_ids=None, tone_power: float | None = None) -> list[MarkerDetection]:
    """Markers in an 8-bit BGR or grey photo, sorted by id.

    OpenCV's candidates are kept only with the evidence of a printed marker
    (:func:`gripsight.vision.markercheck.marker_evidence`: cells read back with a margin, an ink border,
    a paper quiet zone), an id in ``layout_ids`` when given, the size a calibration predicts when
    ``expected`` is given, and one copy per id where one copy is clearly the marker.

    Parameters
    ----------
    image : ndarray, shape (H, W, 3) or (H, W), uint8
    dictionary_name : str
        The cell file's dictionary name, e.g. ``aruco_4x4_50``.
    expected : dict of id -> corners (4, 2) px, optional
        Where the markers were at calibration. They are first refined from the edges right there and
        checked by their cells (a camera that has not moved); failing that, looked for in small windows
        there; if any is still missing, the whole photo is searched.
    layout_ids : collection of int, optional
        The ids the cell's layout holds; others are not returned.
    search_ids : collection of int, optional
        Ids to look for a second time, with other candidate settings (:func:`_second_detector`), if the
        first search does not return them: in a window around their ``expected`` corners where those are
        given (ids missing from ``expected`` are then not searched again), else in the whole photo. Costs
        nothing when every one of them is found first.
    tone_power : float, optional
        How the photo's grey codes encode light, for the edges (:func:`linearised_gray`): None for the
        sRGB curve, else the power a calibration found (:func:`gripsight.vision.tonecurve.calibrate_photo`).
    """
    if expected:
        tracked = _track(image, dictionary_name, expected, tone_power)
        if tracked is not None:
            return tracked
    gray = image if image.ndim == 2 else cv2.cvtColor(image, cv2.COLOR_BGR2GRAY)
    detector = _detector(dictionary_name)
    windowed = _detect_in_windows(gray, detector, expected) if expected else None
    if windowed is not None:
        ids, rough = _as_arrays(*windowed)
    else:
        corners, ids, _ = detector.detectMarkers(gray)
        ids, rough = _as_arrays(ids, corners)
    layout = None if layout_ids is None else np.fromiter(layout_ids, int)
    if layout is not None:
        keep = np.isin(ids, layout)
        ids, rough = ids[keep], rough[keep]
    found, score = _checked(gray, ids, rough, dictionary_name, expected, tone_power)
    missing = set() if search_ids is None else {int(i) for i in search_ids} - {d.id for d in found}
    if layout is not None:
        missing &= set(layout.tolist())
    if missing:
        more, more_score = _checked(gray, *_second_look(gray, dictionary_name, expected, missing),
                                    dictionary_name, expected, tone_power)
        found, score = found + more, score + more_score
    return _one_per_id(found, score, expected)


def _second_look(gray, dictionary_name: str, expected: dict | None, missing: set) -> tuple[np.ndarray, np.ndarray]:
    """Candidates (ids, corners) of the ``missing`` ids from :func:`_second_detector`: in windows around
    their expected corners where ``expected`` is given, else in the whole photo."""
    detector = _second_detector(dictionary_name)
    if expected:
        ids, rough = _as_arrays(*_detect_in_windows(gray, detector, expected, wanted=missing, all_found=False))
    else:
        corners, ids, _ = detector.detectMarkers(gray)
        ids, rough = _as_arrays(ids, corners)
    keep = np.isin(ids, np.fromiter(missing, int))
    return ids[keep], rough[keep]
