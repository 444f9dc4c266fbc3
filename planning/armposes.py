"""Stops to show the camera: a checked joint sequence that holds the arm still at N poses for photos.

The stops are chosen from a grid over the work area at several heights (every point the arm reaches)
so that a fit (:mod:`planning.armfit`) from photos of the gripper marker at them determines every
parameter well: greedily, each next stop is the candidate that most increases the determinant of the
fit's information matrix ``J^T J`` (D-optimal design, common practice in experiment design; e.g.
Atkinson & Donev, Optimum Experimental Designs, 1992, from memory). The camera is not known yet, so
the Jacobian is taken of the marker's table x, y as an overhead camera sees them.

The sequence: from home, to each stop in nearest-next order (to safe height, an arc at safe height to
above the stop, straight to the stop), a hold there, and back home. Every sample goes through the
planner's checks (:class:`planning.picks.Planner`); a stop whose moves fail a check is dropped and
another is chosen, so only a sequence that passed every check is returned.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.planning.armfit import (ASSUMED_NOISE_PX, ArmErrors, MarkerMount, _jacobian, _residual_fn,
                                       _sigma_limit, _sigmas, grid_in_polygon, parameter_names)
from gripsight.planning.errors import PlanningError
from gripsight.planning.motion import Segment, SegmentKind
from gripsight.planning.pickmoves import straight_segments, transfer_segments
from gripsight.planning.picks import Planner
from gripsight.planning.planresult import Plan

__all__ = ["Stop", "StopSequence", "choose_stops", "plan_stops", "stop_candidates_mm"]

_GRID_STEP_MM = 30.0
_MAX_ROUNDS = 12
_TYPICAL_MM_PER_PX = 0.5       # an overhead camera seeing a 600 mm table on 1280 px (the demo cell's)


@dataclass(frozen=True)
class Stop:
    """One stop: its index (1-based, in the order visited), the sequence time the hold starts and ends,
    the commanded angles (3,) deg, the pulses (3,) us and the tool point (3,) mm."""

    index: int
    start_s: float
    end_s: float
    joints_deg: np.ndarray
    pulses_us: np.ndarray
    tool_mm: np.ndarray

    def as_dict(self) -> dict:
        return {"stop": self.index, "start_s": round(self.start_s, 4), "end_s": round(self.end_s, 4),
                **{f"{n}_deg": round(float(v), 4) for n, v in zip(("base", "shoulder", "elbow"), self.joints_deg)},
                **{f"{n}_us": round(float(v), 1) for n, v in zip(("base", "shoulder", "elbow"), self.pulses_us)},
                **{k: round(float(v), 3) for k, v in zip(("x_mm", "y_mm", "z_mm"), self.tool_mm)}}


@dataclass(frozen=True)
class StopSequence:
    plan: Plan
    stops: list[Stop]
    predicted_sigma: np.ndarray          # (8,) or (10,) 1-sigma of each fit parameter at ASSUMED_NOISE_PX
    dropped: list[str]                   # why candidate stops were left out


def _overhead_xy(points_mm: np.ndarray) -> np.ndarray:
    """An overhead camera's view, up to scale: the table x, y (1 px per mm)."""
    return points_mm[:, :2]


def stop_candidates_mm(work_area, heights_mm, step_mm: float = _GRID_STEP_MM) -> np.ndarray:
    """Candidate tool points (N, 3): a grid over the work area at each height."""
    return grid_in_polygon(work_area, step_mm, heights_mm)


def choose_stops(planner: Planner, candidates_mm: np.ndarray, n: int, mount: MarkerMount,
                 exclude=(), fit_lengths: bool = False) -> np.ndarray:
    """Indices of ``n`` reachable candidates chosen greedily for the largest det(J^T J) of the fit."""
    arm = planner.arm
    sol = arm.inverse(candidates_mm)
    ok = sol.ok.copy()
    ok[list(exclude)] = False
    usable = np.flatnonzero(ok)
    if len(usable) < n:
        raise PlanningError(f"only {len(usable)} points of the work area can be stops; ask for fewer "
                            f"(--stops) or check the work area and heights")
    commanded = sol.joints_deg[usable]
    fn = _residual_fn(arm, mount, commanded, 0.0, _overhead_xy, fit_lengths)
    J = _jacobian(fn, ArmErrors().vector(arm, fit_lengths)).reshape(len(usable), 2, -1)
    info = np.einsum("nip,niq->npq", J, J)                 # each candidate's own J^T J
    scale = np.sqrt(np.diag(info.sum(axis=0)) / len(usable))
    info = info / np.outer(scale, scale)
    total = 1e-6 * np.eye(info.shape[1])
    chosen: list[int] = []
    for _ in range(n):
        _, logdet = np.linalg.slogdet(total[None] + info)
        logdet[chosen] = -np.inf
        k = int(np.argmax(logdet))
        chosen.append(k)
        total = total + info[k]
    return usable[np.array(chosen)]


