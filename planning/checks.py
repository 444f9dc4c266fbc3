"""Checks on every sample of a planned segment, each failure a named reason with time and value.

Checks, in priority order at one sample (the earliest failing sample wins): the IK reasons (reach,
linkage assembly, elbow-interior stop, joint limits), floor clearance, keep-out zones, joint speed,
branch consistency. Grip fit is checked per part before any motion is planned (see
:func:`grip_fit_rejection`).
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace
from enum import StrEnum

import numpy as np

from gripsight.planning.angles import wrap_angle
from gripsight.planning.arm import JOINT_NAMES, Arm, Reason
from gripsight.planning.motion import SampledChain, SampledSegment

__all__ = ["Check", "CheckContext", "Rejection", "SampleFailure", "first_failing_sample", "first_failure",
           "first_failing_segment", "grip_fit_rejection", "jaw_width_mm"]


class Check(StrEnum):
    """The check a part failed. Some name a subject too (:attr:`Rejection.subject`)."""

    PHOTO = "photo"                                   # the photo analysis set it aside (subject: its status)
    UNKNOWN_CLASS = "unknown_class"                   # no bin for its class and no reject bin
    BIN_FULL = "bin_full"                             # its bin has no room left
    GRIP_FIT = "grip_fit"                             # too wide for the jaws
    OUT_OF_REACH = "out_of_reach"
    LINKAGE_CANNOT_ASSEMBLE = "linkage_cannot_assemble"
    ELBOW_INTERIOR = "elbow_interior"
    JOINT_LIMIT = "joint_limit"                       # subject: the joint
    FLOOR_CLEARANCE = "floor_clearance"
    KEEP_OUT = "keep_out"                             # subject: the zone
    JOINT_SPEED = "joint_speed"                       # subject: the joint
    BRANCH_FLIP = "branch_flip"
    HELD_PART = "held_part"                           # the carried part would hit the table, a tray floor or an obstacle


_CHECK_OF_REASON = {Reason.OUT_OF_REACH: (Check.OUT_OF_REACH, ""),
                    Reason.LINKAGE_CANNOT_ASSEMBLE: (Check.LINKAGE_CANNOT_ASSEMBLE, ""),
                    Reason.ELBOW_INTERIOR: (Check.ELBOW_INTERIOR, ""),
                    Reason.JOINT_LIMIT_BASE: (Check.JOINT_LIMIT, "base"),
                    Reason.JOINT_LIMIT_SHOULDER: (Check.JOINT_LIMIT, "shoulder"),
                    Reason.JOINT_LIMIT_ELBOW: (Check.JOINT_LIMIT, "elbow")}


@dataclass(frozen=True)
class Rejection:
    """Why a part was not planned: the check, where and when it failed, the value and the limit."""

    check: Check
    detail: str
    segment: str | None = None
    time_s: float | None = None
    value: float | None = None
    limit: float | None = None
    unit: str = ""
    subject: str = ""          # the joint, the keep-out zone, or the photo analysis's status

    @property
    def label(self) -> str:
        """The reason as written in outputs: ``keep_out:feeder``, ``joint_speed:base``, ``cut_by_edge``."""
        if self.check is Check.PHOTO:
            return self.subject or self.check.value
        return f"{self.check.value}:{self.subject}" if self.subject else self.check.value

    def at(self, segment: str | None, time_s: float | None) -> "Rejection":
        """The same rejection, placed in a segment at a sequence time."""
        return replace(self, segment=segment, time_s=time_s)

    def describe(self) -> str:
        when = f" ({self.segment} at t={self.time_s:.2f} s)" if self.segment is not None and self.time_s is not None else ""
        return f"{self.label}: {self.detail}{when}"

    def as_dict(self) -> dict:
        return {"check": self.label, "detail": self.detail, "segment": self.segment,
                "time_s": None if self.time_s is None else round(self.time_s, 4),
                "value": None if self.value is None else round(float(self.value), 4),
                "limit": None if self.limit is None else round(float(self.limit), 4), "unit": self.unit}


@dataclass(frozen=True)
class CheckContext:
    """What the sample checks need from the cell."""

    arm: Arm
    floor_clearance_mm: float
    keep_out: tuple = ()
    dt_s: float = 0.02
    reach_spans: dict = field(default_factory=dict, compare=False, repr=False)   # height -> RadialReach


_LINK_NAMES = ("upper arm", "forearm", "tool")


def _arm_points(arm: Arm, joints_rad: np.ndarray, tool_mm: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Shoulder, elbow, wrist and tool points as x, y, z arrays of shape (M, 4): link k runs from
    column k to column k + 1 (upper arm, forearm, tool)."""
    r, z_chain = arm.chain_rz_mm(joints_rad)
    base = joints_rad[:, 0]
    x, y, z = np.empty((len(base), 4)), np.empty((len(base), 4)), np.empty((len(base), 4))
    np.multiply(r, np.cos(base)[:, None], out=x[:, :3])
    np.multiply(r, np.sin(base)[:, None], out=y[:, :3])
    if arm.base_xy_mm != (0.0, 0.0):            # the base axis away from the table origin
        x[:, :3] += arm.base_xy_mm[0]
        y[:, :3] += arm.base_xy_mm[1]
    z[:, :3] = z_chain
    x[:, 3], y[:, 3], z[:, 3] = tool_mm[:, 0], tool_mm[:, 1], tool_mm[:, 2]
    return x, y, z


