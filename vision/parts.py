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

from dataclasses import dataclass, field, replace
from enum import StrEnum

import cv2
import numpy as np

from gripsight.vision.pixelclass import block_size_px, classify_region, coarse_mask
from gripsight.vision.polygon import points_in_polygon
from gripsight.vision.markergeom import marker_paper_corners_mm
from gripsight.vision.outlineedge import edge_outlines_px
from gripsight.vision.topface import (
    TopFaceProblem,
    beyond_silhouette_mm,
    top_faces_overlap,
    expected_area_mm2,
    fit_row_of_tops,
    fit_top_faces,
    footprint_centre,
    min_rect,
    outlines_geometry,
    score_top_faces,
    top_face_guess,
)
from gripsight.vision.shapes import ColourGroup, colour_groups
from gripsight.vision.whitebalance import Illumination, fit_illumination

__all__ = ["DetectedPart", "Detection", "PartStatus", "detect_parts", "STATUSES"]


class PartStatus(StrEnum):
    """What the photo analysis made of a blob."""

    OK = "ok"                              # a part of a known class
    CUT_BY_EDGE = "cut_by_edge"            # cut by the photo's edge, a marker or the searched area
    TOO_SMALL = "too_small"
    TOO_LARGE = "too_large"
    TOUCHING = "touching"                  # touching parts that could not be split
    UNKNOWN_COLOUR = "unknown_colour"      # a part of no class's colour: goes to the reject bin
    UNKNOWN_SHAPE = "unknown_shape"        # a class's colour but no class's shape and size: the reject bin

    @property
    def pickable(self) -> bool:
        """Goes to a bin (its class's, or the reject bin); the others stay on the table."""
        return self in (PartStatus.OK, PartStatus.UNKNOWN_COLOUR, PartStatus.UNKNOWN_SHAPE)


STATUSES = tuple(s.value for s in PartStatus)
_UNKNOWN_MAX_RATIO = 3.0      # an unknown blob larger than this many typical parts is not a part
_MIN_RATIO, _MAX_RATIO = 0.45, 1.6
_NOISE_RATIO = 0.15           # a blob under this fraction of a part's area is noise, not reported
_MIN_UNKNOWN_MM2 = 60.0


@dataclass(frozen=True)
class DetectedPart:
    """A part found in a photo, in table coordinates (footprint centre corrected for parallax)."""

    id: str
    class_name: str
    status: PartStatus
    reason: str
    pixel_uv: tuple[float, float]
    xy_mm: tuple[float, float]
    height_mm: float
    area_mm2: float
    yaw_deg: float
    length_mm: float
    width_mm: float
    seen_as: str
    delta_e: float
    outline_px: np.ndarray = field(repr=False, compare=False, default=None)

    def as_dict(self) -> dict:
        return {"id": self.id, "class": self.class_name, "status": self.status.value, "reason": self.reason,
                "pixel": [round(self.pixel_uv[0], 2), round(self.pixel_uv[1], 2)],
                "table_mm": [round(self.xy_mm[0], 3), round(self.xy_mm[1], 3)], "height_mm": self.height_mm,
                "area_mm2": round(self.area_mm2, 1), "yaw_deg": round(self.yaw_deg, 2),
                "length_mm": round(self.length_mm, 2), "width_mm": round(self.width_mm, 2),
                "seen_as": self.seen_as, "delta_e": round(self.delta_e, 2)}


@dataclass
class Detection:
    parts: list[DetectedPart]
    illumination: Illumination | None
    notes: list[str]


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
        cached = (grown, _region_of(grown, mapping, cell), cv2.countNonZero(grown))
        if len(_REGION_CACHE) >= 8:
            _REGION_CACHE.clear()
        _REGION_CACHE[key] = cached
    grown, region, count = cached
    holes = _marker_holes(cell, detections)
    if not holes:
        return region
    mask = grown.copy()
    for hole in holes:
        cv2.fillPoly(mask, [hole], 0, shift=3)
    if cv2.countNonZero(mask) == count:
        return region
    return _region_of(mask, mapping, cell)


def _region_of(mask, mapping, cell) -> _SearchRegion:
    u0, v0, w, h = cv2.boundingRect(mask)
    valid = mask[v0:v0 + h, u0:u0 + w] > 0
    block_px = block_size_px(_smallest_part_px(mapping, cell))
    valid_small = coarse_mask(valid, block_px)
    edge_band = valid & ~(cv2.erode(valid.astype(np.uint8), np.ones((3, 3), np.uint8)) > 0) if valid.size else valid
    return _SearchRegion((u0, v0, w, h), valid, valid_small, edge_band, block_px)


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
    search = _Search(image_bgr, classified, region.edge_band, mapping, cell, groups, parallax, seen_as, camera_centre_mm)
    outlines = [o for group, window in enumerate(classified.windows, start=1)
                for o in _outlines_in_window(search, group, window)]
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


