"""Finding the parts: colour classes in CIELAB, blobs, table coordinates, and the parallax fix.

Per photo (see DESIGN.md sec. 6):

1. The work area is projected into the photo and grown by a margin (a part inside it can appear beyond
   its edge, seen from the camera); marker papers are masked out. Only that region is
   converted to CIELAB, after white balance from the markers' paper (:mod:`vision.whitebalance`).
2. Each pixel takes the class whose reference colour is nearest in CIEDE2000, if within that class's
   tolerance (a fast CIE76 pre-filter at 2.5x the tolerance limits the CIEDE2000 work to candidates).
   Saturated pixels (chroma > 30) near no class are candidates for an unknown colour.
3. Per class: morphological opening and closing, connected components.
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

from dataclasses import dataclass, field

import cv2
import numpy as np

from vision.colour import delta_e_2000
from vision.scene import marker_paper_corners_mm
from vision.polygon import points_in_polygon
from vision.topface import (expected_area_mm2, fit_row_of_tops, fit_top_face, footprint_centre, min_rect,
                            outward_normals, polygon_area_centroid)
from vision.whitebalance import Illumination, fit_illumination, lab_of_pixels

__all__ = ["DetectedPart", "Detection", "detect_parts", "STATUSES"]

STATUSES = ("ok", "cut_by_edge", "too_small", "too_large", "touching", "unknown_colour")
_UNKNOWN_CHROMA = 30.0
_UNKNOWN_FROM_TABLE = 25.0    # CIE76 from the table's median colour for an unknown part
_FOREGROUND_MIN = 12.0        # CIE76: a part pixel differs from the table at least this much
_UNKNOWN_MAX_RATIO = 3.0      # an unknown blob larger than this many typical parts is not a part
_MIN_RATIO, _MAX_RATIO = 0.45, 1.6
_NOISE_RATIO = 0.15           # a blob under this fraction of a part's area is noise, not reported
_MIN_UNKNOWN_MM2 = 60.0
_COARSE = 4               # the coarse colour pass runs at 1/4 resolution


@dataclass(frozen=True)
class DetectedPart:
    """A part found in a photo, in table coordinates (footprint centre corrected for parallax)."""

    id: str
    class_name: str
    status: str
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
        return {"id": self.id, "class": self.class_name, "status": self.status, "reason": self.reason,
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


_MASK_CACHE: dict = {}


def _valid_mask(shape, mapping, cell, detections) -> np.ndarray:
    """The searched region (uint8 0/255), cached: in a run every photo of one calibration shares it."""
    key = (shape, id(mapping), id(cell), tuple(sorted(d.id for d in detections)))
    cached = _MASK_CACHE.get(key)
    if cached is not None and cached[0] is mapping:
        return cached[1]
    mask = _build_valid_mask(shape, mapping, cell, detections)
    if len(_MASK_CACHE) > 8:
        _MASK_CACHE.clear()
    _MASK_CACHE[key] = (mapping, mask)
    return mask


def _build_valid_mask(shape, mapping, cell, detections) -> np.ndarray:
    h, w = shape
    mask = np.zeros((h, w), np.uint8)
    wa = _poly_px(mapping, cell.work_area)
    cv2.fillPoly(mask, [np.round(wa * 8).astype(np.int32)], 255, lineType=cv2.LINE_8, shift=3)
    centre_px = wa.mean(axis=0)
    grow_px = _search_margin_mm(cell) / float(mapping.mm_per_px(centre_px[None])[0])
    outside = cv2.distanceTransform(255 - mask, cv2.DIST_L2, 3)
    mask = np.where(outside <= grow_px, 255, 0).astype(np.uint8)
    pad = 2.0
    for marker_id, m in cell.markers.layout.items():
        paper = marker_paper_corners_mm(m, cell.markers.size_mm, cell.markers.margin_mm + pad)[:, :2]
        if m.z == 0:
            cv2.fillPoly(mask, [np.round(_poly_px(mapping, paper, 4) * 8).astype(np.int32)], 0, shift=3)
    for d in detections:          # raised markers (and any marker) as seen
        c = d.corners_px.mean(axis=0)
        grown = c + (d.corners_px - c) * (1 + 2 * (cell.markers.margin_mm + pad) / cell.markers.size_mm)
        cv2.fillPoly(mask, [np.round(grown * 8).astype(np.int32)], 0, shift=3)
    border = np.zeros_like(mask)
    border[1:-1, 1:-1] = 255
    return cv2.bitwise_and(mask, border)


def _foreground(lab: np.ndarray, background) -> np.ndarray:
    """Pixels that differ from the table: CIE76 from its median colour beyond max(12, 4 x the table's own
    spread). ``background`` is (median Lab, spread) or None (everything counts)."""
    if background is None:
        return np.ones(len(lab), bool)
    median, spread = background
    return ((lab - median) ** 2).sum(axis=1) > max(_FOREGROUND_MIN, 4.0 * spread) ** 2


def _unknown_mask(lab: np.ndarray, background) -> np.ndarray:
    """Saturated pixels that differ from the table's own colour (a colourful table is not a part)."""
    saturated = np.hypot(lab[:, 1], lab[:, 2]) > _UNKNOWN_CHROMA
    if background is None:
        return saturated
    return saturated & (((lab - background[0]) ** 2).sum(axis=1) > _UNKNOWN_FROM_TABLE ** 2)