def _slab(a: np.ndarray, d: np.ndarray, lo: float, hi: float) -> tuple[np.ndarray, np.ndarray]:
    """The open interval of t where lo < a + t d < hi (elementwise; empty as (inf, -inf))."""
    with np.errstate(divide="ignore", invalid="ignore"):
        t0, t1 = (lo - a) / d, (hi - a) / d
    still = d == 0.0
    inside = (a > lo) & (a < hi)
    enter = np.where(still, np.where(inside, -np.inf, np.inf), np.minimum(t0, t1))
    leave = np.where(still, np.where(inside, np.inf, -np.inf), np.maximum(t0, t1))
    return enter, leave


def _zone_bounds(zone) -> tuple[tuple, tuple]:
    """A keep-out zone's bounding box (low corner, high corner), mm."""
    if zone.shape == "cylinder":
        r = zone.radius_mm
        return (zone.x - r, zone.y - r, -np.inf), (zone.x + r, zone.y + r, zone.top_mm)
    return tuple(zone.min_mm), tuple(zone.max_mm)


def _may_enter(zone, pts) -> bool:
    """False when the box around every link point misses the zone's box (most zones, most plans)."""
    lo, hi = _zone_bounds(zone)
    return all(float(c.max()) > a and float(c.min()) < b for c, a, b in zip(pts, lo, hi))


def _zone_entry(zone, pts) -> tuple[np.ndarray, np.ndarray]:
    """Where each link (M, 3) first lies inside a keep-out zone: a mask and the link parameter t in
    [0, 1] of the entry point. Exact for straight links (slab and circle intersections), so a zone
    thinner than any spacing of test points is still found."""
    a = [c[:, :-1] for c in pts]
    d = [c[:, 1:] - c[:, :-1] for c in pts]
    if zone.shape == "cylinder":
        ax, ay = a[0] - zone.x, a[1] - zone.y
        qa = d[0] * d[0] + d[1] * d[1]
        qb = ax * d[0] + ay * d[1]
        qc = ax * ax + ay * ay - zone.radius_mm ** 2
        with np.errstate(divide="ignore", invalid="ignore"):
            root = np.sqrt(qb * qb - qa * qc)
            t0, t1 = (-qb - root) / qa, (-qb + root) / qa
        still = qa == 0.0
        enter = np.where(still, np.where(qc < 0.0, -np.inf, np.inf), np.nan_to_num(t0, nan=np.inf))
        leave = np.where(still, np.where(qc < 0.0, np.inf, -np.inf), np.nan_to_num(t1, nan=-np.inf))
        z_enter, z_leave = _slab(a[2], d[2], -np.inf, zone.top_mm)
        enter, leave = np.maximum(enter, z_enter), np.minimum(leave, z_leave)
    else:
        enter, leave = np.full(a[0].shape, -np.inf), np.full(a[0].shape, np.inf)
        for ac, dc, lo, hi in zip(a, d, zone.min_mm, zone.max_mm):
            e, l_ = _slab(ac, dc, lo, hi)
            enter, leave = np.maximum(enter, e), np.minimum(leave, l_)
    enter, leave = np.maximum(enter, 0.0), np.minimum(leave, 1.0)
    return enter < leave, enter


