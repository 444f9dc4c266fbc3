"""Pictures of a plan: joint angles and pulses over time, and the tool path from above and the side."""

from __future__ import annotations

import numpy as np

from gripsight.planning.arm import JOINT_NAMES
from gripsight.planning.picks import PickStatus
from gripsight.app.fileio import atomic_output

__all__ = ["draw_joint_plot", "draw_path_plot"]

_JOINT_COLOURS = ("#1b9e77", "#d95f02", "#7570b3")
_PLANNED, _REJECTED = "#2ca02c", "#d62728"


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def _segment_starts(plan):
    return [(t0, s.segment.kind.value, s.segment.part_id) for s, t0 in plan.segments]


def draw_joint_plot(plan, cell, arm, out_path) -> None:
    """Angles (deg) and servo pulses (us) against time, segment boundaries as thin lines, picks shaded."""
    plt = _pyplot()
    s = plan.samples
    fig, (ax_q, ax_p) = plt.subplots(2, 1, figsize=(12, 7), sharex=True)
    q = np.degrees(s.joints_rad)
    pulses = arm.pulses_us(s.joints_rad, check=False)
    for j, name in enumerate(JOINT_NAMES):
        lo, hi = np.degrees(arm.limits_rad[j])
        ax_q.plot(s.t_s, q[:, j], color=_JOINT_COLOURS[j], lw=1.5, label=f"{name} [{lo:g}, {hi:g}]")
        ax_p.plot(s.t_s, pulses[:, j], color=_JOINT_COLOURS[j], lw=1.5, label=f"{name} (ch {arm.servos[j].channel})")
    grip = cell.arm.gripper
    ax_p.step(s.t_s, np.where(s.gripper_closed, grip.closed_us, grip.open_us), where="post",
              color="0.4", lw=1.2, ls="--", label=f"gripper (ch {grip.channel})")
    for pick_no, pick in enumerate(plan.picks):
        if pick_no % 2 == 0:
            for ax in (ax_q, ax_p):
                ax.axvspan(pick.start_s, pick.start_s + pick.duration_s, color="0.93", zorder=0)
        ax_q.annotate(f"{pick.part_id}\u2192{pick.bin_name}", (pick.start_s, 1.0), xycoords=("data", "axes fraction"),
                      xytext=(2, -10), textcoords="offset points", fontsize=7)
    for t0, kind, _ in _segment_starts(plan):
        for ax in (ax_q, ax_p):
            ax.axvline(t0, color="0.75", lw=0.5, zorder=0)
    ax_q.set_ylabel("joint angle (deg)")
    ax_p.set_ylabel("pulse (us)")
    ax_p.set_xlabel("time (s)")
    ax_q.legend(loc="upper right", fontsize=8)
    ax_p.legend(loc="upper right", fontsize=8)
    ax_q.set_title(f"{cell.cell}: {len(plan.picks)} picks, cycle {plan.cycle_s:.2f} s "
                   f"(thin lines: segment starts; shaded: alternate picks)")
    fig.tight_layout()
    with atomic_output(out_path) as tmp:
        fig.savefig(tmp, dpi=100)
    plt.close(fig)


def draw_path_plot(plan, cell, arm, out_path) -> None:
    """Tool path from above (x up, +y left, as the camera sees it) and from the side (r, z)."""
    plt = _pyplot()
    s = plan.samples
    fig, (top, side) = plt.subplots(1, 2, figsize=(13, 6), gridspec_kw={"width_ratios": [1.1, 1]})
    wa = np.array(cell.work_area + cell.work_area[:1])
    top.plot(wa[:, 1], wa[:, 0], "k-", lw=1, label="work area")
    top.plot(s.xyz_mm[:, 1], s.xyz_mm[:, 0], "-", color="#1f77b4", lw=1.2, label="tool path")
    closed = s.gripper_closed
    top.plot(np.where(closed, s.xyz_mm[:, 1], np.nan), np.where(closed, s.xyz_mm[:, 0], np.nan), "-",
             color="#ff7f0e", lw=2.2, label="carrying a part")
    for name, b in cell.bins.items():
        top.plot(b.y, b.x, "s", ms=16, mfc="none", mec="0.35", mew=2)
        top.annotate(name, (b.y, b.x), xytext=(0, -18), textcoords="offset points", ha="center", fontsize=8)
    for o in plan.parts:
        x, y = o.part.xy_mm
        if o.status is PickStatus.PLANNED:
            top.plot(y, x, "o", color=_PLANNED, ms=8)
            top.annotate(o.part.id, (y, x), xytext=(5, 5), textcoords="offset points", fontsize=8)
        else:
            top.plot(y, x, "x", color=_REJECTED, ms=10, mew=3)
            top.annotate(f"{o.part.id}: {o.rejection.label}", (y, x), xytext=(5, 5), textcoords="offset points",
                         fontsize=8, color=_REJECTED)
    for zone in cell.keep_out:
        if zone.shape == "cylinder":
            t = np.linspace(0, 2 * np.pi, 60)
            top.fill(zone.y + zone.radius_mm * np.sin(t), zone.x + zone.radius_mm * np.cos(t), color="#ff7f0e", alpha=0.3)
    top.plot(0, 0, "k+", ms=12, mew=2)
    top.invert_xaxis()
    top.set_aspect("equal")
    top.set_xlabel("y (mm, +y to the left)")
    top.set_ylabel("x (mm)")
    top.set_title("tool path from above")
    top.legend(loc="lower left", fontsize=8)
    r = np.hypot(s.xyz_mm[:, 0], s.xyz_mm[:, 1])
    side.plot(r, s.xyz_mm[:, 2], "-", color="#1f77b4", lw=1.2)
    side.plot(np.where(closed, r, np.nan), np.where(closed, s.xyz_mm[:, 2], np.nan), "-", color="#ff7f0e", lw=2.2)
    side.axhline(0, color="0.3", lw=2)
    side.axhline(cell.motion.safe_z_mm, color="0.6", ls="--", lw=1)
    side.annotate(f"safe z={cell.motion.safe_z_mm:g}", (r.max() if len(r) else 0, cell.motion.safe_z_mm),
                  ha="right", va="bottom", fontsize=8)
    side.set_aspect("equal")
    side.set_xlabel("r (mm from base axis)")
    side.set_ylabel("z (mm)")
    side.set_title("tool path from the side (all base angles)")
    fig.tight_layout()
    with atomic_output(out_path) as tmp:
        fig.savefig(tmp, dpi=100)
    plt.close(fig)
