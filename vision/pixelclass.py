"""Which part class each pixel's colour belongs to, coarse to fine (DESIGN.md sec. 6, step 2).

Each pixel takes the class whose reference colour is nearest in CIEDE2000, if within that class's
tolerance. Saturated pixels (chroma > 30) near no class and unlike the table are an unknown colour.
Every colour is white-balanced first (:mod:`vision.whitebalance`).

The distance weighs lightness half (CIEDE2000's parametric factor kL = 2, the value the CIE gives for
textiles, as CMC l:c = 2:1 does; from memory, common practice for surfaces whose lightness varies with
the light): the white balance takes the light's colour and level out at the marker paper, but a
part's faces are lit otherwise (a spot light's falloff, the angle of each face, shadows), which moves
their lightness and hardly their hue and chroma. Measured on photos of another renderer under dim warm
light: a class's own pixels lay up to 11.4 from its colour with kL = 1 and 6.9 with kL = 2, while a
purple part stayed 17 from blue and an orange one 18-21 from red either way (DEVELOPERS.md, issue 15).

Parts cover a few per cent of the work area, so the search runs at two resolutions:

1. At a coarse resolution, one pixel a block of 8, 4 or 2 px (the largest across which the smallest
   part spans four blocks; each coarse pixel the mean of its block's middle 2 x 2), every
   pixel of the searched region is converted to CIELAB. The table's own colour is its median (parts
   are few), its spread the scaled median distance from it. Candidates are pixels that differ from the
   table and lie within 2.5x a class's tolerance in CIE76 (CIEDE2000 is never more than about that),
   or are saturated and unlike the table. The candidates are classified there, in CIEDE2000.
2. A block whose four neighbours all took its class lies inside a part: its pixels keep that class (a
   part's silhouette is convex, the projection of a box or a cylinder, and a block lies within the
   diamond of its own and its four neighbours' centres).
   The other candidate blocks, grown by one block (the parts' edges), are classified pixel by pixel at
   full resolution, in CIEDE2000. Each connected group of candidates is a window the blobs are then
   found in. The white balance is smooth, so each block's pixels share its factor.
"""

from __future__ import annotations

from dataclasses import dataclass

import cv2
import numpy as np

from gripsight.vision.colour import delta_e_2000
from gripsight.vision.whitebalance import balanced_lab, white_gain

__all__ = ["ClassifiedRegion", "block_size_px", "classify_region", "classify_pixels", "class_distance", "coarse_mask",
           "LIGHTNESS_WEIGHT_KL", "label_dtype"]

_UNKNOWN_CHROMA = 30.0
_UNKNOWN_FROM_TABLE = 25.0    # CIE76 from the table's median colour for an unknown part
_FOREGROUND_MIN = 12.0        # CIE76: a part pixel differs from the table at least this much
_BLOCKS = (8, 4, 2)           # coarse block sizes (px) to choose from, largest first
_NEAR = 2.5                   # CIE76 candidates: within this many times a class's tolerance
LIGHTNESS_WEIGHT_KL = 2.0     # CIEDE2000's kL for class colours (see the module docstring)


