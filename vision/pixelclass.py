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

__all__ = ["Bench", "ClassifiedRegion", "classes_like_the_bench", "block_size_px", "classify_region", "classify_pixels", "class_distance", "coarse_mask",
           "LIGHTNESS_WEIGHT_KL", "label_dtype"]

_UNKNOWN_CHROMA = 30.0
_UNKNOWN_FROM_TABLE = 25.0    # CIE76 from the table's median colour for an unknown part
_FOREGROUND_MIN = 12.0        # CIE76: a part pixel differs from the table at least this much
_BLOCKS = (8, 4, 2)           # coarse block sizes (px) to choose from, largest first
_NEAR = 2.5                   # CIE76 candidates: within this many times a class's tolerance
LIGHTNESS_WEIGHT_KL = 2.0     # CIEDE2000's kL for class colours (see the module docstring)
_SHADOW_LIGHT = 0.2           # the table in shadow down to this fraction of the light is the table


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
    """(foreground, unlike the table for an unknown colour): pixels beyond the table's limit from its
    colours (:class:`Bench`), and farther than 25 from them. ``background`` is a :class:`Bench` or None
    (everything counts)."""
    if background is None:
        every = np.ones(planes[0].shape, bool)
        return every, every
    near2, d2 = background.excess2(planes)
    return near2 > 0, d2 > _UNKNOWN_FROM_TABLE ** 2


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
    """Pixels worth a full-resolution look (the table test only where a class colour is near or the
    colour is saturated: a few per cent of the pixels)."""
    near_class = np.zeros(planes[0].shape, bool)
    for cls in classes.values():
        near_class |= _distance2(planes, cls.lab) < (_NEAR * cls.tolerance) ** 2
    saturated = _saturated(planes)
    where = np.nonzero(near_class | saturated)
    fg, unlike_table = _table_masks([p[where] for p in planes], background)
    out = np.zeros(planes[0].shape, bool)
    out[where] = fg & (near_class[where] | unlike_table)
    return out