class _Search:
    """What every window of one photo shares: the classified pixels, the searched area's edge band, the
    mapping, the cell's classes and the camera centre."""

    def __init__(self, image_bgr, classified, edge_band, mapping, cell, groups, parallax, seen_as, camera_centre_mm):
        self.image_bgr = image_bgr
        self.classified, self.edge_band, self.mapping, self.cell = classified, edge_band, mapping, cell
        self.parallax, self.seen_as = parallax, seen_as
        self.groups: dict[str, ColourGroup] = groups
        self.names = list(groups)
        self.nadir = np.asarray(camera_centre_mm[:2], float)
        self.cz = float(camera_centre_mm[2])
        self.kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (3, 3))
        self.tallest = max(c.height_mm for c in cell.parts.values())
        self.typical = float(np.median([expected_area_mm2(c) for c in cell.parts.values()]))

    def k_of(self, height_mm: float) -> float:
        """The top face's scale about the nadir for a part of this height (1 without parallax)."""
        return self.cz / (self.cz - height_mm) if self.parallax else 1.0


@dataclass
class _Outline:
    """One contour of one class's colour (or an unknown colour), before it is measured: its class, its
    outline (photo px), its pixels ``sub`` and where they sit in the searched rectangle (x, y)."""

    name: str
    cls: object
    height_mm: float
    k: float
    outline_px: np.ndarray
    sub: np.ndarray
    x: int
    y: int
    group: ColourGroup | None = None          # its colour group, when that holds several classes
    members: tuple[str, ...] = ()             # once a class is chosen: the classes of its colour
    split_into: int = 0                       # parts side by side its outline's length says it holds


def _outlines_in_window(search: _Search, group: int, window) -> list[_Outline]:
    """The outlines of every class in one group's window of classified pixels (a blob of another group
    that reaches into the window is left to its own)."""
    wx, wy, ww, wh = window
    classified, names, cz = search.classified, search.names, search.cz
    rh, rw = classified.label.shape
    x0, y0 = max(wx - 2, 0), max(wy - 2, 0)               # a margin for the morphology
    x1, y1 = min(wx + ww + 2, rw), min(wy + wh + 2, rh)
    labels = classified.label[y0:y1, x0:x1]
    u0, v0 = classified.origin
    out = []
    for k_label in np.flatnonzero(np.bincount(labels.ravel(), minlength=len(names) + 2)[1:]) + 1:
        mask = cv2.morphologyEx((labels == k_label).astype(np.uint8), cv2.MORPH_OPEN, search.kernel)
        mask = cv2.morphologyEx(mask, cv2.MORPH_CLOSE, search.kernel)
        contours, _ = cv2.findContours(mask, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
        unknown = k_label == len(names) + 1
        colour = None if unknown else search.groups[names[k_label - 1]]
        several = colour is not None and len(colour.members) > 1
        name = "unknown" if unknown else (colour.name if several else colour.members[0])
        cls = None if unknown or several else search.cell.parts[name]
        height = cls.height_mm if cls is not None else (
            max(search.cell.parts[n].height_mm for n in colour.members) if several else search.tallest)
        k = search.k_of(height)
        for contour in contours:
            if len(contour) < 10:                             # a speck of a few pixels
                continue
            outline = contour.reshape(-1, 2)
            if classified.group_at(int(outline[0, 0]) + x0, int(outline[0, 1]) + y0) != group:
                continue
            x, y, w, h = cv2.boundingRect(contour)
            sub = np.zeros((h, w), np.uint8)
            cv2.drawContours(sub, [contour], -1, 1, thickness=cv2.FILLED, offset=(-x, -y))
            out.append(_Outline(name, cls, float(height), k, (outline + (x0 + u0, y0 + v0)).astype(float), sub,
                                x + x0, y + y0, colour if several else None))
    return out


def _blobs(search: _Search, outlines: list[_Outline]) -> list[_Blob]:
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
    outlines = _choose_classes(search, outlines, outlines_mm, areas, centroids, normals)
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
                                                            f"size of none ({_shape_words(o, outline_mm, k)})")
            else:
                status, reason = PartStatus.UNKNOWN_COLOUR, "colour matches no class"
        elif cut:
            status, reason = PartStatus.CUT_BY_EDGE, "cut by the edge of the photo, a marker or the searched area"
        else:
            expected = expected_area_mm2(cls)
            ratio = area / expected
            if ratio < _MIN_RATIO:
                status, reason = PartStatus.TOO_SMALL, f"{area:.0f} mm² is {ratio:.2f}x a {name} part's {expected:.0f} mm²"
            elif ratio > _MAX_RATIO or o.split_into >= 2:
                members = o.members or (name,)
                pieces, status, reason, piece_fits = _split_by_shape(
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
                                  f"parts of {'them' if len(members) > 1 else 'it'} ({_shape_words(o, outline_mm, k)})")
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


