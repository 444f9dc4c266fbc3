"""Segments of motion, their durations and their samples.

A segment is a tool path (straight or arc) or a dwell (the gripper opens or closes while the arm holds
still). Its duration comes first from the path length and the cell's ``speed_mm_s`` (the peak tool
speed), rounded up to a whole number of sample periods so that every sample of the joint sequence
sits on one uniform clock; a move whose samples ask a joint for more than its ``max_speed_deg_s`` is
then stretched by that ratio and sampled again.
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.planning.paths import ArcPath, PathTerms, StraightPath, TimeScaling, path_points, peak_rate, time_scaling

__all__ = ["SampledChain", "SampledSegment", "Segment", "SegmentKind", "durations_s", "sample_segments", "timed_samples"]

_SPEED_MARGIN = 1.01    # stretch a little beyond the joint-speed ratio: samples are checked exactly


class SegmentKind(str, Enum):
    TRANSFER = "transfer"   # arc (or straight) at safe height
    DESCEND = "descend"     # straight down to grip or drop height
    RISE = "rise"           # straight up to safe height
    LOWER = "lower"         # straight down to safe height (from a higher start such as home)
    CLOSE = "close"         # dwell while the gripper closes
    OPEN = "open"           # dwell while the gripper opens
    SWING = "swing"         # joint-space move (from or to a pose the Cartesian moves cannot start from)
    HOLD = "hold"           # dwell at a stop long enough to take a photo (arm calibration)


@dataclass(frozen=True)
class Segment:
    """One piece of a plan: a path (or a dwell at ``hold_mm``), the part it serves, the gripper state."""

    kind: SegmentKind
    path: StraightPath | ArcPath | None
    hold_mm: np.ndarray | None = None
    part_id: str | None = None
    gripper_closed: bool = False
    joints_rad: tuple | None = None      # (start, end), shape (3,) each, for a SWING
    dwell_s: float | None = None         # a dwell's own length (default: the cell's dwell_s)


@dataclass(frozen=True)
class SampledSegment:
    """A segment sampled on the sequence clock: local times, tool points, joint angles, IK reasons."""

    segment: Segment
    duration_s: float
    t_s: np.ndarray            # (M,) from 0 to duration_s
    xyz_mm: np.ndarray         # (M, 3) table frame
    joints_rad: np.ndarray     # (M, 3)
    reason: np.ndarray         # (M,) Reason codes from IK


def _round_up(duration_s, dt_s: float) -> np.ndarray:
    """Durations rounded up to whole sample periods, at least one (elementwise)."""
    return np.maximum(1, np.ceil(np.asarray(duration_s, float) / dt_s - 1e-9)) * dt_s


def durations_s(segments: list[Segment], arm: Arm, scaling: TimeScaling, speed_mm_s: float, dwell_s: float,
                dt_s: float, speed_scale: float = 1.0) -> list[float]:
    """First durations of segments on the sequence clock (whole numbers of sample periods, at least
    one): a move takes length x peak s' / speed; a joint-space swing keeps its slowest joint at the
    scaling's peak rate under its speed limit; a dwell lasts ``dwell_s``. ``speed_scale`` < 1 slows
    every move (tool speed and joint speeds) by that factor, for a first careful run. A move whose
    joints would be too fast is stretched by :func:`timed_samples`."""
    # one duration per segment: swings from their slowest joint, dwells fixed, moves from their length
    rate, speed = peak_rate(scaling), speed_mm_s * speed_scale
    need = np.array([_swing_s(seg, arm, speed_scale) * rate * _SPEED_MARGIN if seg.joints_rad is not None
                     else (dwell_s if seg.dwell_s is None else seg.dwell_s) if seg.path is None
                     else seg.path.length_mm * rate / speed for seg in segments])
    moving = np.array([seg.path is not None or seg.joints_rad is not None for seg in segments], bool)
    return _round_up(np.where(moving, np.maximum(need, dt_s), need), dt_s).tolist()


def _swing_s(seg: Segment, arm: Arm, speed_scale: float) -> float:
    """A joint-space swing's time at unit peak rate: its largest joint move over that joint's speed."""
    q0, q1 = seg.joints_rad
    return float(np.max(np.abs(np.asarray(q1) - q0) / (arm.max_speed_rad_s * speed_scale)))


@dataclass(frozen=True)
class SampledChain:
    """Consecutive segments sampled on one clock as flat arrays, segment after segment (each segment's
    first sample repeats the previous one's last); :meth:`pieces` gives them one by one."""

    segments: list[Segment]
    durations_s: list[float]
    starts: np.ndarray         # (K + 1,) index of each segment's first sample, then the total M
    t_s: np.ndarray            # (M,) time within its own segment
    xyz_mm: np.ndarray         # (M, 3) table frame
    joints_rad: np.ndarray     # (M, 3)
    reason: np.ndarray         # (M,) Reason codes from IK

    def pieces(self) -> list[SampledSegment]:
        """One :class:`SampledSegment` per segment (views of the flat arrays)."""
        b = self.starts.tolist()
        return [SampledSegment(seg, d, self.t_s[i:j], self.xyz_mm[i:j], self.joints_rad[i:j], self.reason[i:j])
                for seg, d, i, j in zip(self.segments, self.durations_s, b[:-1], b[1:])]


def timed_samples(segments: list[Segment], arm: Arm, scaling: TimeScaling, speed_mm_s: float, dwell_s: float,
                  dt_s: float, speed_scale: float = 1.0, rounds: int = 3) -> SampledChain:
    """Time and sample segments: the durations of :func:`durations_s`, then any move whose samples ask
    a joint for more than its speed limit (x ``speed_scale``) is stretched by that ratio (x 1.01) and
    everything is sampled again, up to ``rounds`` times (the checks reject what is still too fast)."""
    durations = durations_s(segments, arm, scaling, speed_mm_s, dwell_s, dt_s, speed_scale)
    limit = arm.max_speed_rad_s * speed_scale
    moving = np.array([seg.path is not None for seg in segments])
    for _ in range(rounds):
        chain = sample_segments(segments, durations, arm, scaling, dt_s)
        starts = chain.starts[:-1]
        with np.errstate(invalid="ignore"):
            ratio = np.nanmax(np.abs(np.diff(chain.joints_rad, axis=0)) / (dt_s * limit), axis=1, initial=0.0)
        ratio = np.append(np.nan_to_num(ratio), 0.0)
        ratio[starts[1:] - 1] = 0.0                     # the step into the next segment is not a step
        stretch = np.maximum.reduceat(ratio, starts)
        over = moving & (stretch > 1.0)
        if not over.any():
            return chain
        durations = np.where(over, _round_up(np.asarray(durations) * stretch * _SPEED_MARGIN, dt_s), durations).tolist()
    return chain


_ZERO3 = np.zeros(3)


def sample_segments(segments: list[Segment], durations: list[float], arm: Arm, scaling: TimeScaling,
                    dt_s: float) -> SampledChain:
    """Sample segments on the sequence clock, both ends included (M = duration / dt + 1 samples each):
    every path's points from one evaluation of :func:`planning.paths.path_points` with its terms
    repeated per sample, the ends exact, and one IK call for all."""
    counts = np.array([int(round(duration / dt_s)) + 1 for duration in durations])
    bounds = np.concatenate([[0], np.cumsum(counts)])
    first, last = bounds[:-1], bounds[1:] - 1
    seg_of = np.repeat(np.arange(len(segments)), counts)
    local = np.arange(bounds[-1]) - first[seg_of]
    # every segment's path parameter from one time-scaling call (the last sample exactly at s = 1)
    span = np.maximum(counts - 1, 1)[seg_of]
    s = time_scaling(scaling, np.where(counts[seg_of] > 1, local / span, 1.0))[0]
    s[last] = 1.0
    terms, ends, swings = [], [], []
    for k, seg in enumerate(segments):
        if seg.joints_rad is not None:
            swings.append(k)
            terms.append(PathTerms(_ZERO3, _ZERO3, _ZERO3, _ZERO3, 0.0))
            ends.append((_ZERO3, _ZERO3))
        elif seg.path is None:
            terms.append(PathTerms(np.asarray(seg.hold_mm, float), _ZERO3, _ZERO3, _ZERO3, 0.0))
            ends.append((seg.hold_mm, seg.hold_mm))
        else:
            terms.append(seg.path.terms())
            ends.append((seg.path.p0, seg.path.p1))
    # every segment's terms repeated per sample: one evaluation for the whole chain
    per_sample = PathTerms(*(np.array([getattr(t, f) for t in terms])[seg_of]
                             for f in ("c_mm", "d_mm", "e1_mm", "e2_mm", "sweep_rad")))
    xyz = path_points(per_sample, s)
    xyz[first] = [e[0] for e in ends]                 # the ends exact (last wins for one-sample segments)
    xyz[last] = [e[1] for e in ends]
    swung = []
    for k in swings:                                   # joint space: the tool goes where the joints put it
        q0, q1 = (np.asarray(q, float) for q in segments[k].joints_rad)
        rows = slice(first[k], last[k] + 1)
        swung.append((rows, q0 + s[rows, None] * (q1 - q0)))
        xyz[rows] = arm.forward(swung[-1][1])
    sol = arm.inverse(xyz)
    joints, reason = sol.joints_rad, sol.reason
    for rows, q in swung:                      # the joints are given; check them as they are
        joints[rows] = q
        reason[rows] = arm.check_joints(q)
    return SampledChain(list(segments), list(durations), bounds, local * dt_s, xyz, joints, reason)