def _deg(x) -> float:
    """Degrees for a report, rounded off the radian round trip (240 deg, not 239.99999999999997)."""
    return float(np.round(np.degrees(x), 9))


def _reach_at(ctx: CheckContext, z_mm: float):
    """The reachable radii at one height (for the out-of-reach report), remembered per check context:
    the parts of one class are all gripped at one height."""
    if z_mm not in ctx.reach_spans:
        from gripsight.planning.reach import radial_reach

        ctx.reach_spans[z_mm] = radial_reach(ctx.arm, z_mm, step_mm=0.5)
    return ctx.reach_spans[z_mm]


def _ik_rejection(ctx: CheckContext, xyz_mm: np.ndarray, joints_rad: np.ndarray, code: int) -> Rejection:
    """Why IK refused one sample (its tool point (3,) and joints (3,))."""
    arm = ctx.arm
    x, y, z = xyz_mm
    reason = Reason(code)
    check, subject = _CHECK_OF_REASON[reason]
    q = np.degrees(joints_rad)
    if reason is Reason.OUT_OF_REACH:
        rr = _reach_at(ctx, float(z))
        span = "nothing" if rr.r_min_mm is None else f"{rr.r_min_mm:.1f}-{rr.r_max_mm:.1f} mm"
        r = float(np.hypot(x - arm.base_xy_mm[0], y - arm.base_xy_mm[1]))
        return Rejection(check, f"tool at r={r:.1f} mm, z={z:.1f} mm; reachable r at that height: {span}",
                         value=r, limit=rr.r_max_mm, unit="mm")
    if reason is Reason.LINKAGE_CANNOT_ASSEMBLE:
        return Rejection(check, f"the elbow four-bar cannot close at ({x:.1f}, {y:.1f}, {z:.1f}) mm")
    if reason is Reason.ELBOW_INTERIOR:
        lo, hi = (_deg(v) for v in arm.elbow_interior_rad)
        interior = float(np.degrees(arm.elbow_interior_angle_rad(joints_rad[1], arm.forearm_rad(
            joints_rad[1:2], joints_rad[2:3]))[0]))
        limit = lo if interior < lo else hi
        side = "<" if interior < lo else ">"
        return Rejection(check, f"elbow interior angle {interior:.1f} deg {side} {limit:g} deg",
                         value=interior, limit=limit, unit="deg")
    j = {Reason.JOINT_LIMIT_BASE: 0, Reason.JOINT_LIMIT_SHOULDER: 1, Reason.JOINT_LIMIT_ELBOW: 2}[reason]
    lo, hi = (_deg(v) for v in arm.limits_rad[j])
    value = float(q[j])
    limit, side, word = (lo, "<", "min") if value < lo else (hi, ">", "max")
    return Rejection(check, f"{JOINT_NAMES[j]} {value:.1f} deg {side} {word} {limit:g} deg",
                     value=value, limit=limit, unit="deg", subject=subject)


def first_failing_segment(ctx: CheckContext, chain: SampledChain,
                          t0_s: float = 0.0) -> tuple[int, Rejection] | None:
    """The index of the first segment of a sampled chain with a failing sample and that sample's
    :class:`Rejection` (one :func:`first_failing_sample` over all its samples at once); None if every
    sample passes."""
    if not chain.segments:
        return None
    counts = np.diff(chain.starts)
    segment_of_sample = np.repeat(np.arange(len(chain.segments)), counts)
    swing = np.repeat([s.kind.value == "swing" for s in chain.segments], counts)
    steps = np.diff(chain.t_s)
    steps[chain.starts[1:-1] - 1] = 0.0                 # a segment's first sample repeats the last one's
    failure = first_failing_sample(ctx, chain.xyz_mm, chain.joints_rad, chain.reason, dt_steps=steps,
                                   flip_allowed=swing[1:] | swing[:-1])
    if failure is None:
        return None
    k = int(segment_of_sample[failure.index])
    seg_t0_s = t0_s + float(sum(chain.durations_s[:k]))
    return k, failure.rejection.at(chain.segments[k].kind.value, seg_t0_s + float(chain.t_s[failure.index]))


