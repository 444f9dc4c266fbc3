"""Which class a blob of a shared colour is, and how a blob too large for one part is cut.

:func:`choose_classes` gives a blob of a colour group of several classes the class whose top face fits
it (:mod:`vision.shapes`); :func:`split_by_shape` cuts a blob of a few parts' area into pieces and keeps
the cut only where the pieces' fitted parts explain the outline; :func:`split_pixels` is the k-means cut.
"""

from __future__ import annotations

from dataclasses import replace

import cv2
import numpy as np

from gripsight.vision.blobsearch import MAX_RATIO, MIN_RATIO, BlobSearch, ColourOutline
from gripsight.vision.partresult import PartStatus
from gripsight.vision.topface import (
    TopFaceProblem,
    beyond_silhouette_mm,
    expected_area_mm2,
    min_rect,
    place_top_faces,
    score_top_faces,
    top_face_guess,
    top_faces_overlap,
)

__all__ = ["choose_classes", "split_by_shape", "split_pixels", "shape_words"]


def choose_classes(search: BlobSearch, outlines, outlines_mm, areas, centroids, normals) -> list[ColourOutline]:
    """Give each blob of a colour group of several classes the class whose shape and size fit it
    (:mod:`vision.shapes`), all blobs' candidate fits at once. A blob of a part's size that no class
    fits stays ``unknown`` (with its group: ``unknown_shape``); one too large or too small for every
    class takes the class whose area it is nearest a whole number of (touching parts, or a speck)."""
    problems, owners, fallback = [], [], {}
    for i, o in enumerate(outlines):
        if o.group is None:
            continue
        ratios = []
        for name in o.group.members:
            cls = search.cell.parts[name]
            k = search.k_of(cls.height_mm)
            expected = expected_area_mm2(cls)
            ratio = float(areas[i]) / (k * k) / expected
            ratios.append(ratio)
            if MIN_RATIO < ratio < MAX_RATIO:
                guess = top_face_guess(centroids[i], areas[i], search.nadir, k, expected)
                problems.append(TopFaceProblem.of_class(outlines_mm[i], normals[i], guess, search.nadir, k, cls,
                                                        min_rect(outlines_mm[i], k)[2]))
                owners.append((i, name))
        if not any(MIN_RATIO < r < MAX_RATIO for r in ratios):
            off = [abs(r - max(round(r), 1)) / max(round(r), 1) for r in ratios]
            fallback[i] = o.group.members[int(np.argmin(off))]
    best: dict[int, tuple[str, float]] = {}
    for (i, name), score in zip(owners, score_top_faces(problems)):
        if score.fit is not None and (i not in best or score.median_mm < best[i][1]):
            best[i] = (name, score.median_mm)
    out = []
    for i, o in enumerate(outlines):
        name = best[i][0] if i in best else fallback.get(i)
        split_into = 0
        if o.group is not None and name is None:
            # no top face fits (shading, a shadow): its size alone, if that says one class and no other
            name = _by_size(search, o.group.members, outlines_mm[i])
        if o.group is not None and name is None:
            # no class fits it as one part: is it parts side by side (an outline a whole number of parts long)?
            name, split_into = _row_of_parts(search, o.group.members, outlines_mm[i])
        if o.group is None or name is None:
            out.append(o)
            continue
        cls = search.cell.parts[name]
        out.append(replace(o, name=name, cls=cls, height_mm=float(cls.height_mm), k=search.k_of(cls.height_mm),
                           group=None, members=o.group.members, split_into=split_into))
    return out


_SIZE_FIT = 0.15          # a footprint side within 15 % of a class's: that size


def _by_size(search: BlobSearch, members, outline_mm) -> str | None:
    """The one class of the colour whose footprint sides the outline's (length and width, as a top face)
    are within 15 % of, when every other class's are farther than that; None otherwise."""
    fits = []
    for name in members:
        cls = search.cell.parts[name]
        length, width, _ = min_rect(outline_mm, search.k_of(cls.height_mm))
        fp = sorted(list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1), reverse=True)
        fits.append(abs(length / fp[0] - 1.0) <= _SIZE_FIT and abs(width / fp[1] - 1.0) <= _SIZE_FIT)
    return members[fits.index(True)] if sum(fits) == 1 else None