def _classify_pixels(lab: np.ndarray, classes: dict, background=None) -> tuple[np.ndarray, np.ndarray]:
    """Class index + 1 (0 none, K + 1 unknown saturated) and the CIEDE2000 to it, for pixels (N, 3)."""
    names = list(classes)
    best = np.full(len(lab), np.inf, np.float32)
    label = np.zeros(len(lab), np.uint8)
    fg = _foreground(lab, background)
    for k, name in enumerate(names):
        ref = np.asarray(classes[name].lab, np.float32)
        tol = classes[name].tolerance
        d76 = np.sqrt(((lab - ref) ** 2).sum(axis=1))
        cand = np.flatnonzero((d76 < 2.5 * tol) & fg)
        if cand.size == 0:
            continue
        d00 = delta_e_2000(lab[cand], ref).astype(np.float32)
        better = (d00 < tol) & (d00 < best[cand])
        best[cand[better]] = d00[better]
        label[cand[better]] = k + 1
    label[(label == 0) & _unknown_mask(lab, background)] = len(names) + 1
    return label, best


def _candidates(lab: np.ndarray, classes: dict, background=None) -> np.ndarray:
    """Pixels worth a full-resolution look: within 2.5x a class's tolerance in CIE76 (CIEDE2000 is
    never more than about that), or saturated and unlike the table (a possible unknown colour)."""
    near = _unknown_mask(lab, background)
    for cls in classes.values():
        ref = np.asarray(cls.lab, np.float32)
        near |= ((lab - ref) ** 2).sum(axis=1) < (2.5 * cls.tolerance) ** 2
    return near & _foreground(lab, background)


