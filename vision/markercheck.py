"""Whether a decoded marker candidate is a printed marker: evidence a false candidate cannot have.

OpenCV's detector decodes any dark quadrilateral whose thresholded inside happens to match a code
(a cutting-mat cell with a printed number, a black label with white letters). A printed marker shows
more than that, and each is read here on the linearised image through the refined corners:

1. **cells read back with a margin**: every cell, averaged over its middle (a 3 x 3 grid at +-0.25
   cell), is placed between the ink level (median of the border cells) and the white level (median of
   the cells the id's pattern says are white). A cell is *decided* when its level is at least
   :data:`DECIDED_MARGIN` from 0.5; no decided cell may contradict the id's pattern, and at most
   :data:`MAX_UNDECIDED` (plus one per 16 bits beyond 16) may be undecided;
2. **the border is ink**: every border cell below 0.5 (decided or not);
3. **the quiet zone is paper**: a ring of samples half a cell outside the black square, one beside
   each border cell, reads at least :data:`RING_LEVEL` of the way from ink to white on nearly all of
   them (a cutting-mat cell is ringed by a thin grid line and the next dark cell), either in the whole
   marker's levels or in the light of the border cell beside it (ink and white scaled by that cell's
   ink over the median ink: a hard shadow across a marker darkens its paper and ink alike; the shadow
   of a raised marker's box over half a marker left 0.75 of its ring as paper, and the marker was lost);
4. **contrast**: white minus ink at least 8 % of white (a flat smudge decodes to nothing real).

The cell file's layout, duplicate ids and the size a calibration predicts are checked by the caller.
"""

from __future__ import annotations

import functools
from dataclasses import dataclass

import numpy as np

from gripsight.vision.markerdict import aruco_dictionary
from gripsight.vision.markeredges import median_where, sample_image

__all__ = ["MarkerEvidence", "marker_evidence", "DECIDED_MARGIN", "MAX_UNDECIDED", "RING_LEVEL"]

DECIDED_MARGIN = 0.12       # a cell is decided when its level is this far from 0.5 (0 ink, 1 white)
MAX_UNDECIDED = 2           # undecided cells allowed in a 16-bit code
RING_LEVEL = 0.45           # quiet-zone samples must read at least this (0 ink, 1 white)
RING_FRACTION = 0.85        # ... on at least this fraction of the ring


@dataclass(frozen=True)
class MarkerEvidence:
    """Per candidate (arrays of length M): cells contradicting the pattern, undecided cells, the
    fraction of the quiet-zone ring that reads as paper, the contrast (white - ink) / white, and whether
    the candidate is accepted as a printed marker."""

    wrong_cells: np.ndarray
    undecided_cells: np.ndarray
    ring_fraction: np.ndarray
    contrast: np.ndarray
    accepted: np.ndarray


@functools.lru_cache(maxsize=256)
def _pattern(dictionary_name: str, marker_id: int) -> np.ndarray:
    """The marker's cells, border included ((n + 2)^2, True where ink), in its image's orientation."""
    d = aruco_dictionary(dictionary_name)
    return (d.generateImageMarker(marker_id, d.markerSize + 2) < 128).ravel()


@functools.lru_cache(maxsize=8)
def _grid(n: int):
    """Sample points in cell units: 9 per cell over each cell's middle ((n * n * 9, 2)), then the ring
    half a cell outside ((4 n, 2)); and which cells are border cells (n * n,)."""
    centres = np.arange(n) + 0.5
    sub = np.array([-0.25, 0.0, 0.25])
    cy, cx, sy, sx = np.meshgrid(centres, centres, sub, sub, indexing="ij")
    cells = np.column_stack([(cx + sx).ravel(), (cy + sy).ravel()])
    ring = np.concatenate([np.column_stack([centres, np.full(n, -0.5)]), np.column_stack([centres, np.full(n, n + 0.5)]),
                           np.column_stack([np.full(n, -0.5), centres]), np.column_stack([np.full(n, n + 0.5), centres])])
    border = np.zeros((n, n), bool)
    border[[0, -1], :] = border[:, [0, -1]] = True
    return np.concatenate([cells, ring]).astype(np.float32), border.ravel()


@functools.lru_cache(maxsize=8)
def _ring_neighbours(n: int) -> np.ndarray:
    """For each ring sample of :func:`_grid` (top, bottom, left, right rows of n), the index of the
    border cell beside it (cells row-major, n x n)."""
    k = np.arange(n)
    return np.concatenate([k, (n - 1) * n + k, k * n, k * n + n - 1])