@dataclass(frozen=True)
class SampleFailure:
    """The first failing sample of a run of samples: its index and why (no segment or time yet)."""

    index: int
    rejection: Rejection


def first_failure(ctx: CheckContext, s: SampledSegment, t0_s: float = 0.0) -> Rejection | None:
    """The earliest failing sample of one sampled segment, as a :class:`Rejection` placed in the segment
    at its sequence time (``t0_s`` is the time of the segment's first sample); None if all pass.

    The segment's first sample is the previous segment's last, so joint speed is checked across the joint.
    """
    failure = first_failing_sample(ctx, s.xyz_mm, s.joints_rad, s.reason)
    if failure is None:
        return None
    return failure.rejection.at(s.segment.kind.value, t0_s + float(s.t_s[failure.index]))


def first_failing_sample(ctx: CheckContext, xyz_mm: np.ndarray, joints_rad: np.ndarray, reason: np.ndarray,
                         dt_steps=None, flip_allowed=None, timed: bool = True) -> SampleFailure | None:
    """The earliest failing sample of M samples and its :class:`Rejection`; None if all pass.

    Parameters
    ----------
    ctx : CheckContext
    xyz_mm : ndarray, shape (M, 3)
        Tool points, table frame.
    joints_rad : ndarray, shape (M, 3)
        Joint angles from IK.
    reason : ndarray, shape (M,)
        IK's :class:`~gripsight.planning.arm.Reason` codes.
    dt_steps : ndarray, shape (M - 1,), optional
        Time between consecutive samples (default the clock period; 0 where a sample repeats).
    flip_allowed : ndarray of bool, shape (M - 1,), optional
        Steps where the elbow may change branch (joint-space swings).
    timed : bool
        False for separate points that are not a motion (the planner's probes): joint speed and branch
        changes between them are not checked.
    """
    arm = ctx.arm
    m = len(reason)
    found: list[tuple[int, int, object]] = []   # (sample, priority, make-rejection)

    bad_ik = np.flatnonzero(reason != Reason.OK)
    if bad_ik.size:
        i = int(bad_ik[0])
        found.append((i, 0, lambda i=i: _ik_rejection(ctx, xyz_mm[i], joints_rad[i], int(reason[i]))))
    valid = reason == Reason.OK
    all_valid = not bad_ik.size
    if valid.any():
        # samples IK refused take a harmless pose (no NaN may reach the bounds of _may_enter)
        if all_valid:
            pts = _arm_points(arm, joints_rad, xyz_mm)
        else:
            q = np.where(valid[:, None], joints_rad, 0.0)
            pts = _arm_points(arm, q, np.where(valid[:, None], xyz_mm, 0.0))
        # a straight link's lowest point is one of its ends
        z = pts[2]
        low = np.minimum(z[:, :-1], z[:, 1:])
        if not all_valid:
            low[~valid] = np.inf
        floor = low < ctx.floor_clearance_mm - 1e-9
        if floor.any():
            i, k = np.argwhere(floor)[0]
            z = float(low[i, k])
            found.append((int(i), 1, lambda z=z, n=_LINK_NAMES[k]: Rejection(
                Check.FLOOR_CLEARANCE, f"{n} at z={z:.1f} mm < {ctx.floor_clearance_mm:g} mm above the table",
                value=z, limit=ctx.floor_clearance_mm, unit="mm")))
        for zone in (z for z in ctx.keep_out if _may_enter(z, pts)):
            inside, enter = _zone_entry(zone, pts)
            if not all_valid:
                inside &= valid[:, None]
            if inside.any():
                i, k = np.argwhere(inside)[0]
                p = [c[i, k] + enter[i, k] * (c[i, k + 1] - c[i, k]) for c in pts]
                found.append((int(i), 2, lambda zone=zone, n=_LINK_NAMES[k], p=p: Rejection(
                    Check.KEEP_OUT, f"{n} enters zone '{zone.name}' at ({p[0]:.1f}, {p[1]:.1f}, {p[2]:.1f}) mm",
                    subject=zone.name)))
    # separate points (the planner's probes) skip both the speed and the branch checks
    one_branch = timed and m > 1 and (flip_allowed is None or not bool(np.all(flip_allowed)))
    timed = timed and m > 1 and (dt_steps is None or bool(np.any(np.asarray(dt_steps) > 0)))
    step_rad = np.diff(joints_rad, axis=0) if timed or one_branch else None
    if timed:
        step = ctx.dt_s if dt_steps is None else np.where(np.asarray(dt_steps) > 0, dt_steps, np.inf)[:, None]
        dq = np.abs(step_rad) / step                                            # (M-1, 3) rad/s
        over = (dq > arm.max_speed_rad_s[None, :] * (1 + 1e-9)) & valid[1:, None] & valid[:-1, None]
        if over.any():
            i, j = np.argwhere(over)[0]
            v, lim = _deg(dq[i, j]), _deg(arm.max_speed_rad_s[j])
            found.append((int(i) + 1, 3, lambda j=j, v=v, lim=lim: Rejection(
                Check.JOINT_SPEED, f"{JOINT_NAMES[j]} {v:.1f} deg/s > {lim:g} deg/s",
                value=v, limit=lim, unit="deg/s", subject=JOINT_NAMES[j])))
    if one_branch:
        psi = arm.forearm_rad(joints_rad[:, 1], joints_rad[:, 2])
        bend = np.sign(wrap_angle(psi - joints_rad[:, 1]))
        # a step over 90 deg once wrapped is one over 90 deg before: wrap only those
        big = np.abs(step_rad) > np.pi / 2
        jump = (big & (np.abs(wrap_angle(step_rad)) > np.pi / 2)).any(axis=1) if big.any() else np.zeros(m - 1, bool)
        flip = ((bend[1:] != bend[:-1]) & (bend[1:] != 0) & (bend[:-1] != 0) | jump) & valid[1:] & valid[:-1]
        if flip_allowed is not None:          # a swing changes branch on purpose
            flip &= ~np.asarray(flip_allowed, bool)
        if flip.any():
            i = int(np.flatnonzero(flip)[0]) + 1
            found.append((i, 4, lambda: Rejection(Check.BRANCH_FLIP, "the elbow would change branch inside one move")))
    if not found:
        return None
    i, _, make = min(found, key=lambda f: (f[0], f[1]))
    return SampleFailure(int(i), make())


