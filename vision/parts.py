"""Finding the parts: colour classes in CIELAB, blobs, table coordinates, and the parallax fix.

Per photo (see DESIGN.md sec. 6):

1. The work area is projected into the photo and grown by a margin (a part inside it can appear beyond
   its edge, seen from the camera); marker papers are masked out. Only that region is
   converted to CIELAB, after white balance from the markers' paper (:mod:`vision.whitebalance`).
2. Each pixel takes the class whose reference colour is nearest in CIEDE2000, if within that class's
   tolerance, coarse to fine (:mod:`vision.pixelclass`); saturated pixels near no class are candidates
   for an unknown colour.
3. In each window around a group of candidate pixels, per class: morphological opening and closing,
   then the outer contours (one blob each).
4. Each blob's outline goes to table millimetres through the calibration (lens included); its area and
   centroid are taken there. A part of height h seen from the camera centre C appears scaled by
   k = C_z / (C_z - h) about the nadir n: the top face's centroid m gives the footprint centre
   c = n + (m - n) / k; a blob holding the visible sides too gives c = n + (m - n) 2 / (1 + k).
   ``seen_as: auto`` compares the blob's area with what each model predicts: k^2 A for the top face
   alone, about k A + (k - 1)|m - n| sqrt(A) with the visible sides (A the footprint's area).
5. A blob is rejected, with its reason, when it is cut by the photo's edge, a marker or the searched
   area, or its corrected footprint centre lies outside the work area (``cut_by_edge``), too small, too
   large, or two or more touching parts that k-means on its pixels cannot split into parts of the
   right size (k from the blob's area).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import cv2
import numpy as np

from gripsight.vision.pixelclass import block_size_px, classes_like_the_bench, classify_region, coarse_mask
from gripsight.vision.polygon import points_in_polygon
from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.blobclass import choose_classes, shape_words, split_by_shape
from gripsight.vision.blobsearch import MAX_RATIO, MIN_RATIO, BlobSearch, ColourOutline, outlines_in_window
from gripsight.vision.outlineedge import edge_outlines_px
from gripsight.vision.partresult import STATUSES, Detection, DetectedPart, PartStatus
from gripsight.vision.topface import (
    TopFaceProblem,
    expected_area_mm2,
    fit_row_of_tops,
    fit_top_faces,
    footprint_centre,
    min_rect,
    outlines_geometry,
    top_face_guess,
)
from gripsight.vision.shapes import colour_groups
from gripsight.vision.whitebalance import fit_illumination

__all__ = ["DetectedPart", "Detection", "PartStatus", "detect_parts", "STATUSES"]

_UNKNOWN_MAX_RATIO = 3.0      # an unknown blob larger than this many typical parts is not a part
_NOISE_RATIO = 0.15           # a blob under this fraction of a part's area is noise, not reported
_MIN_UNKNOWN_MM2 = 60.0


# ------------------------------------------------------------------ masks
def _poly_px(mapping, pts_mm, samples=24) -> np.ndarray:
    pts = np.asarray(pts_mm, float)
    closed = np.vstack([pts, pts[:1]])
    t = np.linspace(0, 1, samples, endpoint=False)[:, None]
    dense = np.concatenate([a + t * (b - a) for a, b in zip(closed[:-1], closed[1:])])
    return mapping.inverse(dense)


def _search_margin_mm(cell) -> float:
    """How far outside the work area blobs are followed: a part inside it, seen from the camera, can
    reach beyond its edge (its top face is scaled about the nadir), so the blob must not be cut there."""
    sizes = [max(c.footprint_mm) for c in cell.parts.values()] or [20.0]
    return 0.75 * max(sizes) + 8.0


@dataclass(frozen=True)
class _SearchRegion:
    """Where parts are looked for: the bounding rectangle (u0, v0, w, h) of the searched area, the area
    itself (bool, rectangle-sized) and at the coarse resolution (blocks of ``block_px``), and its
    one-pixel edge band."""

    rect: tuple[int, int, int, int]
    valid: np.ndarray
    valid_small: np.ndarray
    edge_band: np.ndarray
    block_px: int


_REGION_CACHE: dict = {}


def _search_region(shape, mapping, cell, detections) -> _SearchRegion:
    """The searched region. The work area grown by the search margin depends on the photo's size, the
    mapping and the cell only, so it is kept per mapping (by value): every photo of one calibration
    shares it and its region. Raised markers and markers not in the layout are cut out per photo; where
    their holes miss the grown area, the shared region is the photo's."""
    key = _region_key(shape, mapping, cell)
    cached = _REGION_CACHE.get(key)
    if cached is None:
        grown = _grown_work_area(shape, mapping, cell)
        block_px = block_size_px(_smallest_part_px(mapping, cell))
        cached = (grown, _region_of(grown, block_px), cv2.countNonZero(grown), block_px)
        if len(_REGION_CACHE) >= 8:
            _REGION_CACHE.clear()
        _REGION_CACHE[key] = cached
    grown, region, count, block_px = cached
    holes = _marker_holes(cell, detections)
    if not holes:
        return region
    mask = grown.copy()
    for hole in holes:
        cv2.fillPoly(mask, [hole], 0, shift=3)
    if cv2.countNonZero(mask) == count:
        return region
    u0, v0, w, h = region.rect                  # what is left lies in the grown area's box
    return _region_of(mask[v0:v0 + h, u0:u0 + w], block_px, (u0, v0))