def _row_of_parts(search: BlobSearch, members, outline_mm) -> tuple[str | None, int]:
    """(class, n) when a blob's outline is about n >= 2 parts of a class long and one wide (touching parts
    whose colour was partly lost to shading, so their area alone does not say so), else (None, 0)."""
    best = (None, 0, np.inf)
    for name in members:
        cls = search.cell.parts[name]
        length, width, _ = min_rect(outline_mm, search.k_of(cls.height_mm))
        fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
        n = int(round(length / max(fp)))
        off = abs(length / max(fp) - n) + abs(width / min(fp) - 1.0)
        if n >= 2 and abs(length / max(fp) - n) < 0.3 and abs(width / min(fp) - 1.0) < 0.3 and off < best[2]:
            best = (name, n, off)
    return best[0], best[1]


def split_by_shape(search: BlobSearch, o: ColourOutline, sub, ox, oy, outline_mm, normals, area_mapped, members, whole):
    """Split a blob larger than one part of its colour into n touching parts, only where its outline says it
    is n parts: (pieces, status, reason, per-piece fits). Each count n that a class of its colour gives by
    area (and the count its outline's length gave) is tried, by k-means (:func:`_split`); a split holds when
    the outline is a row of n parts of one class (:func:`_row_of_parts`) or when every piece's own stretch
    of the outline fits a class's top face with the fit's gates (:func:`_piece_fits`: circle or box, size
    within 15 %, median residual <= 0.4 mm). A blob whose pieces have parts' sizes but whose outline no
    split explains is ``UNKNOWN_SHAPE`` (a 44 mm disc is not two 22 mm cubes); one that no count splits into
    pieces of a part's size keeps the split's own verdict (``too_large``, ``touching``), as before."""
    classes = [search.cell.parts[n] for n in members]
    counts = [o.split_into] if o.split_into >= 2 else []
    ratios = [float(area_mapped) / search.k_of(c.height_mm) ** 2 / expected_area_mm2(c) for c in classes]
    counts += [int(round(r)) for r in sorted(ratios, key=lambda r: abs(r - round(r)) / max(round(r), 1))]
    counts = list(dict.fromkeys(n for n in counts if n >= 2)) or [int(round(max(ratios)))]
    areas = [expected_area_mm2(c) for c in classes]
    row_name, row_n = _row_of_parts(search, members, outline_mm)
    first = row = None
    sized = False
    for n in counts:
        # a class of its own colour alone: its area ratio, as before (a blob far from a whole number of parts
        # is too large)
        ratio = n if len(members) > 1 or o.split_into >= 2 else ratios[0]
        pieces, status, reason = split_pixels(sub, ox, oy, search.mapping, o.k, (min(areas), max(areas)), ratio, o.name,
                                        whole)
        if status is not PartStatus.OK:
            first = first or (pieces, status, reason)
            continue
        sized = True
        fits, explained = _piece_fits(search, outline_mm, normals, o.k, pieces, members)
        if explained:
            return pieces, status, reason, fits
        if row_n == len(pieces) and row is None:      # a row of one class's parts, unless pieces explain it
            row = (pieces, status, reason, fits)     # (disc, cube, disc in a row is as long as 4 cubes)
    if row is not None:
        return row
    if sized:
        return whole, PartStatus.UNKNOWN_SHAPE, "", []
    return (*first, [])


