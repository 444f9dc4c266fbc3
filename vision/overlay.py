"""Pictures drawn over a photo: what the calibration and the drift check saw and decided."""

from __future__ import annotations

import cv2
import numpy as np

from gripsight.vision.calibration import MarkerRole

__all__ = ["calibration_overlay", "detection_overlay", "detection_thumbnail", "drift_overlay", "draw_panel", "draw_path_3d",
           "draw_polyline_mm", "shrink", "table_point_px", "top_centre_px"]

# BGR
_USED = (60, 170, 40)
_SET_ASIDE = (0, 140, 255)
_MOVED = (40, 40, 220)
_TEXT_BG = (30, 30, 30)
_ARROW = (255, 0, 200)


def draw_panel(image, lines: list[str], corner: str = "top-left") -> None:
    """A dark box with white text lines in a corner of the image."""
    font, scale, thick = cv2.FONT_HERSHEY_SIMPLEX, 0.55, 1
    sizes = [cv2.getTextSize(t, font, scale, thick)[0] for t in lines]
    w = max((s[0] for s in sizes), default=0) + 16
    h = 22 * len(lines) + 10
    if corner == "centre":
        x0, y0 = (image.shape[1] - w) // 2, (image.shape[0] - h) // 2
    else:
        x0 = 8 if corner.endswith("left") else image.shape[1] - w - 8
        y0 = 8 if corner.startswith("top") else image.shape[0] - h - 8
    sub = image[y0:y0 + h, x0:x0 + w]
    sub[...] = (0.35 * sub + 0.65 * np.array(_TEXT_BG)).astype(np.uint8)
    for i, t in enumerate(lines):
        cv2.putText(image, t, (x0 + 8, y0 + 22 * (i + 1)), font, scale, (255, 255, 255), thick, cv2.LINE_AA)


def draw_polyline_mm(image, mapping, pts_mm, colour, closed=True, thickness=2, samples_per_edge=20) -> None:
    """Draw a table-frame polyline through the mapping (edges sampled, so lens curvature shows)."""
    pts = np.asarray(pts_mm, float)
    if closed:
        pts = np.vstack([pts, pts[:1]])
    t = np.linspace(0, 1, samples_per_edge)[:, None]
    dense = np.concatenate([a + t * (b - a) for a, b in zip(pts[:-1], pts[1:])])
    uv = mapping.inverse(dense)
    cv2.polylines(image, [np.round(uv * 16).astype(np.int32)], False, colour, thickness, cv2.LINE_AA, shift=4)


def calibration_overlay(image_bgr, cal, cell) -> np.ndarray:
    """Markers (used / set aside / moved) with residual arrows magnified, the work area, and a summary."""
    out = image_bgr.copy()
    used = [m for m in cal.markers if m.used and m.vectors_px is not None]
    longest = max((np.linalg.norm(m.vectors_px, axis=1).max() for m in used), default=0.0)
    gain = float(np.clip(30.0 / max(longest, 1e-6), 1.0, 500.0))
    draw_polyline_mm(out, cal.mapping, cell.work_area, (255, 200, 0), thickness=2)
    for m in cal.markers:
        colour = _USED if m.used else (_MOVED if m.role is MarkerRole.MOVED else _SET_ASIDE)
        pts = np.round(m.corners_px * 16).astype(np.int32)
        cv2.polylines(out, [pts], True, colour, 2, cv2.LINE_AA, shift=4)
        c = m.corners_px.mean(axis=0)
        label = f"{m.id}" + (f" {m.residual_mm:.2f}mm" if m.residual_mm is not None else "")
        if not m.used:
            label += f" ({m.reason.split(':')[0]})"
        cv2.putText(out, label, (int(c[0]) - 30, int(m.corners_px[:, 1].max()) + 18), cv2.FONT_HERSHEY_SIMPLEX,
                    0.45, colour, 1, cv2.LINE_AA)
        if m.vectors_px is not None:
            for p, v in zip(m.corners_px, m.vectors_px):
                tip = p + gain * v
                cv2.arrowedLine(out, tuple(np.round(p).astype(int)), tuple(np.round(tip).astype(int)), _ARROW, 2,
                                cv2.LINE_AA, tipLength=0.25)
    lens = cal.mapping.lens.as_dict()
    lens_text = f"division lambda {lens['lambda']:.4f}" if lens["model"] == "division" else lens["model"]
    draw_panel(out, [
        f"calibration: {cal.verdict}   RMS {cal.rms_mm:.3f} mm ({cal.rms_px:.2f} px), max {cal.max_mm:.3f} mm",
        f"markers used {len(cal.used)} of {len(cal.markers)}   lens: {lens_text}",
        f"camera centre ({cal.camera_centre_mm[0]:.0f}, {cal.camera_centre_mm[1]:.0f}, {cal.camera_centre_mm[2]:.0f}) mm"
        f" from {cal.centre_source.value.replace('_', ' ')}",
        f"magenta arrows: residual x{gain:.0f}; green used, orange set aside, red moved",
    ], corner="centre")
    return out