def _region_of(mask, block_px: int, origin=(0, 0)) -> _SearchRegion:
    """The searched region of a mask (uint8, 255 searched) whose top-left pixel is at ``origin`` (photo px)."""
    u0, v0, w, h = cv2.boundingRect(mask)
    valid = mask[v0:v0 + h, u0:u0 + w] > 0
    valid_small = coarse_mask(valid, block_px)
    edge_band = valid & ~(cv2.erode(valid.astype(np.uint8), np.ones((3, 3), np.uint8)) > 0) if valid.size else valid
    return _SearchRegion((u0 + origin[0], v0 + origin[1], w, h), valid, valid_small, edge_band, block_px)


def _region_key(shape, mapping, cell) -> tuple:
    """Everything the grown work area and its region depend on, by value: the photo size, the mapping,
    the cell's work area and part sizes."""
    sizes = tuple((name, tuple(c.footprint_mm)) for name, c in cell.parts.items())
    return (tuple(shape), mapping.H_table_from_pixel.tobytes(), repr(mapping.lens.as_dict()),
            tuple(map(tuple, cell.work_area)), sizes)


def _smallest_part_px(mapping, cell) -> float:
    """The smallest footprint side of any class, in photo pixels where the work area's pixels are
    largest (its corners and centre)."""
    if not cell.parts:
        return float("inf")
    corners = np.asarray(cell.work_area, float)
    where = mapping.inverse(np.vstack([corners, corners.mean(axis=0)]))
    smallest_mm = min(min(c.footprint_mm) for c in cell.parts.values())
    return smallest_mm / float(mapping.mm_per_px(where).max())


#: the smallest step of OpenCV's 3x3 chamfer distance (DIST_L2, mask 3: 0.955 a pixel across, 1.3693
#: diagonally; cv2.distanceTransform's documentation), rounded down
_CHAMFER_STEP_PX = 0.95