def jaw_width_mm(part, base_rad: float, jaw: str) -> float:
    """Width of a part's footprint across the jaws at a given base angle.

    The jaws close along the tangential direction (perpendicular to the arm's radial line) for
    ``jaw: tangential`` and along the radial line for ``jaw: radial``. A rectangle of length L along
    yaw and width W has extent |L (d . u)| + |W (d . v)| along a unit direction d; a cylinder its
    diameter.
    """
    if part.round:
        return float(part.width_mm)
    d = (np.array([-np.sin(base_rad), np.cos(base_rad)]) if jaw == "tangential"
         else np.array([np.cos(base_rad), np.sin(base_rad)]))
    yaw = np.radians(part.yaw_deg)
    u = np.array([np.cos(yaw), np.sin(yaw)])
    v = np.array([-np.sin(yaw), np.cos(yaw)])
    return float(abs(part.length_mm * d @ u) + abs(part.width_mm * d @ v))


def grip_fit_rejection(part, gripper) -> Rejection | None:
    """Part width across the jaws must be <= opening - margin (``gripper`` from the cell file)."""
    base = float(np.arctan2(part.xy_mm[1], part.xy_mm[0]))
    width = jaw_width_mm(part, base, gripper.jaw)
    limit = gripper.max_opening_mm - gripper.margin_mm
    if width <= limit + 1e-9:
        return None
    return Rejection(Check.GRIP_FIT, f"{width:.1f} mm across the jaws > {limit:g} mm "
                     f"(opening {gripper.max_opening_mm:g} - margin {gripper.margin_mm:g})",
                     segment="close", value=width, limit=limit, unit="mm")
