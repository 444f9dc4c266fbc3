"""The moves a pick is made of: straight lines (descents, rises) and arc transfers at safe height about
the arm's base axis (DESIGN.md sec. 8)."""

from __future__ import annotations

import math

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.planning.motion import Segment, SegmentKind
from gripsight.planning.paths import ArcPath, PathGeometryError, StraightPath

__all__ = ["straight_segments", "transfer_segments"]

_MIN_ARC_BULGE_MM = 0.5     # a transfer whose via point is closer than this to the chord is straight
_SAME_POINT_MM = 1e-6


def straight_segments(kind: SegmentKind, p0, p1, part_id, closed: bool) -> list[Segment]:
    """A straight segment from p0 to p1 (table mm); none if they are the same point."""
    if math.dist(p1, p0) < _SAME_POINT_MM:
        return []
    return [Segment(kind, StraightPath(p0, p1), part_id=part_id, gripper_closed=closed)]


def transfer_segments(arm: Arm, p0, p1, part_id, closed: bool) -> list[Segment]:
    """Arc at safe height from p0 to p1 through the point at the mid base angle and mean radius (both
    about the base axis)."""
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    if math.dist(p1, p0) < _SAME_POINT_MM:
        return []
    base = np.asarray(arm.base_xy_mm, float)
    (x0, y0), (x1, y1) = p0[:2] - base, p1[:2] - base
    am, rm = 0.5 * (math.atan2(y0, x0) + math.atan2(y1, x1)), 0.5 * (math.hypot(x0, y0) + math.hypot(x1, y1))
    via = np.array([base[0] + rm * math.cos(am), base[1] + rm * math.sin(am), 0.5 * (p0[2] + p1[2])])
    chord = p1 - p0
    off = via - p0
    bulge = math.hypot(*(off - chord * (off @ chord) / (chord @ chord)))
    if bulge < _MIN_ARC_BULGE_MM:
        return straight_segments(SegmentKind.TRANSFER, p0, p1, part_id, closed)
    try:
        path = ArcPath(p0, via, p1)
    except PathGeometryError:
        return straight_segments(SegmentKind.TRANSFER, p0, p1, part_id, closed)
    return [Segment(SegmentKind.TRANSFER, path, part_id=part_id, gripper_closed=closed)]