def _grown_work_area(shape, mapping, cell) -> np.ndarray:
    """The work area in the photo grown by the search margin (uint8, 255 inside), zero on the photo's
    one-pixel edge: every pixel whose distance to the area (OpenCV's 3x3 chamfer distance) is at most
    the margin. The distance is computed over the area's bounding box grown by the margin's reach
    only: a chamfer distance is the cost of the cheapest path of pixel steps, and such a path between
    two pixels stays in the box they span, so every pixel of the grown box gets the distance the whole
    photo would give it, and every pixel outside is farther than the margin (tested against the whole
    photo's transform)."""
    h, w = shape
    mask = np.zeros((h, w), np.uint8)
    wa = _poly_px(mapping, cell.work_area)
    cv2.fillPoly(mask, [np.round(wa * 8).astype(np.int32)], 255, lineType=cv2.LINE_8, shift=3)
    centre_px = wa.mean(axis=0)
    grow_px = _search_margin_mm(cell) / float(mapping.mm_per_px(centre_px[None])[0])
    out = np.zeros((h, w), np.uint8)
    u0, v0, bw, bh = cv2.boundingRect(mask)
    if bw == 0 or bh == 0:
        return out                  # no pixel of the work area in the photo: nothing within any distance
    reach = int(np.ceil(grow_px / _CHAMFER_STEP_PX)) + 2 if np.isfinite(grow_px) else max(h, w)
    reach = max(reach, 2)
    x0, y0, x1, y1 = max(u0 - reach, 0), max(v0 - reach, 0), min(u0 + bw + reach, w), min(v0 + bh + reach, h)
    outside = cv2.distanceTransform(255 - mask[y0:y1, x0:x1], cv2.DIST_L2, 3)
    out[y0:y1, x0:x1] = np.where(outside <= grow_px, 255, 0)
    out[0, :] = out[-1, :] = 0
    out[:, 0] = out[:, -1] = 0
    return out


def _marker_holes(cell, detections) -> list[np.ndarray]:
    """The markers cut out of the searched area (polygons in 1/8 px): markers on the table are left in
    (their paper and ink are not a part's colour, and a part beside or on one is whole: whether it lies
    on a marker is decided from its footprint, in table mm). A raised marker's box hides what is behind
    it: the marker as seen is masked, and any marker not in the layout."""
    pad = 2.0
    holes = []
    for d in detections:
        placement = cell.markers.layout.get(d.id)
        if placement is not None and placement.z == 0:
            continue
        c = d.corners_px.mean(axis=0)
        grown = c + (d.corners_px - c) * (1 + 2 * (cell.markers.margin_mm + pad) / cell.markers.size_mm)
        holes.append(np.round(grown * 8).astype(np.int32))
    return holes


# ------------------------------------------------------------------ the detector
def detect_parts(image_bgr: np.ndarray, mapping, camera_centre_mm, cell, detections,
                 parallax: bool = True, seen_as: str | None = None) -> Detection:
    """Find parts in a photo (see the module docstring).

    Parameters
    ----------
    image_bgr : ndarray (H, W, 3) uint8
    mapping : TableMapping (photo px -> table mm)
    camera_centre_mm : ndarray (3,)
    cell : the cell (work_area, markers, parts)
    detections : markers found in the photo (for white balance and masking)
    parallax : bool
        Correct for the parts' height (False only to measure what the correction is worth).
    seen_as : {'auto', 'top', 'silhouette'}, optional
        Force the model for every class (default: each class's ``seen_as``).
    """
    notes: list[str] = []
    illumination = fit_illumination(image_bgr, detections, cell)
    if illumination is None:
        notes.append("no marker paper to white-balance from: colours taken as they are")
    region = _search_region(image_bgr.shape[:2], mapping, cell, detections)
    if min(region.valid_small.shape) == 0 or not cell.parts:
        notes.append("the work area is not in the photo" if cell.parts else "the cell has no part classes")
        return Detection([], illumination, notes)
    groups = colour_groups(cell.parts)
    classified = classify_region(image_bgr, region.rect, region.valid, region.valid_small, illumination, groups,
                                 region.block_px)
    for name, d in classes_like_the_bench(classified.bench, cell.parts):
        notes.append(f"parts.{name}: its colour is the table's here, or the table's in a shadow (CIE76 {d:.0f} from "
                     f"it, within the table's own {classified.bench.limit:.0f}): its parts cannot be told from the "
                     "table and may be missed; put another colour under them or give the class another colour")
    search = BlobSearch(image_bgr, classified, region.edge_band, mapping, cell, groups, parallax, seen_as, camera_centre_mm)
    outlines = [o for group, window in enumerate(classified.windows, start=1)
                for o in outlines_in_window(search, group, window)]
    blobs = _blobs(search, outlines)
    nadir = search.nadir
    fits = iter(fit_top_faces([b.problem for b in blobs if b.problem is not None]))
    found: list[DetectedPart] = []
    for b in blobs:
        top_fit = next(fits) if b.problem is not None else None
        found += _parts_of_blob(b, top_fit, nadir, parallax)
    if found:                                   # a footprint centre outside the work area: not pickable
        outside = ~points_in_polygon([p.xy_mm for p in found], cell.work_area)
        found = [replace(p, status=PartStatus.CUT_BY_EDGE, reason="lies across the edge of the work area")
                 if out and p.status is PartStatus.OK else p for p, out in zip(found, outside)]
        found = _on_markers(found, cell)
    found.sort(key=lambda p: (round(p.xy_mm[0], 1), round(p.xy_mm[1], 1)))
    parts = [DetectedPart(f"p{i + 1}", *[getattr(p, f) for f in DetectedPart.__dataclass_fields__ if f != "id"])
             for i, p in enumerate(found)]
    return Detection(parts, illumination, notes)