def _classify(roi: np.ndarray, valid: np.ndarray, origin, illumination, classes) -> tuple[np.ndarray, np.ndarray]:
    """Label and CIEDE2000 images of a region. Coarse to fine: classify at a quarter of the resolution,
    then only the pixels near what the coarse pass found, at full resolution (parts cover a few % of
    the work area)."""
    h, w = valid.shape
    u0, v0 = origin
    f = _COARSE
    small = cv2.resize(roi, (w // f, h // f), interpolation=cv2.INTER_AREA)
    valid_small = cv2.resize(valid.astype(np.uint8), (w // f, h // f), interpolation=cv2.INTER_NEAREST) > 0
    ys, xs = np.nonzero(valid_small)
    lab = lab_of_pixels(small[ys, xs], f * xs + (f - 1) / 2 + u0, f * ys + (f - 1) / 2 + v0, illumination)
    background = None
    if len(lab):                                    # the table: parts cover a few % of the work area
        median = np.median(lab, axis=0)
        dist = np.sqrt(((lab - median) ** 2).sum(axis=1))
        background = (median, 1.4826 * float(np.median(dist)))
    coarse = np.zeros(valid_small.shape, np.uint8)
    coarse[ys, xs] = _candidates(lab, classes, background)
    coarse = cv2.dilate(coarse, np.ones((3, 3), np.uint8))
    near = np.zeros((h, w), np.uint8)
    up = cv2.resize(coarse, ((w // f) * f, (h // f) * f), interpolation=cv2.INTER_NEAREST)
    near[:up.shape[0], :up.shape[1]] = up
    near = near > 0
    near = cv2.dilate(near.astype(np.uint8), np.ones((3, 3), np.uint8)) > 0
    ys, xs = np.nonzero(near & valid)
    label = np.zeros((h, w), np.uint8)
    best = np.full((h, w), np.inf, np.float32)
    if len(ys):
        lab = lab_of_pixels(roi[ys, xs], xs + u0, ys + v0, illumination)
        label[ys, xs], best[ys, xs] = _classify_pixels(lab, classes, background)
    return label, best


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
    h_img, w_img = image_bgr.shape[:2]
    notes: list[str] = []
    illumination = fit_illumination(image_bgr, detections, cell)
    if illumination is None:
        notes.append("no marker paper to white-balance from: colours taken as they are")
    valid = _valid_mask((h_img, w_img), mapping, cell, detections)
    u0, v0, bw, bh = cv2.boundingRect(valid)
    if bw == 0 or bh == 0 or not cell.parts:
        notes.append("the work area is not in the photo" if bw == 0 else "the cell has no part classes")
        return Detection([], illumination, notes)
    u1, v1 = u0 + bw, v0 + bh
    roi = np.ascontiguousarray(image_bgr[v0:v1, u0:u1])
    valid_roi = valid[v0:v1, u0:u1] > 0
    label, best = _classify(roi, valid_roi, (u0, v0), illumination, cell.parts)
    names = list(cell.parts)
    edge_band = valid_roi & ~(cv2.erode(valid_roi.astype(np.uint8), np.ones((3, 3), np.uint8)) > 0)
    nadir = np.asarray(camera_centre_mm[:2], float)
    cz = float(camera_centre_mm[2])
    kernel = cv2.getStructuringElement(cv2.MORPH_ELLIPSE, (3, 3))
    tallest = max(c.height_mm for c in cell.parts.values())
    found: list[DetectedPart] = []
    for k_label in range(1, len(names) + 2):
        full = (label == k_label).astype(np.uint8)
        bx, by, bw2, bh2 = cv2.boundingRect(full)
        if bw2 == 0:
            continue
        bx0, by0 = max(bx - 2, 0), max(by - 2, 0)
        mask = full[by0:by + bh2 + 2, bx0:bx + bw2 + 2]
        mask = cv2.morphologyEx(mask, cv2.MORPH_OPEN, kernel)
        mask = cv2.morphologyEx(mask, cv2.MORPH_CLOSE, kernel)
        n, comp, stats, _ = cv2.connectedComponentsWithStats(mask, connectivity=8)
        stats = stats + np.array([bx0, by0, 0, 0, 0])
        unknown = k_label == len(names) + 1
        name = "unknown" if unknown else names[k_label - 1]
        cls = None if unknown else cell.parts[name]
        height = tallest if unknown else cls.height_mm
        k = cz / (cz - height) if parallax else 1.0
        for i in range(1, n):
            x, y, w, h, npx = stats[i]
            if npx < 12:
                continue
            sub = (comp[y - by0:y - by0 + h, x - bx0:x - bx0 + w] == i).astype(np.uint8)
            whole = _whole(sub, x + u0, y + v0, mapping, k)
            m, outline_mm, outline, area, pixel_uv = whole[0]
            if unknown and area < _MIN_UNKNOWN_MM2:
                continue
            if not unknown and area < _NOISE_RATIO * expected_area_mm2(cls):
                continue                    # specks of the class's colour, not a part seen in part
            de = float(np.nanmean(np.where(np.isfinite(best[y:y + h, x:x + w][sub > 0]),
                                           best[y:y + h, x:x + w][sub > 0], np.nan))) if not unknown else float("nan")
            cut = bool(edge_band[y:y + h, x:x + w][sub > 0].any())
            mode = seen_as or (cls.seen_as if cls is not None else "auto")
            pieces = whole
            status, reason = "ok", ""
            if unknown:
                typical = float(np.median([expected_area_mm2(c) for c in cell.parts.values()]))
                if cut:
                    status, reason = "cut_by_edge", "an unknown colour cut by the edge of the photo or a marker"
                elif area > _UNKNOWN_MAX_RATIO * typical:
                    status, reason = "too_large", f"a coloured region of {area:.0f} mm², not a part"
                else:
                    status, reason = "unknown_colour", "colour matches no class"
            elif cut:
                status, reason = "cut_by_edge", "cut by the edge of the photo, a marker or the searched area"
            else:
                expected = expected_area_mm2(cls)
                ratio = area / expected
                if ratio < _MIN_RATIO:
                    status, reason = "too_small", f"{area:.0f} mm² is {ratio:.2f}x a {name} part's {expected:.0f} mm²"
                elif ratio > _MAX_RATIO:
                    pieces, status, reason = _split(sub, x + u0, y + v0, mapping, k, expected, ratio, name, whole)
            expected = expected_area_mm2(cls) if cls is not None else area
            normals = outward_normals(outline_mm)
            row_tops = None
            if parallax and mode == "auto" and cls is not None and len(pieces) > 1 and cls.shape == "box":
                row_tops = fit_row_of_tops(outline_mm, normals, m, nadir, k, cls, pieces)
            for j, (piece_m, piece_mm, piece_px, piece_area, piece_uv) in enumerate(pieces):
                length, width, yaw = min_rect(piece_mm, k)
                top = None if row_tops is None else row_tops[j]
                if parallax and mode == "auto" and cls is not None and len(pieces) == 1:
                    top = fit_top_face(outline_mm, normals, piece_m, nadir, k, cls, yaw)
                if top is not None:
                    centre, used = nadir + (top - nadir) / k, "top_outline"
                    by_area, model = footprint_centre(piece_m, piece_area * k * k, nadir, k, expected, "auto")
                    if model == "silhouette":       # the whole visible part is in the blob: two estimates
                        centre, used = 0.5 * (centre + by_area), "top_outline+silhouette"
                else:
                    centre, used = (piece_m, "none") if not parallax else footprint_centre(
                        piece_m, piece_area * k * k, nadir, k, expected, mode)
                piece_status, piece_reason = status, reason
                if status == "ok" and not points_in_polygon(np.asarray(centre)[None], cell.work_area)[0]:
                    piece_status, piece_reason = "cut_by_edge", "lies across the edge of the work area"
                found.append(DetectedPart("", name, piece_status, piece_reason, piece_uv, (float(centre[0]), float(centre[1])),
                                          float(height), float(piece_area), yaw, length, width, used, de, piece_px))
    found.sort(key=lambda p: (round(p.xy_mm[0], 1), round(p.xy_mm[1], 1)))
    parts = [DetectedPart(f"p{i + 1}", *[getattr(p, f) for f in DetectedPart.__dataclass_fields__ if f != "id"])
             for i, p in enumerate(found)]
    return Detection(parts, illumination, notes)


def _split(sub, ox, oy, mapping, k, expected, ratio, name, whole):
    """Split a blob of about n parts' area by k-means on its pixels; each piece must have a part's size.
    ``whole`` is the blob as one piece, returned when it cannot be split."""
    n = int(round(ratio))
    if n < 2 or abs(ratio - n) > 0.4 * n or n > 6:
        return whole, "too_large", \
            f"{ratio:.1f}x a {name} part's area and not a whole number of parts"
    py, px = np.nonzero(sub)
    uv = np.column_stack([px + ox, py + oy]).astype(float)
    xy = mapping(uv).astype(np.float32)
    crit = (cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_MAX_ITER, 50, 0.01)
    cv2.setRNGSeed(0)
    _, labels, _ = cv2.kmeans(xy, n, None, crit, 4, cv2.KMEANS_PP_CENTERS)
    labels = labels.ravel()
    per_px = (mapping.mm_per_px(uv[:1]) ** 2)[0]
    pieces = []
    for j in range(n):
        sel = labels == j
        area = sel.sum() * per_px / (k * k)
        if not _MIN_RATIO < area / expected < 1.4:
            return whole, "touching", \
                f"{n} touching {name} parts that could not be split into parts of the right size"
        pts_mm = xy[sel].astype(float)
        hull = cv2.convexHull(pts_mm.astype(np.float32)).reshape(-1, 2).astype(float)
        pieces.append((pts_mm.mean(axis=0), hull, mapping.inverse(hull), float(area),
                       (float(uv[sel, 0].mean()), float(uv[sel, 1].mean()))))
    return pieces, "ok", f"split from {n} touching parts"


def _whole(sub, ox, oy, mapping, k):
    """The blob as one piece: (mapped centroid, outline mm, outline px, area / k^2, pixel centroid)."""
    contours, _ = cv2.findContours(sub, cv2.RETR_EXTERNAL, cv2.CHAIN_APPROX_NONE)
    outline = max(contours, key=len).reshape(-1, 2).astype(float) + [ox, oy]
    outline_mm = mapping(outline)
    area, m = polygon_area_centroid(outline_mm)
    py, px = np.nonzero(sub)
    return [(m, outline_mm, outline, area / (k * k), (float(px.mean() + ox), float(py.mean() + oy)))]
