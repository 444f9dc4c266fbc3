"""Pick-and-place sequences: order the parts, build each pick's segments, check every sample.

A pick, from wherever the tool is (DESIGN.md sec. 8)::

    [lower/rise to safe height] -> transfer (arc at safe height via the mid base angle) to above the
    part -> descend to grip height -> close (dwell) -> rise -> transfer to above the part's bin ->
    descend to drop height -> open (dwell) -> rise

Every sample of every segment goes through :func:`planning.checks.first_failure`. A part whose pick
fails any check is rejected with that check's reason, segment, time and value; the arm does not move
for it and the plan goes on with the next part. Only checked samples ever reach the joint sequence.
The remaining picks and the way home are chained as if all pass and timed, sampled and checked in
one pass; after a failure the picks behind it are chained again from where the last kept pick ends.
"""

from __future__ import annotations

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.planning.cellcheck import cell_problems
from gripsight.planning.checks import (Check, CheckContext, Rejection, first_failing_sample, first_failing_segment,
                                       grip_fit_rejection)
from gripsight.planning.errors import CellProblems
from gripsight.planning.held import (PickHeights, footprint_outline_mm, part_obstacle, pick_heights,
                                     static_obstacles)
from gripsight.planning.heldcheck import HeldSpec, ObstacleSet, held_part_failure, touching_parts
from gripsight.planning.motion import SampledSegment, Segment, SegmentKind, timed_samples
from gripsight.planning.ordering import order_nearest_two_opt
from gripsight.planning.pickmoves import straight_segments, transfer_segments
from gripsight.planning.paths import TimeScaling
from gripsight.planning.planresult import JointSamples, PartOutcome, PickStatus, Plan, PlannedPick
from gripsight.planning.targets import PartTarget

__all__ = ["Planner"]



