"""Pictures of a plan: joint angles and pulses over time (joints.png), and the tool path from above and
from the side (path.png).

Both are drawn with OpenCV onto an image (:mod:`gripsight.app.chart`): about 10 ms each, where the
matplotlib figures they replace took 0.6-1.2 s and 0.7 s of imports. The content is the same: axes with
ticks and units, a legend, segment starts, picks shaded and labelled, rejections named.
"""

from __future__ import annotations

import numpy as np

from gripsight.app.chart import Chart, LegendEntry, bgr
from gripsight.app.fileio import write_bytes_atomic
from gripsight.planning.arm import JOINT_NAMES

__all__ = ["draw_joint_plot", "draw_path_plot", "joint_plot_png", "path_plot_png"]

_JOINT_COLOURS = tuple(bgr(c) for c in ("#1b9e77", "#d95f02", "#7570b3"))
_PLANNED, _REJECTED = bgr("#2ca02c"), bgr("#d62728")
_PATH, _CARRY, _ZONE = bgr("#1f77b4"), bgr("#ff7f0e"), bgr("#ffbb78")
_GREY, _SHADE, _SEGMENT = (100, 100, 100), (238, 238, 238), (200, 200, 200)


def _limits(values, pad: float = 0.05, fallback=(0.0, 1.0)) -> tuple[float, float]:
    v = np.asarray(values, float).ravel()
    v = v[np.isfinite(v)]
    if v.size == 0:
        return fallback
    lo, hi = float(v.min()), float(v.max())
    span = hi - lo if hi > lo else max(abs(hi), 1.0)
    return lo - pad * span, hi + pad * span


def joint_plot_png(plan, cell, arm) -> bytes:
    """Angles (deg) and servo pulses (us) against time, segment starts as thin lines, alternate picks
    shaded and labelled part->bin; PNG bytes."""
    s = plan.samples
    t = s.t_s
    q = np.degrees(s.joints_rad)
    pulses = arm.pulses_us(s.joints_rad, check=False)
    grip = cell.arm.gripper
    grip_us = np.where(s.gripper_closed, grip.closed_us, grip.open_us).astype(float)
    chart = Chart(1200, 700)
    xlim = _limits(t)
    limits_deg = [np.degrees(arm.limits_rad[j]) for j in range(3)]
    top = chart.panel((86, 40, 1185, 330), xlim, _limits(q))
    bottom = chart.panel((86, 355, 1185, 640), xlim, _limits(np.column_stack([pulses, grip_us])))
    starts = np.array([t0 for _, t0 in plan.segments], float)
    for panel in (top, bottom):
        for pick_no, pick in enumerate(plan.picks):
            if pick_no % 2 == 0:
                panel.vspan(pick.start_s, pick.start_s + pick.duration_s, _SHADE)
        panel.grid()
        if len(starts):
            panel.vline(starts, _SEGMENT)
    for j, name in enumerate(JOINT_NAMES):
        top.line(t, q[:, j], _JOINT_COLOURS[j], 2)
        bottom.line(t, pulses[:, j], _JOINT_COLOURS[j], 2)
    bottom.step(t, grip_us, _GREY, 1, dashed=True)
    for pick in plan.picks:
        u = top.to_px([pick.start_s], [0.0])[0, 0]
        chart.text((u + 3, top.top + 14), f"{pick.part_id}->{pick.bin_name}", 0.38)
    top.axes(ylabel="joint angle (deg)", x_ticks=False,
             title=f"{cell.cell}: {len(plan.picks)} picks, cycle {plan.cycle_s:.2f} s "
                   "(thin lines: segment starts; shaded: alternate picks)")
    bottom.axes(xlabel="time (s)", ylabel="pulse (us)")
    top.legend([LegendEntry(f"{name} [{lo:g}, {hi:g}] deg", _JOINT_COLOURS[j])
                for j, (name, (lo, hi)) in enumerate(zip(JOINT_NAMES, limits_deg))])
    bottom.legend([LegendEntry(f"{name} (ch {arm.servos[j].channel})", _JOINT_COLOURS[j])
                   for j, name in enumerate(JOINT_NAMES)]
                  + [LegendEntry(f"gripper (ch {grip.channel})", _GREY, "dashed", 1)])
    return chart.png()


def _keep_out_outlines(cell) -> list[np.ndarray]:
    """Each keep-out zone's footprint on the table, (N, 2) x, y mm."""
    out = []
    for zone in cell.keep_out:
        if zone.shape == "cylinder":
            a = np.linspace(0, 2 * np.pi, 60)
            out.append(np.column_stack([zone.x + zone.radius_mm * np.cos(a), zone.y + zone.radius_mm * np.sin(a)]))
        elif zone.min_mm is not None and zone.max_mm is not None:
            (x0, y0, _), (x1, y1, _) = zone.min_mm, zone.max_mm
            out.append(np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], float))
    return out


