"""The cell file's cross-field checks: what pydantic's per-field types cannot say (a joint's limits
against its servo's range, the work area's shape, markers that overlap, trays out of the layout, motion
settings whose moves would take too many samples). Each problem carries its dotted key path; the schema
and the loading are in :mod:`gripsight.app.cellfile`, whose ``Cell`` (and its parts) every function here
takes."""

from __future__ import annotations

import math

from gripsight.app.errors import CellFileError, Problem
from gripsight.vision.markerdict import dictionary_size
from gripsight.vision.settings import LensMode

__all__ = ["MAX_SAMPLES_PER_MOVE", "MAX_SAMPLES_PER_PLAN", "check_plan_size", "longest_move_samples", "semantic_problems"]

#: the most samples one move may take (speed, joint speeds, dwell and sample rate together); beyond,
#: a plan would need gigabytes: the cell is refused by validate rather than by the planner
MAX_SAMPLES_PER_MOVE = 200_000


def _joint_problems(where: str, joint) -> list[Problem]:
    out = []
    if joint.min_deg >= joint.max_deg:
        out.append(Problem(f"{where}.min_deg", f"must be less than max_deg ({joint.max_deg:g})"))
    (a0, p0), (a1, p1) = joint.servo.map
    servo = joint.servo
    if servo.min_us >= servo.max_us:
        out.append(Problem(f"{where}.servo.min_us", f"must be less than max_us ({servo.max_us:g})"))
    if a0 == a1:
        out.append(Problem(f"{where}.servo.map", "the two calibration points need different angles"))
    elif joint.min_deg < joint.max_deg:
        for limit_name, angle in (("min_deg", joint.min_deg), ("max_deg", joint.max_deg)):
            pulse = p0 + (angle - a0) * (p1 - p0) / (a1 - a0)
            if not servo.min_us - 1e-9 <= pulse <= servo.max_us + 1e-9:
                out.append(Problem(
                    f"{where}.{limit_name}",
                    f"{angle:g} deg maps to {pulse:.0f} us, outside the servo range "
                    f"{servo.min_us:g}-{servo.max_us:g} us"))
    return out


def _polygon_area(points: list[list[float]]) -> float:
    area = 0.0
    for (x0, y0), (x1, y1) in zip(points, points[1:] + points[:1]):
        area += x0 * y1 - x1 * y0
    return 0.5 * area


def _self_intersecting(points: list[list[float]]) -> bool:
    """True if two edges of the closed polygon that do not share a corner cross or touch (orientation test)."""
    import numpy as np

    p = np.asarray(points, float)
    a, b = p, np.roll(p, -1, axis=0)
    n = len(p)

    def orient(o, q, r):
        return np.sign((q[..., 0] - o[..., 0]) * (r[..., 1] - o[..., 1]) - (q[..., 1] - o[..., 1]) * (r[..., 0] - o[..., 0]))

    i, j = np.triu_indices(n, k=2)
    keep = ~((i == 0) & (j == n - 1))                  # the first and last edges share a corner
    i, j = i[keep], j[keep]
    d1, d2 = orient(a[i], b[i], a[j]), orient(a[i], b[i], b[j])
    d3, d4 = orient(a[j], b[j], a[i]), orient(a[j], b[j], b[i])
    return bool(np.any((d1 * d2 < 0) & (d3 * d4 < 0)))


def longest_move_samples(cell) -> tuple[float, float]:
    """(seconds, samples) of the longest move the cell's motion settings allow: twice the arm's reach at
    ``speed_mm_s``, a full turn of the slowest joint, and the dwell (an upper bound, used for limits)."""
    arm, motion = cell.arm, cell.motion
    reach_mm = abs(arm.shoulder_offset_mm) + arm.upper_arm_mm + arm.forearm_mm + arm.tool.reach_mm
    slowest = min(getattr(arm.joints, n).max_speed_deg_s for n in ("base", "shoulder", "elbow"))
    longest_s = 2 * reach_mm / motion.speed_mm_s + 360.0 / slowest + motion.dwell_s
    return longest_s, longest_s * motion.sample_hz


