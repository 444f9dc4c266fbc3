"""Outputs of a plan: ``plan.json`` and ``joints.csv`` (DESIGN.md sec. 9), written atomically.

``joints.csv`` starts with comment lines (``#``): the safety cautions, the cell name, the cell file's
SHA-256, the time and the sample rate; then a header and one row per sample::

    time_s, segment, part, x_mm, y_mm, z_mm, base_deg, shoulder_deg, elbow_deg, gripper,
    base_us, shoulder_us, elbow_us, gripper_us
"""

from __future__ import annotations

import csv
import io

import numpy as np

from gripsight.app.fileio import output_dir, strict_json, utc_now, utf8, write_files_atomic
from gripsight.app.textsafe import one_line
from gripsight.planning.planresult import Plan
from gripsight.planning.safety import SAFETY_LINES

__all__ = ["CSV_COLUMNS", "plan_to_dict", "joints_csv_text", "write_plan_outputs"]

CSV_COLUMNS = ["time_s", "segment", "part", "x_mm", "y_mm", "z_mm", "base_deg", "shoulder_deg", "elbow_deg",
               "gripper", "base_us", "shoulder_us", "elbow_us", "gripper_us"]





def _r(values, nd=4):
    return [round(float(v), nd) for v in values]


def plan_to_dict(plan: Plan, cell, created: str | None = None, photo: dict | None = None,
                 calibration: dict | None = None) -> dict:
    """The plan as the JSON object of ``plan.json`` and ``--json``."""
    picks = []
    for pick in plan.picks:
        segs = []
        for s in pick.segments:
            segs.append({"kind": s.segment.kind.value,
                         "duration_s": round(s.duration_s, 4),
                         "start_mm": _r(s.xyz_mm[0]), "end_mm": _r(s.xyz_mm[-1]),
                         "start_deg": _r(np.degrees(s.joints_rad[0])), "end_deg": _r(np.degrees(s.joints_rad[-1])),
                         "gripper": "closed" if s.segment.gripper_closed else "open"})
        picks.append({"part": pick.part_id, "class": pick.class_name, "bin": pick.bin_name,
                      "start_s": round(pick.start_s, 4), "duration_s": round(pick.duration_s, 4), "segments": segs})
    parts = []
    for o in plan.parts:
        p = o.part
        parts.append({"id": p.id, "class": p.class_name, "known_class": p.known_class,
                      "pixel": None if p.pixel_uv is None else _r(p.pixel_uv, 2),
                      "table_mm": _r(p.xy_mm, 3), "height_mm": round(p.height_mm, 3),
                      "yaw_deg": round(p.yaw_deg, 2), "width_mm": round(p.width_mm, 3), "length_mm": round(p.length_mm, 3),
                      "bin": o.bin_name, "status": o.status.value,
                      # what the photo analysis made of it (unknown_shape, unknown_colour: the reject bin), and why
                      "photo_status": p.vision_status, "photo_detail": p.vision_detail or None,
                      "reason": None if o.rejection is None else o.rejection.label,
                      "rejection": None if o.rejection is None else o.rejection.as_dict()})
    rejected: dict[str, int] = {}
    for o in plan.parts:
        if o.rejection is not None:
            rejected[o.rejection.label] = rejected.get(o.rejection.label, 0) + 1
    return {
        "gripsight": "plan",
        "status": "planned",
        "created": created or utc_now(),
        "cell": cell.cell,
        "cell_sha256": cell.sha256,
        "safety": list(SAFETY_LINES),
        "photo": photo,
        "calibration": calibration,
        "parts": parts,
        "picks": picks,
        "totals": {"parts": len(plan.parts), "planned": len(plan.picks),
                   "rejected": len(plan.parts) - len(plan.picks), "rejected_by_reason": rejected,
                   "cycle_s": round(plan.cycle_s, 4), "samples": int(len(plan.samples.t_s)),
                   "sample_hz": cell.motion.sample_hz, "speed_scale": plan.speed_scale},
        "warnings": list((photo or {}).get("warnings", [])) + list(plan.warnings),
    }