def _footprint_points_mm(part: DetectedPart, cls) -> np.ndarray:
    """Points (N, 2) on and inside a found part's footprint (its class's size and shape, its yaw)."""
    fp = list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1)
    s = np.linspace(-0.5, 0.5, 7)
    gx, gy = np.meshgrid(s * fp[0], s * fp[1])
    local = np.column_stack([gx.ravel(), gy.ravel()])
    if cls.shape == "cylinder":
        local = local[(local[:, 0] / fp[0]) ** 2 + (local[:, 1] / fp[1]) ** 2 <= 0.25 + 1e-9]
    yaw = np.radians(part.yaw_deg)
    rot = np.array([[np.cos(yaw), -np.sin(yaw)], [np.sin(yaw), np.cos(yaw)]])
    return local @ rot.T + np.asarray(part.xy_mm, float)


def _on_markers(found: list[DetectedPart], cell) -> list[DetectedPart]:
    """A part whose footprint (in table mm) overlaps a marker lies on it: cut. The marker is its black
    square and the inner half of its white margin (the quiet zone its detection needs); a part on the
    outer edge of the paper (0.02 mm thick) is whole and is picked."""
    if not cell.markers.layout:
        return found
    ids = list(cell.markers.layout)
    papers = np.array([marker_paper_corners_mm(cell.markers.layout[i], cell.markers.size_mm,
                                               0.5 * cell.markers.margin_mm)[:, :2] for i in ids])
    paper_centres = papers.mean(axis=1)
    paper_reach = np.linalg.norm(papers[:, 0] - paper_centres, axis=1)          # half diagonals
    xy = np.array([p.xy_mm for p in found], float)
    reach_of = {n: 0.5 * float(np.hypot(c.footprint_mm[0], c.footprint_mm[-1])) for n, c in cell.parts.items()}
    part_reach = np.array([reach_of.get(p.class_name, 0.0) for p in found])
    near = np.linalg.norm(xy[:, None, :] - paper_centres[None], axis=2) < part_reach[:, None] + paper_reach[None]
    out = []
    for p, close in zip(found, near):
        cls = cell.parts.get(p.class_name)
        if p.status is PartStatus.OK and cls is not None and close.any():
            pts = _footprint_points_mm(p, cls)
            hit = next((ids[j] for j in np.flatnonzero(close) if points_in_polygon(pts, papers[j]).any()), None)
            if hit is not None:
                p = replace(p, status=PartStatus.CUT_BY_EDGE, reason=f"lies on marker {hit}")
        out.append(p)
    return out


@dataclass
class _Blob:
    """One connected region of one class's colour (or an unknown colour), its verdict and its pieces
    (several when split from touching parts); ``problem`` is its top-face fit, when one is wanted."""

    name: str
    cls: object
    height_mm: float
    k: float
    mode: str
    status: PartStatus
    reason: str
    pieces: list
    outline_mm: np.ndarray
    normals: np.ndarray
    m: np.ndarray
    delta_e: float
    rect: tuple[float, float, float]            # the outline's length, width (footprint mm) and yaw
    problem: TopFaceProblem | None = None
    piece_classes: list | None = None           # per piece of a split blob of several classes' colour:
    #                                             (name, class, k, top-face fit or None)