def _piece_fits(search: BlobSearch, outline_mm, normals, k_blob, pieces, members) -> tuple[list, bool]:
    """Per piece of a blob split from touching parts of one colour, the class among ``members`` whose top
    face fits the piece best, as (name, class, k, top-face fit), or None when none holds: the blob's
    outline points nearest each piece's centre are that piece's own edge (the cut between pieces has
    none), and each class's top face is fitted to them as for a lone part (:func:`choose_classes`).
    Also whether the pieces explain the whole outline: every piece has a fit, 80 % of the outline lies
    within 1 mm of the union of their silhouettes (:func:`vision.topface.beyond_silhouette_mm`; the fit's
    own gates see the outer half of each piece's stretch only, which a corner of a larger shape passes),
    and no fitted top face lies more than 40 % inside another (:func:`vision.topface.top_faces_overlap`:
    a row of a disc, a cube and a disc cut into four cube-sized pieces covers the outline too)."""
    centres = np.array([p[0] for p in pieces])
    owner = np.linalg.norm(outline_mm[:, None, :] - centres[None], axis=2).argmin(axis=1)
    problems, owners = [], []
    for j, piece in enumerate(pieces):
        sel = owner == j
        if sel.sum() < 12:
            continue
        for name in members:
            cls = search.cell.parts[name]
            k = search.k_of(cls.height_mm)
            guess = top_face_guess(piece[0], piece[3] * k_blob * k_blob, search.nadir, k, expected_area_mm2(cls))
            problems.append(TopFaceProblem.of_class(outline_mm[sel], normals[sel], guess, search.nadir, k, cls,
                                                    min_rect(piece[1], k)[2]))
            owners.append((j, name, k))
    scores = score_top_faces(problems)
    # a piece whose own stretch has no outer half (a corner piece of an L whose outside faces the nadir: its
    # far side is the cut) is fitted to all of its stretch (a problem centred on its nadir keeps every point)
    again = [i for i, sc in enumerate(scores) if sc.scale_ratio != sc.scale_ratio]
    for i in again:
        problems[i] = replace(problems[i], nadir=problems[i].centre)
    for i, sc in zip(again, score_top_faces([problems[i] for i in again])):
        scores[i] = sc
    best: dict[int, tuple] = {}
    for i, ((j, name, k), score) in enumerate(zip(owners, scores)):
        if score.fit is not None and (j not in best or score.median_mm < best[j][3]):
            best[j] = (name, search.cell.parts[name], k, score.median_mm, i)
    chosen = sorted(best)
    placed = dict(zip(chosen, place_top_faces([problems[best[j][4]] for j in chosen],
                                              [scores[best[j][4]].fit for j in chosen])))
    fits = [(best[j][0], best[j][1], best[j][2], placed[j]) if j in best else None for j in range(len(pieces))]
    if any(f is None for f in fits):
        return fits, False
    beyond = np.min([beyond_silhouette_mm(outline_mm, fit, search.nadir, k, cls) for _, cls, k, fit in fits], axis=0)
    overlap = top_faces_overlap([(fit, cls) for _, cls, _, fit in fits])
    return fits, bool(np.percentile(beyond, 80) <= _BEYOND_MM and overlap <= _OVERLAP)


_BEYOND_MM = 1.0        # an outline explained by its pieces: 80 % of it within this of their silhouettes,
_OVERLAP = 0.4          # and no piece's top face more than this fraction inside another's (one part twice)


def shape_words(o: ColourOutline, outline_mm, k: float) -> str:
    """The measured footprint of a blob that fits no class, in words for its reason."""
    length, width, _ = min_rect(outline_mm, k)
    return f"its outline measures {length:.0f} x {width:.0f} mm"


_KMEANS_POINTS = 400


def split_pixels(sub, ox, oy, mapping, k, expected_mm2, ratio, name, whole):
    """Split a blob of about n parts' area by k-means on its pixels; each piece must have a part's size
    (``expected_mm2``: the area of a part, or the smallest and largest of the classes it may be).
    ``whole`` is the blob as one piece, returned when it cannot be split."""
    low, high = (expected_mm2, expected_mm2) if np.isscalar(expected_mm2) else expected_mm2
    n = int(round(ratio))
    if n < 2 or abs(ratio - n) > 0.4 * n or n > 6:
        return whole, PartStatus.TOO_LARGE, \
            f"{ratio:.1f}x a {name} part's area and not a whole number of parts"
    py, px = np.nonzero(sub)
    uv = np.column_stack([px + ox, py + oy]).astype(float)
    xy = mapping(uv).astype(np.float32)
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_MAX_ITER, 50, 0.01)
    cv2.setRNGSeed(0)
    # the centres from an even subsample (a few hundred pixels place them as well as thousands), then
    # every pixel to its nearest centre
    stride = max(1, len(xy) // _KMEANS_POINTS)
    _, _, centres = cv2.kmeans(np.ascontiguousarray(xy[::stride]), n, None, crit, 2, cv2.KMEANS_PP_CENTERS)
    labels = ((xy[:, None, :] - centres[None]) ** 2).sum(axis=2).argmin(axis=1)
    per_px = (mapping.mm_per_px(uv[:1]) ** 2)[0]
    pieces = []
    for j in range(n):
        sel = labels == j
        area = sel.sum() * per_px / (k * k)
        if not (MIN_RATIO < area / low and area / high < 1.4):
            return whole, PartStatus.TOUCHING, \
                f"{n} touching {name} parts that could not be split into parts of the right size"
        pts_mm = xy[sel].astype(float)
        hull = cv2.convexHull(pts_mm.astype(np.float32)).reshape(-1, 2).astype(float)
        pieces.append((pts_mm.mean(axis=0), hull, mapping.inverse(hull), float(area),
                       (float(uv[sel, 0].mean()), float(uv[sel, 1].mean()))))
    return pieces, PartStatus.OK, f"split from {n} touching parts"
