"""Marker geometry on the table: where a laid marker's black square and its paper are, in table mm, and
where a raised marker's stand hides the table from the camera.

Calibration (which corners are which table points, which markers a stand hides), detection (marker
paper masked out of the part search), the cell file's layout check and the renderer all take it from
here.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.vision.polygon import convex_hull, convex_overlap, polygon_area

__all__ = ["marker_paper_corners_mm", "seen_on_table_mm", "stand_outline_mm", "StandOverlap", "stands_in_front"]


def marker_paper_corners_mm(placement, size_mm: float, margin_mm: float = 0.0) -> np.ndarray:
    """Corners (4, 3) in table mm of a marker's black square (margin 0) or its paper, in OpenCV's order
    (top-left, top-right, bottom-right, bottom-left of the marker image; yaw 0: image top toward +x)."""
    h = size_mm / 2 + margin_mm
    local = np.array([[h, h], [h, -h], [-h, -h], [-h, h]])       # (x, y): top edge toward +x, right toward -y
    yaw = np.radians(placement.yaw_deg)
    rot = np.array([[np.cos(yaw), -np.sin(yaw)], [np.sin(yaw), np.cos(yaw)]])
    xy = local @ rot.T + [placement.x, placement.y]
    return np.column_stack([xy, np.full(4, float(placement.z))])


def seen_on_table_mm(xyz_mm, camera_centre_mm) -> np.ndarray:
    """Where points (N, 3) table mm appear on the table plane to a pinhole camera at ``camera_centre_mm``
    (3,): the table point on the same ray, q = C + (P - C) C_z / (C_z - z) (the raised-marker model of
    :mod:`gripsight.vision.calibration`). Points at or above the camera's height raise ``ValueError``."""
    P = np.asarray(xyz_mm, float).reshape(-1, 3)
    C = np.asarray(camera_centre_mm, float).reshape(3)
    if np.any(P[:, 2] >= C[2]):
        raise ValueError(f"camera_centre_mm: the camera (z = {C[2]:g} mm) must be above every point "
                         f"(highest z = {P[:, 2].max():g} mm)")
    k = C[2] / (C[2] - P[:, 2])
    return C[:2] + (P[:, :2] - C[:2]) * k[:, None]


def stand_outline_mm(placement, side_mm: float, camera_centre_mm) -> np.ndarray:
    """The table the stand of a raised marker hides from the camera, as a convex outline (K, 2) in table
    mm: the stand is a box the paper's size (``side_mm``, turned by the marker's yaw) from the table up to
    the marker's z; its image on the table plane is the hull of its foot and its top as seen."""
    top = marker_paper_corners_mm(placement, side_mm)
    foot = top.copy()
    foot[:, 2] = 0.0
    return convex_hull(np.concatenate([foot[:, :2], seen_on_table_mm(top, camera_centre_mm)]))


@dataclass(frozen=True)
class StandOverlap:
    """A table marker behind a raised marker's stand as the camera sees it: the fraction of its black
    square and of its quiet zone (the inner half of its white margin: what its detection reads) that
    the stand's image covers."""

    marker_id: int
    stand_id: int
    square_fraction: float
    zone_fraction: float

    def describe(self) -> str:
        if self.square_fraction > 0:
            return f"its image covers {100 * self.square_fraction:.0f} % of the black square"
        return f"its image covers {100 * self.zone_fraction:.0f} % of the quiet zone around the black square"


def stands_in_front(layout, size_mm: float, margin_mm: float, camera_centre_mm) -> list[StandOverlap]:
    """Every table marker of ``layout`` (id -> placement with x, y, z, yaw_deg) whose black square or
    quiet zone (the inner half of its margin) a raised marker's stand (``size_mm + 2 margin_mm`` square,
    the table up to its z) covers as a camera at ``camera_centre_mm`` (3,) sees them, by marker id."""
    raised = {i: p for i, p in layout.items() if p.z > 0}
    C = np.asarray(camera_centre_mm, float).reshape(3)
    if not raised or not np.all(np.isfinite(C)) or C[2] <= max(p.z for p in raised.values()):
        return []
    stands = {i: stand_outline_mm(p, size_mm + 2 * margin_mm, C) for i, p in raised.items()}
    out = []
    for marker_id in sorted(layout):
        placement = layout[marker_id]
        if placement.z > 0:
            continue
        square = marker_paper_corners_mm(placement, size_mm)[:, :2]
        zone = marker_paper_corners_mm(placement, size_mm, 0.5 * margin_mm)[:, :2]
        for stand_id, outline in stands.items():
            if np.any(outline.min(axis=0) > zone.max(axis=0)) or np.any(outline.max(axis=0) < zone.min(axis=0)):
                continue                                                     # their boxes are apart
            over_zone = polygon_area(convex_overlap(outline, zone))
            if over_zone <= 0:
                continue
            over_square = polygon_area(convex_overlap(outline, square))
            zone_area = polygon_area(zone) - polygon_area(square)
            out.append(StandOverlap(int(marker_id), int(stand_id), over_square / polygon_area(square),
                                    (over_zone - over_square) / zone_area if zone_area > 0 else 0.0))
    return out