def _blobs(search: BlobSearch, outlines: list[ColourOutline]) -> list[_Blob]:
    """Measure every outline in table mm (one mapping, areas, centroids and normals for all), then give
    each blob its verdict, its pieces and, where wanted, its top-face fit problem."""
    if not outlines:
        return []
    classified, mapping, nadir, parallax = search.classified, search.mapping, search.nadir, search.parallax
    u0, v0 = classified.origin
    lengths = np.cumsum([len(o.outline_px) for o in outlines])[:-1]
    on_edges, shaded = edge_outlines_px(search.image_bgr, [o.outline_px for o in outlines])
    outlines_mm = np.split(mapping(np.concatenate(on_edges)), lengths)
    areas, centroids, normals = outlines_geometry(outlines_mm)
    outlines = choose_classes(search, outlines, outlines_mm, areas, centroids, normals)
    blobs = []
    for o, outline_mm, area_mapped, m, normal, in_shade in zip(outlines, outlines_mm, areas, centroids, normals, shaded):
        name, cls, k, sub, x, y = o.name, o.cls, o.k, o.sub, o.x, o.y
        unknown = cls is None
        shape_misfit = unknown and o.group is not None
        if shape_misfit:
            name = "unknown"                    # no class: the reject bin
        area = float(area_mapped) / (k * k)
        if unknown and area < _MIN_UNKNOWN_MM2:
            continue
        if not unknown and area < _NOISE_RATIO * expected_area_mm2(cls):
            continue                    # specks of the class's colour, not a part seen in part
        h, w = sub.shape
        inside = sub > 0
        moments = cv2.moments(sub, binaryImage=True)
        pixel_uv = (moments["m10"] / moments["m00"] + x + u0, moments["m01"] / moments["m00"] + y + v0)
        whole = [(m, outline_mm, o.outline_px, area, pixel_uv)]
        de = float("nan") if unknown and not shape_misfit else float(classified.delta_e[y:y + h, x:x + w][inside].mean())
        cut = bool(search.edge_band[y:y + h, x:x + w][inside].any())
        mode = search.seen_as or (cls.seen_as if cls is not None else "auto")
        pieces, status, reason = whole, PartStatus.OK, ""
        if unknown:
            what = f"a part of {o.group.name.replace('+', ' or ')}'s colour" if shape_misfit else "an unknown colour"
            if cut:
                status, reason = PartStatus.CUT_BY_EDGE, f"{what} cut by the edge of the photo or a marker"
            elif area > _UNKNOWN_MAX_RATIO * search.typical:
                status, reason = PartStatus.TOO_LARGE, f"a coloured region of {area:.0f} mm², not a part"
            elif shape_misfit:
                status, reason = PartStatus.UNKNOWN_SHAPE, (f"colour of {', '.join(o.group.members)} but the shape or "
                                                            f"size of none ({shape_words(o, outline_mm, k)})")
            else:
                status, reason = PartStatus.UNKNOWN_COLOUR, "colour matches no class"
        elif cut:
            status, reason = PartStatus.CUT_BY_EDGE, "cut by the edge of the photo, a marker or the searched area"
        else:
            expected = expected_area_mm2(cls)
            ratio = area / expected
            if ratio < MIN_RATIO:
                status, reason = PartStatus.TOO_SMALL, f"{area:.0f} mm² is {ratio:.2f}x a {name} part's {expected:.0f} mm²"
            elif ratio > MAX_RATIO or o.split_into >= 2:
                members = o.members or (name,)
                pieces, status, reason, piece_fits = split_by_shape(
                    search, o, sub, x + u0, y + v0, outline_mm, normal, area_mapped, members, whole)
                if status is PartStatus.UNKNOWN_SHAPE:      # no split into parts of its colour's classes holds
                    height = max(search.cell.parts[n].height_mm for n in members)
                    name, cls, k, mode = "unknown", None, search.k_of(height), search.seen_as or "auto"
                    area = float(area_mapped) / (k * k)
                    pieces = [(m, outline_mm, o.outline_px, area, pixel_uv)]
                    o = replace(o, height_mm=float(height))
                    if area > _UNKNOWN_MAX_RATIO * search.typical:
                        status, reason = PartStatus.TOO_LARGE, f"a coloured region of {area:.0f} mm², not a part"
                    else:
                        reason = (f"colour of {', '.join(members)} but the shape or size of none, nor of touching "
                                  f"parts of {'them' if len(members) > 1 else 'it'} ({shape_words(o, outline_mm, k)})")
        blob = _Blob(name, cls, o.height_mm, k, mode, status, reason, pieces, outline_mm, normal, m, de,
                     min_rect(outline_mm, k))
        if len(pieces) > 1 and o.members:
            blob.piece_classes = [f if f is not None else (blob.name, blob.cls, blob.k, None) for f in piece_fits]
        if parallax and mode == "auto" and cls is not None and len(pieces) == 1:
            guess = top_face_guess(m, area * k * k, nadir, k, expected_area_mm2(cls))
            edge = ~in_shade if in_shade.mean() < 0.5 else np.ones(len(in_shade), bool)   # not a shadow's edge
            blob.problem = TopFaceProblem.of_class(outline_mm[edge], normal[edge], guess, nadir, k, cls, blob.rect[2])
        blobs.append(blob)
    return blobs


