"""What a plan is: per part, planned or rejected (and why); the picks in order; the joint samples on one
clock. Made by :class:`gripsight.planning.picks.Planner`, written out by the app."""

from __future__ import annotations

from dataclasses import dataclass, field
from enum import StrEnum

import numpy as np

from gripsight.planning.checks import Rejection
from gripsight.planning.motion import SampledSegment
from gripsight.planning.targets import PartTarget

__all__ = ["JointSamples", "PartOutcome", "PickStatus", "Plan", "PlannedPick"]


class PickStatus(StrEnum):
    """What became of one part."""

    PLANNED = "planned"
    REJECTED = "rejected"


@dataclass(frozen=True)
class PartOutcome:
    """What became of one part: planned, or rejected with a :class:`Rejection`."""

    part: PartTarget
    status: PickStatus
    bin_name: str | None
    rejection: Rejection | None = None


@dataclass(frozen=True)
class PlannedPick:
    part_id: str
    class_name: str
    bin_name: str
    segments: list[SampledSegment]
    start_s: float

    @property
    def duration_s(self) -> float:
        return float(sum(s.duration_s for s in self.segments))


@dataclass(frozen=True)
class JointSamples:
    """The whole joint sequence on one clock (M samples)."""

    t_s: np.ndarray               # (M,)
    xyz_mm: np.ndarray            # (M, 3)
    joints_rad: np.ndarray        # (M, 3)
    gripper_closed: np.ndarray    # (M,) bool
    segment_index: np.ndarray     # (M,) index into Plan.segments
    segment_kind: list[str]       # per sample
    part_id: list[str]            # per sample ('' for moves that serve no part)


@dataclass
class Plan:
    """A checked plan: outcomes per part, the picks in order, the segments and the samples."""

    parts: list[PartOutcome]
    picks: list[PlannedPick]
    segments: list[tuple[SampledSegment, float]]      # (segment, start time on the clock)
    samples: JointSamples
    warnings: list[str] = field(default_factory=list)
    speed_scale: float = 1.0

    @property
    def cycle_s(self) -> float:
        return float(self.samples.t_s[-1]) if len(self.samples.t_s) else 0.0

    @property
    def end_joints_rad(self) -> np.ndarray:
        return self.samples.joints_rad[-1]