def _choose_classes(search: _Search, outlines, outlines_mm, areas, centroids, normals) -> list[_Outline]:
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
            if _MIN_RATIO < ratio < _MAX_RATIO:
                guess = top_face_guess(centroids[i], areas[i], search.nadir, k, expected)
                problems.append(TopFaceProblem.of_class(outlines_mm[i], normals[i], guess, search.nadir, k, cls,
                                                        min_rect(outlines_mm[i], k)[2]))
                owners.append((i, name))
        if not any(_MIN_RATIO < r < _MAX_RATIO for r in ratios):
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


def _by_size(search: _Search, members, outline_mm) -> str | None:
    """The one class of the colour whose footprint sides the outline's (length and width, as a top face)
    are within 15 % of, when every other class's are farther than that; None otherwise."""
    fits = []
    for name in members:
        cls = search.cell.parts[name]
        length, width, _ = min_rect(outline_mm, search.k_of(cls.height_mm))
        fp = sorted(list(cls.footprint_mm) * (2 if len(cls.footprint_mm) == 1 else 1), reverse=True)
        fits.append(abs(length / fp[0] - 1.0) <= _SIZE_FIT and abs(width / fp[1] - 1.0) <= _SIZE_FIT)
    return members[fits.index(True)] if sum(fits) == 1 else None


def _row_of_parts(search: _Search, members, outline_mm) -> tuple[str | None, int]:
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


def _split_by_shape(search: _Search, o: _Outline, sub, ox, oy, outline_mm, normals, area_mapped, members, whole):
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
        pieces, status, reason = _split(sub, ox, oy, search.mapping, o.k, (min(areas), max(areas)), ratio, o.name,
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


def _piece_fits(search: _Search, outline_mm, normals, k_blob, pieces, members) -> tuple[list, bool]:
    """Per piece of a blob split from touching parts of one colour, the class among ``members`` whose top
    face fits the piece best, as (name, class, k, top-face fit), or None when none holds: the blob's
    outline points nearest each piece's centre are that piece's own edge (the cut between pieces has
    none), and each class's top face is fitted to them as for a lone part (:func:`_choose_classes`).
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
    for i, sc in zip(again, score_top_faces([replace(problems[i], nadir=problems[i].centre) for i in again])):
        scores[i] = sc
    best: dict[int, tuple] = {}
    for (j, name, k), score in zip(owners, scores):
        if score.fit is not None and (j not in best or score.median_mm < best[j][3]):
            best[j] = (name, search.cell.parts[name], k, score.median_mm, score.fit)
    fits = [(best[j][0], best[j][1], best[j][2], best[j][4]) if j in best else None for j in range(len(pieces))]
    if any(f is None for f in fits):
        return fits, False
    beyond = np.min([beyond_silhouette_mm(outline_mm, fit, search.nadir, k, cls) for _, cls, k, fit in fits], axis=0)
    overlap = top_faces_overlap([(fit, cls) for _, cls, _, fit in fits])
    return fits, bool(np.percentile(beyond, 80) <= _BEYOND_MM and overlap <= _OVERLAP)


_BEYOND_MM = 1.0        # an outline explained by its pieces: 80 % of it within this of their silhouettes,
_OVERLAP = 0.4          # and no piece's top face more than this fraction inside another's (one part twice)


def _shape_words(o: _Outline, outline_mm, k: float) -> str:
    """The measured footprint of a blob that fits no class, in words for its reason."""
    length, width, _ = min_rect(outline_mm, k)
    return f"its outline measures {length:.0f} x {width:.0f} mm"


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
            centre, used = nadir + (top - nadir) / b.k, "top_outline"
            by_area, model = footprint_centre(piece_m, piece_area * b.k * b.k, nadir, b.k, expected, "auto")
            if model == "silhouette":       # the whole visible part is in the blob: two estimates
                centre, used = 0.5 * (centre + by_area), "top_outline+silhouette"
        else:
            centre, used = (piece_m, "none") if not parallax else footprint_centre(
                piece_m, piece_area * b.k * b.k, nadir, b.k, expected, b.mode)
        parts.append(DetectedPart("", b.name, b.status, b.reason, piece_uv, (float(centre[0]), float(centre[1])),
                                  b.height_mm, float(piece_area), yaw, length, width, used, b.delta_e, piece_px))
    return parts


_KMEANS_POINTS = 400


def _split(sub, ox, oy, mapping, k, expected_mm2, ratio, name, whole):
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
        if not (_MIN_RATIO < area / low and area / high < 1.4):
            return whole, PartStatus.TOUCHING, \
                f"{n} touching {name} parts that could not be split into parts of the right size"
        pts_mm = xy[sel].astype(float)
        hull = cv2.convexHull(pts_mm.astype(np.float32)).reshape(-1, 2).astype(float)
        pieces.append((pts_mm.mean(axis=0), hull, mapping.inverse(hull), float(area),
                       (float(uv[sel, 0].mean()), float(uv[sel, 1].mean()))))
    return pieces, PartStatus.OK, f"split from {n} touching parts"