def drift_overlay(image_bgr, report, stored, cell) -> np.ndarray:
    """The work area as the calibration maps it (yellow) and as this photo's markers map it (cyan)."""
    out = image_bgr.copy()
    draw_polyline_mm(out, stored.mapping, cell.work_area, (0, 220, 255), thickness=2)
    if report.refit is not None:
        draw_polyline_mm(out, report.refit.mapping, cell.work_area, (255, 255, 0), thickness=2)
    for m in report.markers:
        old = stored.marker_corners_px[m.id]
        cv2.polylines(out, [np.round(old * 16).astype(np.int32)], True, (0, 220, 255), 1, cv2.LINE_AA, shift=4)
    grid = "n/a" if report.grid_max_mm is None else f"max {report.grid_max_mm:.2f} mm, mean {report.grid_mean_mm:.2f} mm"
    draw_panel(out, [f"drift: {report.verdict} (tolerance {report.tolerance_mm:g} mm)",
                     f"work-area mapping moved: {grid}",
                     "yellow: calibrated work area and markers; cyan: as seen now"], corner="centre")
    return out


def _class_bgr(cell, name) -> tuple[int, int, int]:
    from gripsight.vision.colour import srgb_from_lab

    cls = cell.parts.get(name)
    if cls is None:
        return (200, 0, 200)
    r, g, b = (np.clip(srgb_from_lab(np.asarray(cls.lab, float)), 0, 1) * 255).astype(int)
    return int(b), int(g), int(r)


def top_centre_px(mapping, camera_centre_mm, xy_mm, height_mm) -> np.ndarray:
    """Where the top-face centre of a part at ``xy_mm`` (footprint centre) of height h shows in the photo."""
    n = np.asarray(camera_centre_mm[:2], float)
    k = camera_centre_mm[2] / (camera_centre_mm[2] - height_mm)
    return mapping.inverse((n + k * (np.asarray(xy_mm, float) - n))[None])[0]


def detection_overlay(image_bgr, detection, mapping, camera_centre_mm, cell) -> np.ndarray:
    """Outlines with class and id, pick points (a cross on the top face's centre), rejected parts in red
    with their reason, the work area."""
    out = image_bgr.copy()
    draw_polyline_mm(out, mapping, cell.work_area, (255, 200, 0), thickness=2)
    counts: dict[str, int] = {}
    for p in detection.parts:
        counts[p.status] = counts.get(p.status, 0) + 1
        ok = p.status == "ok"  # PartStatus.OK (a StrEnum; overlay takes any detection with a status)
        colour = _class_bgr(cell, p.class_name) if ok else _MOVED
        if p.outline_px is not None:
            cv2.polylines(out, [np.round(p.outline_px * 16).astype(np.int32)], True, (255, 255, 255), 3, cv2.LINE_AA, shift=4)
            cv2.polylines(out, [np.round(p.outline_px * 16).astype(np.int32)], True, colour, 2, cv2.LINE_AA, shift=4)
        c = top_centre_px(mapping, camera_centre_mm, p.xy_mm, p.height_mm)
        ci = tuple(np.round(c).astype(int))
        cv2.drawMarker(out, ci, (255, 255, 255), cv2.MARKER_CROSS, 16, 3, cv2.LINE_AA)
        cv2.drawMarker(out, ci, (0, 0, 0), cv2.MARKER_CROSS, 16, 1, cv2.LINE_AA)
        label = f"{p.id} {p.class_name}" + ("" if ok else f": {p.status}")
        if p.status == "unknown_shape":             # its measured size: why it fits no class of its colour
            label += f" {p.length_mm:.0f}x{p.width_mm:.0f} mm"
        pos = (ci[0] + 12, ci[1] - 12)
        cv2.putText(out, label, pos, cv2.FONT_HERSHEY_SIMPLEX, 0.5, (0, 0, 0), 3, cv2.LINE_AA)
        cv2.putText(out, label, pos, cv2.FONT_HERSHEY_SIMPLEX, 0.5, (255, 255, 255) if ok else (80, 80, 255), 1, cv2.LINE_AA)
    summary = ", ".join(f"{n} {s}" for s, n in sorted(counts.items())) or "no parts"
    draw_panel(out, [f"parts: {summary}", "cross: pick point (top face centre); red: rejected, with reason"],
               corner="bottom-left")
    return out