def _square_to_quads_xy(uv: np.ndarray, quads: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """:func:`_square_to_quads` as x and y (M, K) each, float32 (the map as a 3 x 3 matrix per quad,
    applied to all points with one matrix product)."""
    x, y = quads[..., 0], quads[..., 1]                                           # (M, 4) each
    dx1, dx2, dy1, dy2 = x[:, 1] - x[:, 2], x[:, 3] - x[:, 2], y[:, 1] - y[:, 2], y[:, 3] - y[:, 2]
    sx, sy = x[:, 0] - x[:, 1] + x[:, 2] - x[:, 3], y[:, 0] - y[:, 1] + y[:, 2] - y[:, 3]
    den = dx1 * dy2 - dx2 * dy1
    den = np.where(np.abs(den) > 1e-12, den, 1e-12)
    g, h = (sx * dy2 - dx2 * sy) / den, (dx1 * sy - sx * dy1) / den
    H = np.empty((len(quads), 3, 3))
    H[:, 0] = np.column_stack([x[:, 1] - x[:, 0] + g * x[:, 1], x[:, 3] - x[:, 0] + h * x[:, 3], x[:, 0]])
    H[:, 1] = np.column_stack([y[:, 1] - y[:, 0] + g * y[:, 1], y[:, 3] - y[:, 0] + h * y[:, 3], y[:, 0]])
    H[:, 2] = np.column_stack([g, h, np.ones(len(quads))])
    q = (H.reshape(-1, 3) @ np.vstack([uv.T, np.ones(len(uv))])).reshape(len(quads), 3, len(uv))   # (M, 3, K)
    return (q[:, 0] / q[:, 2]).astype(np.float32), (q[:, 1] / q[:, 2]).astype(np.float32)


def _square_to_quads(uv: np.ndarray, quads: np.ndarray) -> np.ndarray:
    """Points ``uv`` (K, 2) of the unit square mapped onto each quadrilateral (M, 4, 2) (corners in the
    order (0, 0), (1, 0), (1, 1), (0, 1)) by the projective map through the four corners, in closed form
    for all M at once (Heckbert, 'Fundamentals of Texture Mapping and Image Warping', 1989, sec. 2.2.3;
    tests/vision/test_calibration.py checks the formulas against our DLT). Returns (M, K, 2) float32."""
    return np.stack(_square_to_quads_xy(uv, quads), axis=-1)


def marker_evidence(lin: np.ndarray, corners_px: np.ndarray, ids, dictionary_name: str, offsets_px=None) -> MarkerEvidence:
    """Read the evidence for M candidates with corners (M, 4, 2) (OpenCV's order) and decoded ``ids``
    from ``lin``, the linearised photo (or patches of it, with each candidate's ``offsets_px`` (M, 2))."""
    corners = np.asarray(corners_px, float).reshape(-1, 4, 2)
    m = len(corners)
    n = aruco_dictionary(dictionary_name).markerSize + 2
    local, border = _grid(n)
    px, py = _square_to_quads_xy(local / n, corners)                               # (M, K) each
    if offsets_px is not None:
        off = np.asarray(offsets_px, np.float32)
        px, py = px + off[:, 0:1], py + off[:, 1:2]
    values = sample_image(lin, px, py)                                            # (M, K)
    cells = values[:, : n * n * 9].reshape(m, n * n, 9).mean(axis=-1)
    ring = values[:, n * n * 9:]
    expected = np.array([_pattern(dictionary_name, int(i)) for i in ids], bool).reshape(m, n * n)
    border_cells = np.sort(cells[:, border], axis=1)                # the median as np.median has it, by a sort
    ink = 0.5 * (border_cells[:, (border_cells.shape[1] - 1) // 2] + border_cells[:, border_cells.shape[1] // 2])
    white = median_where(cells, ~expected, -1.0)                 # a code with no white cell: -1, refused
    span = np.where(white - ink > 1e-6, white - ink, 1e-6)
    level = (cells - ink[:, None]) / span[:, None]
    decided = np.abs(level - 0.5) >= DECIDED_MARGIN
    wrong = (decided & ((level < 0.5) != expected)).sum(axis=1)
    undecided = (~decided).sum(axis=1)
    border_ink = ((level < 0.5) | ~border[None]).all(axis=1)
    ring_level = (ring - ink[:, None]) / span[:, None]
    # the same in the light of the border cell next to each ring sample (its ink level there): a shadow
    # across the marker darkens paper and ink alike (the photo is linear), so paper in the shadow
    # reads as paper against the ink beside it, not against the lit white
    beside = cells[:, _ring_neighbours(n)]                                        # (M, 4 (n - 2) + 4)
    light = np.clip(beside / np.maximum(ink, 1e-6)[:, None], 0.0, 1.0)            # 1: as lit as the ink's median
    local_level = (ring - beside) / np.maximum(light * span[:, None], 1e-6)
    ring_fraction = ((ring_level >= RING_LEVEL) | (local_level >= RING_LEVEL)).mean(axis=1)
    contrast = (white - ink) / np.maximum(white, 1e-6)
    bits = (n - 2) ** 2
    allowed = MAX_UNDECIDED + max(0, bits - 16) // 16
    accepted = (wrong == 0) & (undecided <= allowed) & border_ink & (ring_fraction >= RING_FRACTION) & (contrast >= 0.08)
    return MarkerEvidence(wrong, undecided, ring_fraction, contrast, accepted)