#: the most samples one plan may hold (moves of every part together), ~1 GB of arrays at most
MAX_SAMPLES_PER_PLAN = 5_000_000


def check_plan_size(n_parts: int, cell, source: str) -> None:
    """Refuse, before planning, a plan whose samples could exceed MAX_SAMPLES_PER_PLAN (4 moves a part)."""
    _, per_move = longest_move_samples(cell)
    bound = 4 * max(n_parts, 1) * per_move
    if bound > MAX_SAMPLES_PER_PLAN:
        raise CellFileError(source, [Problem("", f"{n_parts} parts at these motion settings could take {bound:,.0f} "
                                                 f"samples, more than {MAX_SAMPLES_PER_PLAN:,}; plan fewer parts at once "
                                                 "or raise motion.speed_mm_s")])


def _sample_problems(cell) -> list[Problem]:
    """Refuse motion settings whose longest move would take more than MAX_SAMPLES_PER_MOVE samples."""
    longest_s, samples = longest_move_samples(cell)
    if samples > MAX_SAMPLES_PER_MOVE:
        return [Problem("motion.sample_hz", f"the longest move (~{longest_s:,.0f} s) would take {samples:,.0f} samples, "
                                            f"more than {MAX_SAMPLES_PER_MOVE:,}; raise motion.speed_mm_s or the joints' "
                                            "max_speed_deg_s, or lower sample_hz or dwell_s")]
    return []