@dataclass(frozen=True)
class Bench:
    """The table's colours: one, or two or three with the mixes between each two (a chequered cloth,
    papers with black text on wood: a block across the edge of a square or a letter is a mix), and how
    far a part's colour must be from them: max(12, 4 x the table's spread about them, the scaled median
    distance of its samples).

    Why several: measured about one median, the spread of a two-colour table is half the distance
    between its colours, so 4 x that put every part inside "the table" (a black-and-white check cloth:
    spread 39-44, limit 155-175, no part found in any photo; papers with black text on plywood: spread
    20, every part of that photo lost; bench_looks). About the colours and their mixes, the same cloth's
    spread is that of each colour.
    """

    ends: np.ndarray           # (K, 3) float32 CIELAB, K = 1, 2 or 3
    limit: float               # CIE76

    @classmethod
    def fit(cls, lab: np.ndarray, class_labs=None, iterations: int = 8) -> "Bench":
        """The table's colours from its samples (N, 3) (CIELAB). Three, else two colours by k-means
        (started at evenly spaced percentiles of lightness: deterministic); they are the table's when
        each holds at least 10 % of the samples (parts cover a few per cent of the work area) and every
        two lie farther apart than their limit, from the spread of the samples about the mixes
        (distinct at that model's own resolution). Else one colour: the median and spread of all
        samples, what a plain bench always had (also when that limit is already the tightest, 12, or
        when no colour of ``class_labs`` (K, 3) lies within it: then nothing is lost to it)."""
        lab = np.asarray(lab, np.float32)
        median = np.median(lab, axis=0).astype(np.float32)
        single = cls(median[None], _limit(np.sum((lab - median) ** 2, axis=1)))
        if single.limit <= _FOREGROUND_MIN or len(lab) < 30:
            return single                     # as tight as a table can be: nothing to gain
        if class_labs is not None and len(class_labs):
            inside, _ = single.excess2(tuple(np.asarray(class_labs, np.float32).T.copy()))
            if (inside > 0).all():
                return single                 # no class colour is lost to it: nothing to gain
        lab = lab[:: max(1, len(lab) // 500)]   # k-means on about 500 of them (1 ms on all 2 000)
        order = np.argsort(lab[:, 0], kind="stable")
        for k in (3, 2):
            ends, which = lab[order[((2 * np.arange(k) + 1) * len(lab)) // (2 * k)]], None
            for _ in range(iterations):       # k-means (means: cheap), then each cluster's median
                nearest = np.argmin(np.sum(ends * ends, axis=1) - 2 * lab @ ends.T, axis=1)
                if which is not None and np.array_equal(nearest, which):
                    break
                which = nearest
                member = np.eye(k, dtype=np.float32)[which]
                counts = member.sum(axis=0)
                if counts.min() < 0.1 * len(lab):
                    break
                ends = (member.T @ lab) / counts[:, None]
            gaps = [float(np.sum((ends[i] - ends[j]) ** 2)) for i in range(k) for j in range(i)]
            if counts.min() < 0.1 * len(lab) or min(gaps) <= _FOREGROUND_MIN ** 2:
                continue                      # a colour of 10 %, and no two closer than any limit can be
            ends = np.stack([np.median(lab[which == j], axis=0) for j in range(k)]).astype(np.float32)
            planes = tuple(lab.T.copy())
            d2 = np.min([_segment_distance2(planes, ends[j], ends[i]) for i in range(k) for j in range(i)], axis=0)
            many = cls(ends, _limit(d2))
            gaps = [float(np.sum((ends[i] - ends[j]) ** 2)) for i in range(k) for j in range(i)]
            if min(gaps) > many.limit ** 2:
                return many
        return single

    def excess2(self, planes) -> tuple[np.ndarray, np.ndarray]:
        """(squared distance to the table's colours minus the squared limit there: > 0 outside the
        table; squared distance), per pixel of colours as L, a, b planes. The table's colours: each
        colour, the mixes of each two (the limit), and each colour in a shadow down to a fifth of the
        light (:func:`in_shadow`; there the table's colours and their spread shrink with the cube root
        of the light, so the limit does: a cone)."""
        limit2 = np.float32(self.limit * self.limit)
        excess = d2 = None
        for i, end in enumerate(self.ends):
            e2, t = _segment_distance2(planes, end, in_shadow(end, _SHADOW_LIGHT), along=True)
            scale = 1 - t * np.float32(1 - np.cbrt(_SHADOW_LIGHT))
            x = e2 - limit2 * scale * scale
            excess = x if excess is None else np.minimum(excess, x)
            d2 = e2 if d2 is None else np.minimum(d2, e2)
            for j in range(i):
                e2 = _segment_distance2(planes, self.ends[j], end)
                excess = np.minimum(excess, e2 - limit2)
                d2 = np.minimum(d2, e2)
        return excess, d2

    def distance2(self, planes) -> np.ndarray:
        """Squared CIE76 distance of colours (as L, a, b planes) to the table's colours (see excess2)."""
        return self.excess2(planes)[1]


def in_shadow(lab, light: float) -> np.ndarray:
    """A colour (CIELAB, (..., 3)) under ``light`` times the light: linear RGB (so X, Y, Z) scale by it,
    and CIELAB's cube root turns that into L* + 16, a*, b* scaling by its cube root (CIE 1976: L* =
    116 f(Y) - 16, a* = 500 (f(X) - f(Y)), b* = 200 (f(Y) - f(Z)), f the cube root above Y = 0.0089;
    from memory). Why the table needs it: a shadow on a coloured cloth is the cloth's colour in less
    light, 15-25 darker in L*, beyond the table's limit; on an orange cloth it lay within a red class's
    tolerance and was cut out as red parts (bench_looks: 4 false red parts in 8 photos)."""
    lab = np.asarray(lab, np.float32)
    k = np.float32(np.cbrt(light))
    return np.concatenate([k * (lab[..., :1] + 16) - 16, k * lab[..., 1:]], axis=-1)


def classes_like_the_bench(bench: Bench | None, classes: dict) -> list[tuple[str, float]]:
    """(name, CIE76 distance) of the classes whose colour lies within the table's limit: no pixel of
    their parts can be told from the table (a pale class on a pale bench, a class the colour of the
    cloth); their parts are lost, and the photo must say so."""
    if bench is None or not classes:
        return []
    labs = np.array([c.lab for c in classes.values()], np.float32)
    excess, d2 = bench.excess2(tuple(labs.T.copy()))
    return [(name, float(np.sqrt(d))) for name, e, d in zip(classes, excess, d2) if e <= 0]


def _limit(d2: np.ndarray) -> float:
    """max(12, 4 x the spread): the spread the scaled median of distances (squared, CIE76)."""
    return max(_FOREGROUND_MIN, 4.0 * 1.4826 * float(np.sqrt(np.median(d2))))


def _segment_distance2(planes, a, b, along: bool = False):
    """Squared CIE76 distance of colours (as L, a, b planes) to the segment from colour a to colour b
    (and, if ``along``, where on it the nearest point is, 0 at a to 1 at b)."""
    ab = np.asarray(b, np.float32) - np.asarray(a, np.float32)
    t = sum((p - np.float32(a_c)) * np.float32(ab_c) for p, a_c, ab_c in zip(planes, a, ab))
    t = np.clip(t / np.float32(max(float(ab @ ab), 1e-6)), 0, 1)
    d = None
    for p, a_c, ab_c in zip(planes, a, ab):
        e = p - (np.float32(a_c) + t * np.float32(ab_c))
        d = e * e if d is None else d + e * e
    return (d, t) if along else d


@dataclass(frozen=True)
class ClassifiedRegion:
    """The classified pixels of a searched rectangle at ``origin`` (photo px): ``label`` (class index + 1,
    0 none, K + 1 unknown) and ``delta_e`` (CIEDE2000 to the class; meaningful where labelled). Every
    labelled pixel belongs to one connected group of candidate blocks (``groups``, coarse, 1-based);
    ``windows[g - 1]`` is the rectangle (x, y, w, h; rectangle px) of group g; ``bench`` the table's
    colours measured there (None: no table in view)."""

    origin: tuple[int, int]
    label: np.ndarray
    delta_e: np.ndarray
    groups: np.ndarray
    windows: list[tuple[int, int, int, int]]
    block_px: int
    bench: Bench | None = None

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
    background = Bench.fit(np.stack(table, axis=1), [c.lab for c in classes.values()]) if len(table[0]) else None
    candidate = _candidates(planes, classes, background) & valid_small
    near = cv2.dilate(candidate.astype(np.uint8), np.ones((3, 3), np.uint8))
    n, groups, stats, _ = cv2.connectedComponentsWithStats(near, connectivity=8)
    label = np.zeros((h, w), label_dtype(len(classes)))
    delta_e = np.zeros((h, w), np.float32)
    if n <= 1:
        return ClassifiedRegion((u0, v0), label, delta_e, groups, [], f, background)
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
    return ClassifiedRegion((u0, v0), label, delta_e, groups, windows, f, background)


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