def shrink(image_bgr, width_px: int) -> np.ndarray:
    """The image scaled to ``width_px`` wide (aspect kept), averaging pixels (INTER_AREA); a photo at
    least four times as wide is first averaged by 4 x 4 blocks (a quarter of the pixels for INTER_AREA's
    exact weights, the same look)."""
    h, w = image_bgr.shape[:2]
    size = (width_px, max(1, int(h * width_px / max(w, 1))))
    if w >= 4 * width_px and h >= 8:
        image_bgr = cv2.resize(image_bgr, (w // 4, h // 4), interpolation=cv2.INTER_AREA)
    return cv2.resize(image_bgr, size, interpolation=cv2.INTER_AREA)


def detection_thumbnail(image_bgr, detection, mapping, camera_centre_mm, cell, width_px: int = 240) -> np.ndarray:
    """What :func:`detection_overlay` shows, drawn on the photo shrunk to ``width_px`` (a report's
    thumbnail): the work area, each part's outline and pick point, white (rejected parts red; a part's
    own colour shows inside). No text: it cannot be read at that size (the full overlay has it). Drawn at the
    small size, the lines stay one pixel wide instead of fading out with the photo's pixels, and the
    photo is shrunk before anything is drawn (a tenth of the time of an overlay shrunk)."""
    small = shrink(image_bgr, width_px)
    h, w = image_bgr.shape[:2]
    scale = np.array([small.shape[1] / w, small.shape[0] / h])

    def fixed(uv_px) -> np.ndarray:           # photo pixels -> the thumbnail's, in 1/16 px (pixel centres kept)
        return np.round(((np.asarray(uv_px, float) + 0.5) * scale - 0.5) * 16).astype(np.int32)

    wa = np.vstack([cell.work_area, cell.work_area[:1]]).astype(float)
    t = np.linspace(0, 1, 20)[:, None]
    edge_mm = np.concatenate([a + t * (b - a) for a, b in zip(wa[:-1], wa[1:])])
    cv2.polylines(small, [fixed(mapping.inverse(edge_mm))], False, (255, 200, 0), 1, cv2.LINE_AA, shift=4)
    for p in detection.parts:
        colour = (255, 255, 255) if p.status == "ok" else _MOVED
        if p.outline_px is not None:
            cv2.polylines(small, [fixed(p.outline_px)], True, colour, 1, cv2.LINE_AA, shift=4)
        c = np.round((top_centre_px(mapping, camera_centre_mm, p.xy_mm, p.height_mm) + 0.5) * scale - 0.5).astype(int)
        cv2.drawMarker(small, (int(c[0]), int(c[1])), colour, cv2.MARKER_CROSS, 5, 1)
    return small


def table_point_px(mapping, camera_centre_mm, xyz_mm) -> np.ndarray:
    """Photo pixels (N, 2) of table-frame points (N, 3) at any height: the ray from the camera centre
    through the point meets the table at n + (p - n) C_z / (C_z - z), which the mapping takes to pixels."""
    p = np.asarray(xyz_mm, float).reshape(-1, 3)
    c = np.asarray(camera_centre_mm, float)
    k = c[2] / np.maximum(c[2] - p[:, 2], 1e-3)
    return mapping.inverse(c[:2] + (p[:, :2] - c[:2]) * k[:, None])


def draw_path_3d(image, mapping, camera_centre_mm, xyz_mm, colour, thickness=2) -> None:
    """A polyline of table-frame points at any height, as the camera sees it."""
    if len(xyz_mm) < 2:
        return
    uv = np.round(table_point_px(mapping, camera_centre_mm, xyz_mm) * 16).astype(np.int32)
    # the samples within a quarter pixel of the line through their neighbours left out (Douglas-Peucker):
    # the same picture, and an anti-aliased thick line costs per segment
    uv = cv2.approxPolyDP(uv.reshape(-1, 1, 2), 4, False)
    cv2.polylines(image, [uv], False, colour, thickness, cv2.LINE_AA, shift=4)