def _planes(lab: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """L, a, b as contiguous arrays (numpy is slow over a last axis of three)."""
    return tuple(np.moveaxis(lab, -1, 0).copy())


def _distance2(planes, ref) -> np.ndarray:
    """Squared CIE76 distance of colours (as L, a, b planes) to one colour."""
    d = planes[0] - np.float32(ref[0])
    d *= d
    for plane, r in zip(planes[1:], ref[1:]):
        t = plane - np.float32(r)
        t *= t
        d += t
    return d


def class_distance(lab, ref_lab):
    """The colour distance of pixels to a class colour: CIEDE2000 with lightness weighed half (kL = 2)."""
    return delta_e_2000(lab, ref_lab, kL=LIGHTNESS_WEIGHT_KL)


def _table_masks(planes, background) -> tuple[np.ndarray, np.ndarray]:
    """(foreground, unlike the table for an unknown colour): pixels whose CIE76 from the table's median
    colour is beyond max(12, 4 x the table's own spread), and beyond 25. ``background`` is (median Lab,
    spread) or None (everything counts)."""
    if background is None:
        every = np.ones(planes[0].shape, bool)
        return every, every
    median, spread = background
    d2 = _distance2(planes, median)
    return d2 > max(_FOREGROUND_MIN, 4.0 * spread) ** 2, d2 > _UNKNOWN_FROM_TABLE ** 2


def _saturated(planes) -> np.ndarray:
    """Chroma above 30: a colourful pixel (an unknown colour if near no class and unlike the table)."""
    return planes[1] * planes[1] + planes[2] * planes[2] > _UNKNOWN_CHROMA ** 2


def classify_pixels(lab: np.ndarray, classes: dict, background=None) -> tuple[np.ndarray, np.ndarray]:
    """Class index + 1 (0 none, K + 1 unknown saturated) and the CIEDE2000 to it, for pixels (N, 3).
    Every (pixel, class) pair within the CIE76 pre-filter goes through one CIEDE2000 call."""
    planes = _planes(lab)
    refs = np.array([c.lab for c in classes.values()], np.float32)
    tolerances = np.array([c.tolerance for c in classes.values()], np.float32)
    fg, unlike_table = _table_masks(planes, background)
    # only pixels unlike the table can be a part's: the classes' distances on those alone
    part = np.flatnonzero(fg)
    part_planes = [p[part] for p in planes]
    pairs = [part[_distance2(part_planes, ref) < (_NEAR * tol) ** 2] for ref, tol in zip(refs, tolerances)]
    pixel = np.concatenate(pairs)
    which = np.repeat(np.arange(len(refs)), [len(p) for p in pairs])
    d00 = class_distance(lab[pixel], refs[which]).astype(np.float32)
    ok = d00 < tolerances[which]
    pixel, which, d00 = pixel[ok], which[ok], d00[ok]
    best = np.full(len(lab), np.inf, np.float32)
    np.minimum.at(best, pixel, d00)
    nearest = d00 == best[pixel]                          # per pixel, the nearest class
    label = np.zeros(len(lab), label_dtype(len(classes)))
    label[pixel[nearest]] = which[nearest] + 1
    label[(label == 0) & _saturated(planes) & unlike_table] = len(classes) + 1
    return label, best


def label_dtype(n_classes: int):
    """The label image's type: class index + 1, 0 none and K + 1 unknown must fit (uint8 up to 253 classes)."""
    return np.uint8 if n_classes + 1 <= np.iinfo(np.uint8).max else np.uint16


def _candidates(planes, classes: dict, background) -> np.ndarray:
    """Pixels worth a full-resolution look."""
    fg, unlike_table = _table_masks(planes, background)
    near = _saturated(planes) & unlike_table
    for cls in classes.values():
        near |= _distance2(planes, cls.lab) < (_NEAR * cls.tolerance) ** 2
    return near & fg


@dataclass(frozen=True)
class ClassifiedRegion:
    """The classified pixels of a searched rectangle at ``origin`` (photo px): ``label`` (class index + 1,
    0 none, K + 1 unknown) and ``delta_e`` (CIEDE2000 to the class; meaningful where labelled). Every
    labelled pixel belongs to one connected group of candidate blocks (``groups``, coarse, 1-based);
    ``windows[g - 1]`` is the rectangle (x, y, w, h; rectangle px) of group g."""

    origin: tuple[int, int]
    label: np.ndarray
    delta_e: np.ndarray
    groups: np.ndarray
    windows: list[tuple[int, int, int, int]]
    block_px: int

    def group_at(self, x: int, y: int) -> int:
        """The group of the pixel at column x, row y of the rectangle."""
        return int(self.groups[y // self.block_px, x // self.block_px])


def block_size_px(smallest_part_px: float) -> int:
    """The coarse block size: the largest of 8, 4, 2 px across which the smallest part spans at least
    four blocks (so it always holds a whole block and its neighbours, and is found at the coarse pass)."""
    return next((b for b in _BLOCKS if smallest_part_px >= 4 * b), _BLOCKS[-1])


def classify_region(image_bgr: np.ndarray, rect, valid: np.ndarray, valid_small: np.ndarray, illumination,
                    classes: dict, block_px: int) -> ClassifiedRegion:
    """Classify the pixels of ``rect`` = (u0, v0, w, h) inside the ``valid`` mask (bool, rect-sized);
    ``valid_small`` is that mask at the coarse resolution (:func:`coarse_mask` with ``block_px``)."""
    u0, v0, w, h = rect
    f = block_px
    hs, ws = valid_small.shape
    block = image_bgr[v0:v0 + hs * f, u0:u0 + ws * f]
    small = cv2.resize(block, (ws, hs), interpolation=cv2.INTER_LINEAR)   # the mean of each block's centre 2 x 2
    gain = white_gain(illumination, f * np.arange(ws, dtype=np.float32)[None, :] + (u0 + (f - 1) / 2),
                      f * np.arange(hs, dtype=np.float32)[:, None] + (v0 + (f - 1) / 2))
    gain = np.broadcast_to(gain, (hs, ws, 3))                 # the white balance is smooth: one per block
    lab_small = balanced_lab(small, gain)
    planes = cv2.split(lab_small)
    table = [p[::4, ::4][valid_small[::4, ::4]] for p in planes]   # the table: parts cover a few % of it
    background = None
    if len(table[0]):
        median = np.median(np.stack(table), axis=1).astype(np.float32)
        background = (median, 1.4826 * float(np.sqrt(np.median(_distance2(table, median)))))
    candidate = _candidates(planes, classes, background) & valid_small
    near = cv2.dilate(candidate.astype(np.uint8), np.ones((3, 3), np.uint8))
    n, groups, stats, _ = cv2.connectedComponentsWithStats(near, connectivity=8)
    label = np.zeros((h, w), label_dtype(len(classes)))
    delta_e = np.zeros((h, w), np.float32)
    if n <= 1:
        return ClassifiedRegion((u0, v0), label, delta_e, groups, [], f)
    # the candidates' classes at the coarse resolution; a block whose 4 neighbours all agree is inside
    # a part and keeps its class, the rest (the parts' edges) are classified pixel by pixel
    cy, cx = np.nonzero(candidate)
    coarse_label = np.zeros((hs, ws), label_dtype(len(classes)))
    coarse_de = np.zeros((hs, ws), np.float32)
    coarse_label[cy, cx], coarse_de[cy, cx] = classify_pixels(lab_small[cy, cx], classes, background)
    kernel = cv2.getStructuringElement(cv2.MORPH_CROSS, (3, 3))
    inside = (coarse_label > 0) & (cv2.erode(coarse_label, kernel) == cv2.dilate(coarse_label, kernel))
    # whole blocks at a time, through (rows, columns, f, f) views of the images
    label_blocks, de_blocks = _blocks(label, f, hs, ws), _blocks(delta_e, f, hs, ws)
    valid_blocks = _blocks(valid, f, hs, ws)
    by, bx = np.nonzero(inside)
    ok = valid_blocks[by, bx]
    label_blocks[by, bx] = coarse_label[by, bx][:, None, None] * ok
    de_blocks[by, bx] = coarse_de[by, bx][:, None, None] * ok
    by, bx = np.nonzero((near > 0) & ~inside)
    # every pixel of those blocks, each block white-balanced by its own factor; pixels outside the
    # searched area are classified too and then cleared (cheaper than picking them out first)
    lab = balanced_lab(_blocks(block, f, hs, ws)[by, bx], gain[by, bx][:, None, None, :])
    classes_of, distances = classify_pixels(lab.reshape(-1, 3), classes, background)
    ok = valid_blocks[by, bx]
    label_blocks[by, bx] = classes_of.reshape(-1, f, f) * ok
    de_blocks[by, bx] = np.where(ok, distances.reshape(-1, f, f), np.float32(0))
    windows = [tuple(int(c) * f for c in stats[i, :4]) for i in range(1, n)]
    return ClassifiedRegion((u0, v0), label, delta_e, groups, windows, f)


def _blocks(image: np.ndarray, f: int, rows: int, cols: int) -> np.ndarray:
    """A (rows, cols, f, f, ...) view of the top-left rows x f by cols x f pixels of ``image``: block
    (r, c) is ``view[r, c]``; indexing it with block coordinates reads or writes whole blocks."""
    top = image[: rows * f, : cols * f]
    return top.reshape(rows, f, cols, f, *image.shape[2:]).swapaxes(1, 2)


def coarse_mask(valid: np.ndarray, f: int) -> np.ndarray:
    """A rectangle-sized bool mask at the coarse resolution (w // f, h // f), nearest pixel."""
    h, w = valid.shape
    if h < f or w < f:
        return np.zeros((0, 0), bool)
    return cv2.resize(valid[: h // f * f, : w // f * f].astype(np.uint8), (w // f, h // f),
                      interpolation=cv2.INTER_NEAREST) > 0
