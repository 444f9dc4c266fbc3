"""Segments of motion, their durations and their samples.

A segment is a tool path (straight or arc) or a dwell (the gripper opens or closes while the arm holds
still). Its duration comes first from the path length and the cell's ``speed_mm_s`` (the peak tool
speed), then is stretched until every joint stays under its ``max_speed_deg_s``, then rounded up to a
whole number of sample periods so that every sample of the joint sequence sits on one uniform clock.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from enum import Enum

import numpy as np

from planning.arm import Arm
from planning.paths import ArcPath, StraightPath, TimeScaling, peak_rate, time_scaling

__all__ = ["SegmentKind", "Segment", "SampledSegment", "sample_segment", "segment_duration_s"]

_DENSE = 257            # samples along s used to size the duration from joint speeds
_SPEED_MARGIN = 1.01    # stretch a little beyond the joint-speed bound: samples are checked exactly


class SegmentKind(str, Enum):
    TRANSFER = "transfer"   # arc (or straight) at safe height
    DESCEND = "descend"     # straight down to grip or drop height
    RISE = "rise"           # straight up to safe height
    LOWER = "lower"         # straight down to safe height (from a higher start such as home)
    CLOSE = "close"         # dwell while the gripper closes
    OPEN = "open"           # dwell while the gripper opens


@dataclass(frozen=True)
class Segment:
    """One piece of a plan: a path (or a dwell at ``hold_mm``), the part it serves, the gripper state."""

    kind: SegmentKind
    path: StraightPath | ArcPath | None
    hold_mm: np.ndarray | None = None
    part_id: str | None = None
    gripper_closed: bool = False

    @property
    def start_mm(self) -> np.ndarray:
        return self.hold_mm if self.path is None else self.path.p0

    @property
    def end_mm(self) -> np.ndarray:
        return self.hold_mm if self.path is None else self.path.p1


@dataclass(frozen=True)
class SampledSegment:
    """A segment sampled on the sequence clock: local times, tool points, joint angles, IK reasons."""

    segment: Segment
    duration_s: float
    t_s: np.ndarray            # (M,) from 0 to duration_s
    xyz_mm: np.ndarray         # (M, 3) table frame
    joints_rad: np.ndarray     # (M, 3)
    reason: np.ndarray         # (M,) Reason codes from IK


def _round_up(duration_s: float, dt_s: float) -> float:
    return max(1, math.ceil(duration_s / dt_s - 1e-9)) * dt_s


def segment_duration_s(segment: Segment, arm: Arm, scaling: TimeScaling, speed_mm_s: float,
                       dwell_s: float, dt_s: float) -> float:
    """Duration of a segment on the sequence clock (a whole number of sample periods, at least one)."""
    if segment.path is None:
        return _round_up(dwell_s, dt_s)
    path = segment.path
    t_speed = path.length_mm * peak_rate(scaling) / speed_mm_s
    s_dense = np.linspace(0.0, 1.0, _DENSE)
    q = arm.inverse(path.points(s_dense)).joints_rad
    dq_ds = np.gradient(q, s_dense, axis=0)                        # (DENSE, 3) rad per unit s
    tau = np.linspace(0.0, 1.0, 2 * _DENSE)
    s_tau, ds_dtau, _ = time_scaling(scaling, tau)
    rate = np.stack([np.interp(s_tau, s_dense, np.abs(dq_ds[:, j])) for j in range(3)], axis=1)
    rate *= ds_dtau[:, None]                                       # |dq/dtau|, rad per unit tau
    with np.errstate(invalid="ignore"):
        need = np.nanmax(rate / arm.max_speed_rad_s[None, :]) if np.isfinite(rate).any() else 0.0
    t_joint = float(need) * _SPEED_MARGIN
    return _round_up(max(t_speed, t_joint, dt_s), dt_s)


def sample_segment(segment: Segment, arm: Arm, duration_s: float, scaling: TimeScaling,
                   dt_s: float) -> SampledSegment:
    """Sample a segment at the sequence clock, including both ends (M = duration / dt + 1 samples)."""
    n = int(round(duration_s / dt_s))
    t = np.arange(n + 1) * dt_s
    if segment.path is None:
        xyz = np.repeat(segment.hold_mm[None, :], n + 1, axis=0)
    else:
        s, _, _ = time_scaling(scaling, t / duration_s)
        s[-1] = 1.0
        xyz = segment.path.points(s)
    sol = arm.inverse(xyz)
    return SampledSegment(segment, duration_s, t, xyz, sol.joints_rad, sol.reason)