def joints_csv_text(plan: Plan, cell, arm, created: str | None = None, photo: str | None = None) -> str:
    """The joint sequence as CSV text, safety comment lines first."""
    s = plan.samples
    q_deg = np.degrees(s.joints_rad)
    pulses = arm.pulses_us(s.joints_rad, check=True)
    grip = cell.arm.gripper
    grip_us = np.where(s.gripper_closed, grip.closed_us, grip.open_us)
    out = io.StringIO()
    out.write("# gripsight joint sequence\n")
    for line in SAFETY_LINES:
        out.write(f"# SAFETY: {line}\n")
    out.write(f"# cell: {one_line(cell.cell)}\n# cell_sha256: {cell.sha256 or 'not from a file'}\n")
    if photo is not None:
        out.write(f"# photo: {one_line(str(photo))}\n")
    out.write(f"# created: {created or utc_now()}\n# sample_hz: {cell.motion.sample_hz:g}\n")
    if plan.speed_scale != 1.0:
        out.write(f"# speed_scale: {plan.speed_scale:g} (every move slowed to this fraction of the cell's speeds)\n")
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(CSV_COLUMNS)
    names = {pid: one_line(pid) for pid in set(s.part_id)}      # ids from a parts file or a photo: one line each
    out.write(_sample_rows(s, q_deg, pulses, grip_us, [names[pid] for pid in s.part_id]))
    return out.getvalue()


_ROW = "%.4f,%s,%s,%.4f,%.4f,%.4f,%.6f,%.6f,%.6f,%s,%.1f,%.1f,%.1f,%.0f\n"


def _csv_cells(values) -> list[str]:
    """Each value as csv.writer would write it (quoted only where needed); one writer call per distinct value."""
    text: dict = {}
    for v in set(values):
        buf = io.StringIO()
        csv.writer(buf, lineterminator="").writerow([v, "."])      # a lone "" would be quoted
        text[v] = buf.getvalue()[:-2]
    return [text[v] for v in values]


def _sample_rows(s, q_deg, pulses, grip_us, part_ids=None) -> str:
    """The sample rows of joints.csv, the same text csv.writer gave row by row: built in numpy
    (:mod:`gripsight.app.fixedtext`) where every number allows it, else one %-format per row over plain
    Python floats (2.4x csv.writer's speed); ``part_ids`` replaces ``s.part_id``."""
    texts = [_csv_cells(s.segment_kind), _csv_cells(s.part_id if part_ids is None else part_ids),
             np.where(s.gripper_closed, "closed", "open").tolist()]
    fast = _sample_rows_numpy(s, q_deg, pulses, grip_us, texts)
    if fast is not None:
        return fast
    cols = [s.t_s.tolist(), texts[0], texts[1]]
    cols += [s.xyz_mm[:, k].tolist() for k in range(3)] + [q_deg[:, k].tolist() for k in range(3)]
    cols += [texts[2]]
    cols += [pulses[:, k].tolist() for k in range(3)] + [np.asarray(grip_us, float).tolist()]
    return "".join([_ROW % row for row in zip(*cols)])


def _sample_rows_numpy(s, q_deg, pulses, grip_us, texts) -> str | None:
    """The rows of :data:`_ROW` built in numpy, or None where a number must be formatted by Python."""
    from gripsight.app.fixedtext import fixed_slots, joined_rows, text_slots

    if len(s.t_s) == 0:
        return None
    numbers = ([(s.t_s, 4)] + [(s.xyz_mm[:, k], 4) for k in range(3)] + [(q_deg[:, k], 6) for k in range(3)]
               + [(pulses[:, k], 1) for k in range(3)] + [(np.broadcast_to(np.asarray(grip_us, float), s.t_s.shape), 0)])
    slots = [fixed_slots(v, d) for v, d in numbers] + [text_slots(t) for t in texts]
    if any(x is None for x in slots):
        return None
    t, x, y, z, q0, q1, q2, p0, p1, p2, g, seg, part, grip = slots
    return joined_rows([t, seg, part, x, y, z, q0, q1, q2, grip, p0, p1, p2, g]).decode("utf-8")


def write_plan_outputs(out_dir, plan: Plan, cell, arm, photo: dict | None = None,
                       calibration: dict | None = None, plots: bool = True) -> dict:
    """Write plan.json, joints.csv (and the two plots) under ``out_dir``; return the plan dict."""

    from gripsight.app.jointcheck import check_joint_file_text

    out = output_dir(out_dir)
    created = utc_now()
    data = plan_to_dict(plan, cell, created, photo, calibration)
    text = joints_csv_text(plan, cell, arm, created, photo=None if photo is None else photo.get("path"))
    check_joint_file_text(text, cell, str(out / "joints.csv"))       # the whole file, before it is written
    # both new files written and flushed before either takes its name: a failure (a full disk) leaves
    # the old pair, never a new joints.csv beside an old plan.json
    write_files_atomic([(out / "joints.csv", utf8(text)), (out / "plan.json", utf8(strict_json(data) + "\n"))])
    if plots:
        from gripsight.app.plan_plot import draw_joint_plot, draw_path_plot

        draw_joint_plot(plan, cell, arm, out / "joints.png")
        draw_path_plot(plan, cell, arm, out / "path.png")
    return data