def _nearest_order(start_mm: np.ndarray, points_mm: np.ndarray) -> list[int]:
    left, here, out = list(range(len(points_mm))), start_mm, []
    while left:
        k = min(left, key=lambda i: float(np.linalg.norm(points_mm[i] - here)))
        out.append(k)
        left.remove(k)
        here = points_mm[k]
    return out


def _segments_to(planner: Planner, here: np.ndarray, stop_mm: np.ndarray, name: str, hold_s: float) -> list[Segment]:
    segs, p = planner._to_safe(here, name, False)
    above = np.array([stop_mm[0], stop_mm[1], planner.safe_z])
    segs += transfer_segments(planner.arm, p, above, name, False)
    kind = SegmentKind.DESCEND if stop_mm[2] < above[2] else SegmentKind.RISE
    segs += straight_segments(kind, above, stop_mm, name, False)
    segs.append(Segment(SegmentKind.HOLD, None, np.asarray(stop_mm, float), name, False, dwell_s=hold_s))
    return segs


def plan_stops(planner: Planner, work_area, mount: MarkerMount, n: int = 16, hold_s: float = 2.0,
               heights_mm=None, fit_lengths: bool = False) -> StopSequence:
    """A checked joint sequence through ``n`` well-chosen stops, each held ``hold_s`` for a photo.

    Parameters
    ----------
    planner : Planner
        The cell's planner (its arm, checks, speeds and ``speed_scale``).
    work_area : array_like, shape (K, 2)
        The table polygon to spread the stops over, mm.
    mount : MarkerMount
        Where the gripper marker sits on the tool.
    n : int
        Number of stops.
    hold_s : float
        How long the arm holds still at each stop.
    heights_mm : sequence of float, optional
        Tool heights to choose from (default four levels from 30 mm to safe height + 50 mm).
    fit_lengths : bool
        Choose the stops for a fit that also finds the link lengths.

    Raises
    ------
    PlanningError
        If not enough stops pass every check, or the chosen stops would not determine every parameter.
    """
    if n < 8:
        raise PlanningError(f"--stops: at least 8 stops are needed to fit 8 parameters, got {n}")
    if heights_mm is None:
        heights_mm = np.linspace(30.0, planner.safe_z + 50.0, 4)
    candidates = stop_candidates_mm(work_area, heights_mm)
    excluded: set[int] = set()
    dropped: list[str] = []
    home = planner.home_mm
    for _ in range(_MAX_ROUNDS):
        picked = choose_stops(planner, candidates, n, mount, excluded, fit_lengths)
        order = [picked[i] for i in _nearest_order(home, candidates[picked])]
        segs, here, bounds = [], home, [0]
        for k, c in enumerate(order):
            segs += _segments_to(planner, here, candidates[c], f"stop{k + 1}", hold_s)
            here = candidates[c]
            bounds.append(len(segs))
        segs += planner._home_segments(here)
        sampled, failure = planner._check_all(segs, 0.0)
        if failure is None:
            break
        k = min(int(np.searchsorted(bounds, failure[0], side="right")) - 1, len(order) - 1)
        excluded.add(int(order[k]))
        p = candidates[order[k]]
        dropped.append(f"({p[0]:.0f}, {p[1]:.0f}, {p[2]:.0f}) mm: {failure[1].describe()}")
    else:
        raise PlanningError(f"no {n} stops pass every check after {_MAX_ROUNDS} tries; last: {dropped[-1]}")
    segments, samples = planner._join(sampled, planner.home_rad, home, 0.0)
    plan = Plan([], [], segments, samples, speed_scale=planner.speed_scale)
    stops = []
    for seg, t0 in segments:
        if seg.segment.kind is SegmentKind.HOLD:
            q = seg.joints_rad[0]
            stops.append(Stop(len(stops) + 1, float(t0), float(t0 + seg.duration_s), np.degrees(q),
                              planner.arm.pulses_us(q[None])[0], seg.xyz_mm[0].copy()))
    commanded = np.array([s.joints_deg for s in stops])
    sigma = _sigmas(_jacobian(_residual_fn(planner.arm, mount, commanded, 0.0, _overhead_xy, fit_lengths),
                              ArmErrors().vector(planner.arm, fit_lengths)), ASSUMED_NOISE_PX * _TYPICAL_MM_PER_PX)
    names = parameter_names(fit_lengths)
    weak = [names[i] for i in range(len(sigma)) if not sigma[i] <= _sigma_limit(names[i])]
    if weak:
        raise PlanningError(f"the stops that pass every check cannot determine {', '.join(weak)}; widen the work "
                            "area or the joint limits")
    return StopSequence(plan, stops, sigma, dropped)
