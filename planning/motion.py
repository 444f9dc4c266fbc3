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

__all__ = ["SegmentKind", "Segment", "SampledSegment", "durations_s", "sample_segments"]

_DENSE = 129            # samples along s used to size the duration from joint speeds
_SPEED_MARGIN = 1.01    # stretch a little beyond the joint-speed bound: samples are checked exactly


class SegmentKind(str, Enum):
    TRANSFER = "transfer"   # arc (or straight) at safe height
    DESCEND = "descend"     # straight down to grip or drop height
    RISE = "rise"           # straight up to safe height
    LOWER = "lower"         # straight down to safe height (from a higher start such as home)
    CLOSE = "close"         # dwell while the gripper closes
    OPEN = "open"           # dwell while the gripper opens
    SWING = "swing"         # joint-space move (from or to a pose the Cartesian moves cannot start from)


@dataclass(frozen=True)
class Segment:
    """One piece of a plan: a path (or a dwell at ``hold_mm``), the part it serves, the gripper state."""

    kind: SegmentKind
    path: StraightPath | ArcPath | None
    hold_mm: np.ndarray | None = None
    part_id: str | None = None
    gripper_closed: bool = False
    joints_rad: tuple | None = None      # (start, end), shape (3,) each, for a SWING


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


def durations_s(segments: list[Segment], arm: Arm, scaling: TimeScaling, speed_mm_s: float, dwell_s: float,
                dt_s: float, speed_scale: float = 1.0) -> list[float]:
    """Durations of segments on the sequence clock (whole numbers of sample periods, at least one), with
    one IK call for all: the larger of length x peak s' / speed and the time that keeps every joint under
    its speed limit (from dq/ds on a dense grid, x 1.01); a dwell lasts ``dwell_s``. ``speed_scale`` < 1
    slows every move (tool speed and joint speeds) by that factor, for a first careful run."""
    out = [0.0] * len(segments)
    moving = [i for i, seg in enumerate(segments) if seg.path is not None]
    for i, seg in enumerate(segments):
        if seg.joints_rad is not None:        # joint space: the slowest joint at the scaling's peak rate
            q0, q1 = seg.joints_rad
            need = float(np.max(np.abs(np.asarray(q1) - q0) / (arm.max_speed_rad_s * speed_scale))) * peak_rate(scaling)
            out[i] = _round_up(max(need * _SPEED_MARGIN, dt_s), dt_s)
        elif seg.path is None:
            out[i] = _round_up(dwell_s, dt_s)
    if not moving:
        return out
    s_dense = np.linspace(0.0, 1.0, _DENSE)
    pts = np.concatenate([segments[i].path.points(s_dense) for i in moving])
    q = arm.inverse(pts).joints_rad.reshape(len(moving), _DENSE, 3)
    dq_ds = np.abs(np.gradient(q, s_dense, axis=1))                        # (n, DENSE, 3)
    tau = np.linspace(0.0, 1.0, 2 * _DENSE)
    s_tau, ds_dtau, _ = time_scaling(scaling, tau)
    f = s_tau * (_DENSE - 1)
    i0 = np.minimum(np.floor(f).astype(int), _DENSE - 2)
    w = (f - i0)[None, :, None]
    rate = (dq_ds[:, i0] * (1 - w) + dq_ds[:, i0 + 1] * w) * ds_dtau[None, :, None]
    with np.errstate(invalid="ignore"):
        ratio = rate / arm.max_speed_rad_s[None, None, :]
        need = np.where(np.isfinite(ratio).any(axis=(1, 2)), np.nanmax(np.where(np.isfinite(ratio), ratio, -np.inf),
                                                                       axis=(1, 2)), 0.0)
    for k, i in enumerate(moving):
        t_speed = segments[i].path.length_mm * peak_rate(scaling) / (speed_mm_s * speed_scale)
        out[i] = _round_up(max(t_speed, float(need[k]) / speed_scale * _SPEED_MARGIN, dt_s), dt_s)
    return out


def sample_segments(segments: list[Segment], durations: list[float], arm: Arm, scaling: TimeScaling,
                    dt_s: float) -> list[SampledSegment]:
    """Sample segments on the sequence clock, both ends included (M = duration / dt + 1 samples each),
    with one IK call for all."""
    pts, times, swings = [], [], {}
    counts = [int(round(duration / dt_s)) + 1 for duration in durations]
    # every segment's path parameter from one time-scaling call (the last sample exactly at s = 1)
    tau = np.concatenate([np.arange(c) / (c - 1) if c > 1 else np.ones(1) for c in counts])
    s_all = np.split(time_scaling(scaling, tau)[0], np.cumsum(counts)[:-1])
    for k, (seg, count, sv) in enumerate(zip(segments, counts, s_all)):
        t = np.arange(count) * dt_s
        sv[-1] = 1.0
        if seg.joints_rad is not None:
            q0, q1 = (np.asarray(q, float) for q in seg.joints_rad)
            q = q0 + sv[:, None] * (q1 - q0)
            swings[k] = q
            xyz = arm.forward(q)
        elif seg.path is None:
            xyz = np.repeat(seg.hold_mm[None, :], count, axis=0)
        else:
            xyz = seg.path.points(sv)
        pts.append(xyz)
        times.append(t)
    sol = arm.inverse(np.concatenate(pts))
    out, start = [], 0
    for k, (seg, duration, xyz, t) in enumerate(zip(segments, durations, pts, times)):
        end = start + len(t)
        if k in swings:                       # the joints are given; check them as they are
            q = swings[k]
            out.append(SampledSegment(seg, duration, t, xyz, q, arm.check_joints(q)))
        else:
            out.append(SampledSegment(seg, duration, t, xyz, sol.joints_rad[start:end], sol.reason[start:end]))
        start = end
    return out