def semantic_problems(cell) -> list[Problem]:
    """Checks that need more than one key; each problem names the key to change."""
    out: list[Problem] = []
    arm = cell.arm
    for name in ("base", "shoulder", "elbow"):
        out += _joint_problems(f"arm.joints.{name}", getattr(arm.joints, name))
    lo, hi = arm.elbow_interior_deg
    if not 0 <= lo < hi <= 180:
        out.append(Problem("arm.elbow_interior_deg", f"must be [min, max] with 0 <= min < max <= 180, got [{lo:g}, {hi:g}]"))
    link = arm.linkage
    if link.type == "four_bar":
        for key in ("crank_mm", "coupler_mm", "rocker_mm"):
            if getattr(link, key) is None:
                out.append(Problem(f"arm.linkage.{key}", "required for a four_bar linkage"))
    else:
        for key in ("crank_mm", "coupler_mm", "rocker_mm"):
            if getattr(link, key) is not None:
                out.append(Problem(f"arm.linkage.{key}", f"only used by four_bar, not {link.type}"))
    grip = arm.gripper
    for key in ("open_us", "closed_us"):
        if not grip.min_us <= getattr(grip, key) <= grip.max_us:
            out.append(Problem(f"arm.gripper.{key}", f"outside the servo range {grip.min_us:g}-{grip.max_us:g} us"))
    channels: dict[int, str] = {}
    for name in ("base", "shoulder", "elbow"):
        ch = getattr(arm.joints, name).servo.channel
        if ch in channels:
            out.append(Problem(f"arm.joints.{name}.servo.channel", f"channel {ch} is already used by {channels[ch]}"))
        channels[ch] = name
    if grip.channel in channels:
        out.append(Problem("arm.gripper.channel", f"channel {grip.channel} is already used by {channels[grip.channel]}"))

    home = cell.motion.home_deg
    for name in ("base", "shoulder", "elbow"):
        joint = getattr(arm.joints, name)
        value = getattr(home, name)
        if joint.min_deg < joint.max_deg and not joint.min_deg <= value <= joint.max_deg:
            out.append(Problem(f"motion.home_deg.{name}", f"{value:g} is outside the joint limits [{joint.min_deg:g}, {joint.max_deg:g}]"))

    size = dictionary_size(cell.markers.dictionary)
    layout = cell.markers.layout
    for marker_id in layout:
        if marker_id >= size:
            out.append(Problem(f"markers.layout.{marker_id}", f"id {marker_id} does not exist in {cell.markers.dictionary} (ids 0-{size - 1})"))
    ids = sorted(layout)
    for i, a in enumerate(ids):
        for b in ids[i + 1:]:
            pa, pb = layout[a], layout[b]
            if math.hypot(pa.x - pb.x, pa.y - pb.y) < cell.markers.size_mm:
                out.append(Problem(f"markers.layout.{b}", f"overlaps marker {a} (centres closer than size_mm)"))

    grip_marker = cell.markers.on_gripper
    if grip_marker is not None:
        if grip_marker.id >= size:
            out.append(Problem("markers.on_gripper.id", f"id {grip_marker.id} does not exist in {cell.markers.dictionary} (ids 0-{size - 1})"))
        if grip_marker.id in layout:
            out.append(Problem("markers.on_gripper.id", f"id {grip_marker.id} is already a table marker (markers.layout); "
                                                        "give the gripper its own id"))
        if grip_marker.level and not cell.arm.tool.level:
            out.append(Problem("markers.on_gripper.level", "the tool is fixed to the forearm (arm.tool.level: false), "
                                                           "so a marker on it tilts with it; remove the key or set false"))

    if abs(_polygon_area(cell.work_area)) < 1.0:
        out.append(Problem("work_area", "the polygon has no area (points collinear or repeated)"))
    elif _self_intersecting(cell.work_area):
        out.append(Problem("work_area", "the polygon crosses itself; list its corners in order around it"))
    out += _sample_problems(cell)

    for name, part in cell.parts.items():
        if not 0 <= part.lab[0] <= 100:
            out.append(Problem(f"parts.{name}.lab", f"L* must be in 0-100, got {part.lab[0]:g}"))
        if name == "reject":
            out.append(Problem(f"parts.{name}", "'reject' is reserved for the bin of unknown colours"))
    for name in cell.parts:
        if cell.bins and name not in cell.bins:
            out.append(Problem(f"bins.{name}", f"no bin for part class '{name}'"))
    for name in cell.bins:
        if name != "reject" and name not in cell.parts:
            out.append(Problem(f"bins.{name}", f"no part class '{name}' (bins are named after classes, or 'reject')"))

    # a part taller than safe_z_mm is approached, carried and released at adapted heights; a class that
    # cannot be carried at all is named by the planning core's cell check (parts.<class>.height_mm)
    motion = cell.motion
    if motion.drop_z_mm >= motion.safe_z_mm:
        out.append(Problem("motion.drop_z_mm", f"must be below safe_z_mm ({motion.safe_z_mm:g})"))
    for name, part in cell.parts.items():
        if motion.grip_depth_mm >= part.height_mm:
            out.append(Problem(f"parts.{name}.height_mm", f"must exceed motion.grip_depth_mm ({motion.grip_depth_mm:g})"))

    for i, zone in enumerate(cell.keep_out):
        where = f"keep_out.{i}"
        if zone.shape == "cylinder":
            for key in ("x", "y", "radius_mm"):
                if getattr(zone, key) is None:
                    out.append(Problem(f"{where}.{key}", "required for a cylinder zone"))
        else:
            if zone.min_mm is None or zone.max_mm is None:
                out.append(Problem(f"{where}", "a box zone needs min_mm and max_mm"))
            elif any(a >= b for a, b in zip(zone.min_mm, zone.max_mm)):
                out.append(Problem(f"{where}.min_mm", "every coordinate must be less than max_mm's"))
    if cell.camera.lens == LensMode.FILE and not cell.camera.lens_file:
        out.append(Problem("camera.lens_file", "required when camera.lens is 'file'"))
    return out


# ---------------------------------------------------------------- loading