def path_plot_png(plan, cell, arm) -> bytes:
    """Tool path from above (x up, +y to the left, as the camera sees it) and from the side (r, z);
    PNG bytes."""
    s = plan.samples
    xyz = s.xyz_mm
    closed = np.asarray(s.gripper_closed, bool)
    carry = np.where(closed[:, None], xyz, np.nan)
    wa = np.array(list(cell.work_area) + list(cell.work_area[:1]), float)
    bins = [(name, float(b.x), float(b.y)) for name, b in cell.bins.items()]
    zones = _keep_out_outlines(cell)
    parts_xy = np.array([o.part.xy_mm for o in plan.parts], float).reshape(-1, 2)
    base_x, base_y = (float(v) for v in arm.base_xy_mm)      # the base axis in the table frame
    every_x = np.concatenate([wa[:, 0], xyz[:, 0], [b[1] for b in bins], parts_xy[:, 0], [base_x]]
                             + [z[:, 0] for z in zones])
    every_y = np.concatenate([wa[:, 1], xyz[:, 1], [b[2] for b in bins], parts_xy[:, 1], [base_y]]
                             + [z[:, 1] for z in zones])
    chart = Chart(1300, 620)
    top = chart.panel((90, 40, 640, 550), _limits(every_y, 0.08), _limits(every_x, 0.08), equal=True, invert_x=True)
    top.grid()
    for z in zones:
        top.fill(z[:, 1], z[:, 0], _ZONE, 0.55)
    top.line(wa[:, 1], wa[:, 0], (0, 0, 0), 1)
    top.line(xyz[:, 1], xyz[:, 0], _PATH, 1)
    top.line(carry[:, 1], carry[:, 0], _CARRY, 3)
    for name, bx, by in bins:
        top.markers(by, bx, (90, 90, 90), "square", 18, 2)
        top.text(by, bx, name, offset_px=(0, 26), align="centre")
    for o in plan.parts:
        x, y = o.part.xy_mm
        if o.rejection is None:
            top.markers(y, x, _PLANNED, "dot", 11)
            top.text(y, x, o.part.id)
        else:
            top.markers(y, x, _REJECTED, "cross", 12, 3)
            top.text(y, x, f"{o.part.id}: {o.rejection.label}", colour=_REJECTED)
    top.markers(base_y, base_x, (0, 0, 0), "plus", 16, 2)
    top.text(base_y, base_x, "arm base", offset_px=(10, 16))
    top.axes(xlabel="y (mm, +y to the left)", ylabel="x (mm)", title="tool path from above")
    legend = [LegendEntry("work area", (0, 0, 0), "line", 1), LegendEntry("tool path", _PATH, "line", 1),
              LegendEntry("carrying a part", _CARRY, "thick", 3), LegendEntry("planned part", _PLANNED, "dot"),
              LegendEntry("rejected part", _REJECTED, "cross"), LegendEntry("bin", (90, 90, 90), "square")]
    if zones:
        legend.append(LegendEntry("keep-out zone", _ZONE, "patch"))
    top.legend(legend, corner="lower left")

    r = np.hypot(xyz[:, 0] - base_x, xyz[:, 1] - base_y)
    safe_z = float(cell.motion.safe_z_mm)
    side = chart.panel((780, 40, 1270, 550), _limits(r, 0.08, (0.0, 300.0)),
                       _limits(np.concatenate([xyz[:, 2], [0.0, safe_z]]), 0.08), equal=True)
    side.grid()
    side.hline(0.0, (70, 70, 70), 2)
    side.hline(safe_z, (150, 150, 150), 1, dashed=True)
    side.line(r, xyz[:, 2], _PATH, 1)
    side.line(np.where(closed, r, np.nan), xyz[:, 2], _CARRY, 3)
    side.text(side.xlim[1], safe_z, f"safe z = {safe_z:g} mm", offset_px=(-6, -6), align="right")
    side.text(side.xlim[1], 0.0, "table", offset_px=(-6, -6), align="right")
    side.axes(xlabel="r (mm from the base axis)", ylabel="z (mm)", title="tool path from the side (all base angles)")
    return chart.png()


def draw_joint_plot(plan, cell, arm, out_path) -> None:
    """Write :func:`joint_plot_png` to ``out_path`` atomically."""
    write_bytes_atomic(out_path, joint_plot_png(plan, cell, arm))


def draw_path_plot(plan, cell, arm, out_path) -> None:
    """Write :func:`path_plot_png` to ``out_path`` atomically."""
    write_bytes_atomic(out_path, path_plot_png(plan, cell, arm))