def _parts_of_blob(b: _Blob, top_fit, nadir, parallax: bool) -> list[DetectedPart]:
    """The blob's parts with their footprint centres (parallax corrected) and statuses."""
    expected = expected_area_mm2(b.cls) if b.cls is not None else b.pieces[0][3]
    tops = [None if top_fit is None else top_fit[0]]
    if parallax and b.mode == "auto" and b.cls is not None and len(b.pieces) > 1 and b.cls.shape == "box":
        area_mapped = sum(p[3] for p in b.pieces) * b.k * b.k
        tops = fit_row_of_tops(b.outline_mm, b.normals, b.m, area_mapped, nadir, b.k, b.cls, b.pieces) or [None] * len(b.pieces)
    parts = []
    for j, ((piece_m, piece_mm, piece_px, piece_area, piece_uv), top) in enumerate(
            zip(b.pieces, tops * (len(b.pieces) // len(tops)))):
        length, width, yaw = b.rect if len(b.pieces) == 1 else min_rect(piece_mm, b.k)
        if top_fit is not None and len(b.pieces) == 1 and b.cls is not None:
            # the top face's own size (the fitted scale of the class's footprint), not the outline's, which
            # holds the visible sides wherever they kept the class's colour
            fp = sorted(list(b.cls.footprint_mm) * (2 if len(b.cls.footprint_mm) == 1 else 1), reverse=True)
            length, width = fp[0] * top_fit[2] / b.k, fp[1] * top_fit[2] / b.k
        if b.piece_classes is not None:
            name, cls, k, fit = b.piece_classes[j]
            if fit is not None:
                centre = nadir + (fit[0] - nadir) / k
                parts.append(DetectedPart("", name, b.status, b.reason, piece_uv, (float(centre[0]), float(centre[1])),
                                          float(cls.height_mm), float(piece_area), yaw, length, width, "top_outline",
                                          b.delta_e, piece_px))
                continue
        if top is not None:
            # the top face placed at its known size; the area's estimate is not averaged in (it was, when
            # the face's size was free: own renders' pick points 0.158 mm RMS averaged, 0.121 mm alone)
            centre, used = nadir + (top - nadir) / b.k, "top_outline"
        else:
            centre, used = (piece_m, "none") if not parallax else footprint_centre(
                piece_m, piece_area * b.k * b.k, nadir, b.k, expected, b.mode)
        parts.append(DetectedPart("", b.name, b.status, b.reason, piece_uv, (float(centre[0]), float(centre[1])),
                                  b.height_mm, float(piece_area), yaw, length, width, used, b.delta_e, piece_px))
    return parts