class Planner:
    """Plans pick-and-place sequences for one cell.

    Raises
    ------
    CellProblems
        At construction, if a bin cannot be reached at drop or safe height, or the home pose is not
        the pose IK gives for its own tool point (the sequence would jump at the start).
    """

    def __init__(self, cell, arm: Arm | None = None, speed_scale: float = 1.0):
        if not 0.01 <= speed_scale <= 1.0:
            raise ValueError(f"speed_scale: expected 0.01-1, got {speed_scale}")
        self.cell = cell
        self.arm = arm or Arm.from_config(cell.arm)
        self.speed_scale = float(speed_scale)
        m = cell.motion
        self.safe_z = m.safe_z_mm
        self.dt_s = 1.0 / m.sample_hz
        self.scaling = TimeScaling(m.time_scaling)
        self.ctx = CheckContext(self.arm, m.floor_clearance_mm, tuple(cell.keep_out), self.dt_s)
        self.home_rad = np.radians([m.home_deg.base, m.home_deg.shoulder, m.home_deg.elbow])
        self.home_mm = self.arm.forward(self.home_rad[None])[0]
        self._ik_poses: dict[tuple, bool] = {}
        self._raised_ends: dict[tuple, bool] = {}      # pick ends above safe height (over a released tall part)
        self._obstacles = static_obstacles(cell)
        self._table: dict[str, PartTarget] = {}        # parts still on the table (for the held-part check)
        self._set_table([])
        self._check_cell()

    # ------------------------------------------------------------ cell-level checks
    def _check_cell(self) -> None:
        problems = cell_problems(self.cell, self.arm)
        if problems:
            raise CellProblems(self.cell.source_path or "<cell>", problems)

    # ------------------------------------------------------------ segment builders
    def _to_safe(self, p0, part_id, closed) -> tuple[list[Segment], np.ndarray]:
        if p0[2] > self.safe_z + 1e-9 and self._raised_ends.get(tuple(np.round(p0, 9))):
            # above a tall part just released into its tray: never lower onto it; the transfer descends
            return [], np.asarray(p0, float)
        p_safe = np.array([p0[0], p0[1], self.safe_z])
        kind = SegmentKind.RISE if p_safe[2] > p0[2] else SegmentKind.LOWER
        return straight_segments(kind, p0, p_safe, part_id, closed), p_safe

    def heights_for(self, part: PartTarget, tallest_other_mm: float = 0.0) -> PickHeights:
        """The tool heights of a pick of ``part`` (:func:`planning.held.pick_heights`): approach, grip,
        carry and release, raised where the held part needs it."""
        return pick_heights(self.cell, part.height_mm, self.bin_for(part), tallest_other_mm)

    def pick_end_mm(self, part: PartTarget, heights: PickHeights | None = None) -> np.ndarray:
        """Where a pick leaves the tool: above its tray at safe height, or above the released part's top."""
        b = self.cell.bins[self.bin_for(part)]
        top = b.z + part.height_mm + self.cell.motion.floor_clearance_mm
        return np.array([b.x, b.y, max(self.safe_z, top)])

    def pick_segments(self, part: PartTarget, bin_name: str, start_mm: np.ndarray,
                      heights: PickHeights | None = None) -> list[Segment]:
        """The segments of one pick from tool point ``start_mm`` (gripper open at the start), at the
        heights of :meth:`heights_for` (default: no other part on the table)."""
        x, y = part.xy_mm
        h = heights or pick_heights(self.cell, part.height_mm, bin_name, 0.0)
        grip_z, carry_z, drop_z = h.grip_z_mm, h.carry_z_mm, h.release_z_mm
        b = self.cell.bins[bin_name]
        pid = part.id
        segs, p = self._to_safe(start_mm, pid, False)
        above_part = np.array([x, y, h.approach_z_mm])
        lifted = np.array([x, y, carry_z])
        above_bin = np.array([b.x, b.y, carry_z])
        end = self.pick_end_mm(part, h)
        segs += transfer_segments(self.arm, p, above_part, pid, False)
        segs += straight_segments(SegmentKind.DESCEND, above_part, [x, y, grip_z], pid, False)
        segs.append(Segment(SegmentKind.CLOSE, None, np.array([x, y, grip_z]), pid, True))
        segs += straight_segments(SegmentKind.RISE, [x, y, grip_z], lifted, pid, True)
        segs += transfer_segments(self.arm, lifted, above_bin, pid, True)
        segs += straight_segments(SegmentKind.DESCEND, above_bin, [b.x, b.y, drop_z], pid, True)
        segs.append(Segment(SegmentKind.OPEN, None, np.array([b.x, b.y, drop_z]), pid, False))
        segs += straight_segments(SegmentKind.RISE, [b.x, b.y, drop_z], end, pid, False)
        if end[2] > self.safe_z + 1e-9:
            self._raised_ends[tuple(np.round(end, 9))] = True
        for seg in segs:        # a descent descends, a rise rises (a bug otherwise, never a motion)
            if seg.path is not None and seg.kind in (SegmentKind.DESCEND, SegmentKind.RISE, SegmentKind.LOWER):
                dz = seg.path.p1[2] - seg.path.p0[2]
                if (dz > 0) != (seg.kind is SegmentKind.RISE):
                    raise AssertionError(f"internal: a {seg.kind.value} segment of part {pid} moves z by {dz:+.1f} mm")
        return segs

    def _ik_pose(self, q) -> bool:
        """True if IK gives back these joints for their own tool point (Cartesian moves can start here);
        remembered per pose (a run asks it of the home pose for every photo)."""
        q = np.asarray(q, float)
        key = tuple(q.tolist())
        if key not in self._ik_poses:
            sol = self.arm.inverse(self.arm.forward(q[None]))
            self._ik_poses[key] = bool(sol.ok[0]) and float(np.abs(sol.joints_rad[0] - q).max()) < 1e-6
        return self._ik_poses[key]

    def _swing_to_safe(self, q0, part_id) -> tuple[list[Segment], np.ndarray] | None:
        """A joint-space swing from ``q0`` to the IK pose above its tool point at safe height."""
        p = self.arm.forward(np.asarray(q0, float)[None])[0]
        target = np.array([p[0], p[1], self.safe_z])
        sol = self.arm.inverse(target[None])
        if not sol.ok[0]:
            return None
        seg = Segment(SegmentKind.SWING, None, part_id=part_id, joints_rad=(np.asarray(q0, float), sol.joints_rad[0]))
        return [seg], target

    def _check_all(self, segments: list[Segment], t0_s: float) -> tuple[list[SampledSegment], tuple | None]:
        """Time, sample and check consecutive segments together (one IK call for each stage); the
        failure is (index of the first failing segment, its Rejection), or None."""
        m = self.cell.motion
        chain = timed_samples(segments, self.arm, self.scaling, m.speed_mm_s, m.dwell_s, self.dt_s, self.speed_scale)
        link = first_failing_segment(self.ctx, chain, t0_s)
        held = held_part_failure(chain, self._held_specs(segments), t0_s)
        failures = [f for f in (link, held) if f is not None]
        failure = min(failures, key=lambda f: (f[0], f[1].time_s if f[1].time_s is not None else -1.0)) if failures else None
        return chain.pieces(), failure

    def _held_specs(self, segments: list[Segment]) -> list[HeldSpec | None]:
        """Per segment, what the gripper holds and what it must clear: the part of a closed-gripper
        move (not the close dwell, where it still stands), the floor under it, the obstacles (static
        ones and the parts still on the table: those of picks earlier in the chain are gone)."""
        m = self.cell.motion
        clearance = m.floor_clearance_mm
        carry_floor = clearance + max([0.0] + [b.z for b in self.cell.bins.values()])
        obstacles, index = self._obstacle_set, self._obstacle_index
        present = np.zeros(len(obstacles), bool)            # static ones, and the parts still on the table
        present[:len(self._obstacles)] = True
        present[[index[pid] for pid in self._table if pid in index]] = True
        current, specs, prev, mask = None, [], None, None
        for seg in segments:
            if seg.part_id != current:
                if current is not None and current in index:
                    present[index[current]] = False             # picked earlier in the chain: gone
                current, mask = seg.part_id, None
            part = self._table.get(seg.part_id) if seg.part_id is not None else None
            if part is None or not seg.gripper_closed or seg.kind is SegmentKind.CLOSE:
                specs.append(None)
                prev = seg
                continue
            if prev is not None and prev.kind is SegmentKind.CLOSE:
                floor = None                                            # the lift off its own place
            elif seg.kind is SegmentKind.DESCEND:
                floor = self.cell.bins[self.bin_for(part)].z + clearance
            else:
                floor = carry_floor
            if mask is None:
                mask = present.copy()
                mask[index[part.id]] = False
            # the rise off its place (straight up) cannot hit the parts it stands against (heldcheck.touching_parts)
            seg_mask = mask & ~self._touching[part.id] if floor is None else mask
            base = float(np.arctan2(part.xy_mm[1], part.xy_mm[0]))
            specs.append(HeldSpec(part, part.height_mm - m.grip_depth_mm, m.grip_depth_mm, base, floor,
                                  self._outlines[part.id], obstacles, seg_mask))
            prev = seg
        return specs

    def _set_table(self, parts: list[PartTarget]) -> None:
        """The parts on the table at the start of a plan, with what the held-part check needs of them once
        per plan: their footprints around their centres, and every obstacle stacked (static ones, then
        the parts: ``_obstacle_set``, each part's index in it: ``_obstacle_index``)."""
        self._table = {p.id: p for p in parts}
        clearance = self.cell.motion.floor_clearance_mm
        self._outlines = {pid: footprint_outline_mm(p.length_mm, p.width_mm, p.yaw_deg, p.round)
                          for pid, p in self._table.items()}
        n_static = len(self._obstacles)
        self._obstacle_set = ObstacleSet.of(self._obstacles + [part_obstacle(p, clearance) for p in self._table.values()])
        self._obstacle_index = {pid: n_static + j for j, pid in enumerate(self._table)}
        touching = touching_parts(list(self._table.values()))
        self._touching = {}
        for j, pid in enumerate(self._table):
            self._touching[pid] = np.zeros(len(self._obstacle_set), bool)
            self._touching[pid][n_static:] = touching[j]

    def _above_bin(self, bin_name: str) -> np.ndarray:
        """Above a bin at safe height: where every pick into it leaves the tool."""
        b = self.cell.bins[bin_name]
        return np.array([b.x, b.y, self.safe_z])

    # ------------------------------------------------------------ the plan
    def bin_for(self, part: PartTarget) -> str | None:
        if part.known_class and part.class_name in self.cell.bins:
            return part.class_name
        return "reject" if "reject" in self.cell.bins else None

    def plan(self, parts: list[PartTarget], order: str = "nearest", start_joints_rad=None,
             end_at_home: bool = True, t0_s: float = 0.0, bin_room: dict[str, int] | None = None) -> Plan:
        """Plan every part; rejected parts carry their reason, the rest form one checked sequence.

        Parameters
        ----------
        parts : list of PartTarget
        order : {'nearest', 'detected'}
            Nearest-next from the tool's position with a 2-opt pass, or the given order.
        start_joints_rad : ndarray, shape (3,), optional
            Where the arm is (default: the home pose).
        end_at_home : bool
            Finish with a move back to the home pose.
        t0_s : float
            Clock time of the first sample (for runs that continue a previous plan).
        bin_room : dict of str to int, optional
            Places left per bin (bins with a capacity): parts beyond it, in the given order, are rejected
            ``bin_full``.
        """
        if order not in ("nearest", "detected"):
            raise ValueError(f"order: expected 'nearest' or 'detected', got {order!r}")
        q0 = self.home_rad if start_joints_rad is None else np.asarray(start_joints_rad, float)
        start_mm = self.arm.forward(q0[None])[0]
        outcomes: dict[str, PartOutcome] = {}
        candidates: list[PartTarget] = []
        self._set_table(parts)
        all_heights = [p.height_mm for p in parts]
        heights: dict[str, PickHeights] = {}
        for k, part in enumerate(parts):
            if self.bin_for(part) is not None:
                tallest_other = max(all_heights[:k] + all_heights[k + 1:], default=0.0)
                heights[part.id] = self.heights_for(part, tallest_other)
        for part, rej in zip(parts, self._precheck(parts, bin_room, heights)):
            if rej is not None:
                outcomes[part.id] = PartOutcome(part, PickStatus.REJECTED, self.bin_for(part), rej)
            else:
                candidates.append(part)
        if order == "nearest" and len(candidates) > 1:
            part_xy = np.array([p.xy_mm for p in candidates])
            bin_xy = np.array([[self.cell.bins[self.bin_for(p)].x, self.cell.bins[self.bin_for(p)].y] for p in candidates])
            candidates = [candidates[i] for i in order_nearest_two_opt(start_mm[:2], part_xy, bin_xy)]

        picks: list[PlannedPick] = []
        accepted: list[SampledSegment] = []
        t, here = t0_s, start_mm
        lead: list[Segment] = []
        warnings = []
        if not self._ik_pose(q0):
            # the arm stands where Cartesian moves cannot start (another elbow branch, a straight arm):
            # swing in joint space to the pose above that point first
            swing = self._swing_to_safe(q0, None)
            if swing is None:
                warnings.append("the arm's start pose has no reachable point above it at safe height; nothing planned")
                candidates = []
            else:
                lead, here = swing
        home_done = not end_at_home
        while candidates:
            # every remaining pick (and the way home), chained as if all pass, timed, sampled and checked
            # in one pass; the picks before the first failure are kept, the failing one is rejected, the
            # rest go again
            runs, start_here, first_lead = [], here, lead
            for part in candidates:
                runs.append(first_lead + self.pick_segments(part, self.bin_for(part), start_here, heights[part.id]))
                start_here, first_lead = self.pick_end_mm(part, heights[part.id]), []
            home = [] if home_done else self._home_segments(start_here)
            flat = [seg for segs in runs for seg in segs] + home
            sampled, failure = self._check_all(flat, t)
            bounds = np.cumsum([0] + [len(segs) for segs in runs])
            failed = len(runs) if failure is None else int(np.searchsorted(bounds, failure[0], side="right")) - 1
            for k in range(min(failed, len(runs))):
                part, own = candidates[k], sampled[bounds[k]:bounds[k + 1]]
                picks.append(PlannedPick(part.id, part.class_name, self.bin_for(part), own, t))
                outcomes[part.id] = PartOutcome(part, PickStatus.PLANNED, self.bin_for(part))
                self._table.pop(part.id, None)
                accepted += own
                t += sum(s.duration_s for s in own)
                here, lead = own[-1].xyz_mm[-1], []
            if failed >= len(runs):              # every pick passed; the way home passed or failed
                home_done = True
                if failure is None:
                    accepted += sampled[bounds[-1]:]
                else:
                    warnings.append(self._home_failed(failure[1]))
                break
            part = candidates[failed]
            outcomes[part.id] = PartOutcome(part, PickStatus.REJECTED, self.bin_for(part), failure[1])
            candidates = candidates[failed + 1:]
        q_here = accepted[-1].joints_rad[-1] if accepted else q0
        if not home_done and float(np.abs(np.asarray(q_here) - self.home_rad).max()) > 1e-9:
            sampled, failure = self._check_all(lead + self._home_segments(here), t)
            if failure is None:
                accepted += sampled
            else:
                warnings.append(self._home_failed(failure[1]))
        ordered = [outcomes[p.id] for p in parts]
        return Plan(ordered, picks, *self._join(accepted, q0, start_mm, t0_s), warnings=warnings,
                    speed_scale=self.speed_scale)

    def _home_segments(self, here) -> list[Segment]:
        """From tool point ``here`` back to the home pose: to safe height, an arc to above home, straight
        to home; or, if Cartesian moves cannot end in the home pose, a joint-space swing to it."""
        home_mm = self.home_mm
        segs, p = self._to_safe(here, None, False)
        if not self._ik_pose(self.home_rad):
            q_safe = self.arm.inverse(np.asarray(p, float)[None]).joints_rad[0]
            return segs + [Segment(SegmentKind.SWING, None, joints_rad=(q_safe, self.home_rad))]
        segs += transfer_segments(self.arm, p, [home_mm[0], home_mm[1], self.safe_z], None, False)
        return segs + straight_segments(SegmentKind.RISE if home_mm[2] > self.safe_z else SegmentKind.LOWER,
                                     [home_mm[0], home_mm[1], self.safe_z], home_mm, None, False)

    @staticmethod
    def _home_failed(rejection: Rejection) -> str:
        return f"the move back to the home pose failed a check and was left out: {rejection.describe()}"

    def _precheck(self, parts: list[PartTarget], bin_room: dict[str, int] | None,
                  heights: dict[str, PickHeights]) -> list[Rejection | None]:
        """Reasons known before any motion, per part: the photo's verdict, no bin, a full bin, grip fit,
        grip or above-part point unreachable (every part's two points through one IK call and one check
        pass, again after each point that fails), the held part's carry or release height out of reach."""
        out: list[Rejection | None] = [None] * len(parts)
        room = dict(bin_room or {})
        probed = []
        for k, part in enumerate(parts):
            name = self.bin_for(part)
            if not part.pickable:
                out[k] = Rejection(Check.PHOTO, part.vision_detail or "rejected by the photo analysis",
                                   subject=part.vision_status)
            elif name is None:
                out[k] = Rejection(Check.UNKNOWN_CLASS, f"class '{part.class_name}' has no bin and the cell has no "
                                                        f"'reject' bin")
            elif name in room and room[name] <= 0:
                out[k] = Rejection(Check.BIN_FULL, f"bin '{name}' is full")
            else:
                if name in room:
                    room[name] -= 1
                out[k] = grip_fit_rejection(part, self.cell.arm.gripper)
                if out[k] is None:
                    probed.append(k)
        if not probed:
            return out
        pts = np.array([[*parts[k].xy_mm, z] for k in probed
                        for z in (heights[parts[k].id].grip_z_mm, heights[parts[k].id].approach_z_mm)], float)
        sol = self.arm.inverse(pts)
        first = 0
        while first < len(pts):
            # the probes are separate points, not a motion: no speeds or branch changes between them
            bad = first_failing_sample(self.ctx, pts[first:], sol.joints_rad[first:], sol.reason[first:], timed=False)
            if bad is None:
                break
            i = first + bad.index
            out[probed[i // 2]] = bad.rejection.at(("descend", "transfer")[i % 2], None)
            first = (i // 2 + 1) * 2
        self._precheck_held(parts, heights, [k for k in probed if out[k] is None], out)
        return out

    def _precheck_held(self, parts, heights, probed, out) -> None:
        """Reject parts whose adapted heights (carry above the part and the tray, release) are out of
        reach, saying what the height is for."""
        places = []
        for k in probed:
            part, h = parts[k], heights[parts[k].id]
            b = self.cell.bins[self.bin_for(part)]
            places += [(k, "carry", (*part.xy_mm, h.carry_z_mm)), (k, "carry", (b.x, b.y, h.carry_z_mm)),
                       (k, "release", (b.x, b.y, h.release_z_mm))]
        if not places:
            return
        sol = self.arm.inverse(np.array([p for _, _, p in places], float))
        labels = sol.reason_labels()
        for (k, label, (x, y, z)), ok, why in zip(places, sol.ok, labels):
            if ok or out[k] is not None:
                continue
            h = heights[parts[k].id]
            need = ("pass over the table, trays, raised markers and other parts" if label == "carry"
                    else "stay above the tray floor")
            out[k] = Rejection(Check.HELD_PART, f"a part {parts[k].height_mm:g} mm tall hangs {h.hang_mm:g} mm below "
                                            f"the tool; to {need} the tool must be at z={z:.1f} mm at "
                                            f"({x:.1f}, {y:.1f}) mm: {why}", "rise" if label == "carry" else "descend",
                               None, z, None, "mm")

    def _join(self, sampled: list[SampledSegment], q0, start_mm, t0_s):
        """Concatenate segments on one clock (each segment's first sample is the previous one's last)."""
        n = np.array([len(s.t_s) - 1 for s in sampled], dtype=int)
        seg_t0 = np.cumsum([t0_s] + [s.duration_s for s in sampled])[:-1]
        segments = list(zip(sampled, seg_t0.tolist()))
        local = np.concatenate([[0.0]] + [s.t_s[1:] for s in sampled])
        t = local + np.concatenate([[t0_s], np.repeat(seg_t0, n)])
        xyz = np.concatenate([start_mm[None]] + [s.xyz_mm[1:] for s in sampled])
        q = np.concatenate([q0[None]] + [s.joints_rad[1:] for s in sampled])
        closed = np.concatenate([[False], np.repeat([s.segment.gripper_closed for s in sampled], n)]).astype(bool)
        seg_idx = np.concatenate([[-1], np.repeat(np.arange(len(sampled)), n)])
        kinds, pids = ["start"], [""]
        for s, count in zip(sampled, n.tolist()):
            kinds += [s.segment.kind.value] * count
            pids += [s.segment.part_id or ""] * count
        return segments, JointSamples(t, xyz, q, closed, seg_idx, kinds, pids)
