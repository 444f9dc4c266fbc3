"""Draw the reachable region: a top view and a side view, with work area, markers and bins."""

from __future__ import annotations

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.planning.reach import lowest_grip_z_mm, reachable_rz, reachable_xy, unreachable_places

__all__ = ["draw_reach"]

# our palette: reachable at transfer height, reachable at grip height, problems
_SAFE_COLOUR = "#9ecae1"
_GRIP_COLOUR = "#3182bd"
_BAD_COLOUR = "#d62728"


def _marker_outline(x, y, yaw_deg, side):
    h = side / 2.0
    corners = np.array([[h, h], [h, -h], [-h, -h], [-h, h], [h, h]])  # (x, y) in the marker frame
    c, s = np.cos(np.radians(yaw_deg)), np.sin(np.radians(yaw_deg))
    return corners @ np.array([[c, s], [-s, c]]) + [x, y]


def draw_reach(cell, arm: Arm, out_path, resolution_mm: float = 2.0) -> None:
    """Write a PNG with the top view (x up, +y left, as the overhead camera sees it) and a side view."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    motion = cell.motion
    grip_z = lowest_grip_z_mm(cell)
    layout = cell.markers.layout
    base_xy = np.array(arm.base_xy_mm, float)           # the base axis in the table frame (arm-fit moves it)
    xs = [p[0] for p in cell.work_area] + [m.x for m in layout.values()] + [b.x for b in cell.bins.values()] + [base_xy[0]]
    ys = [p[1] for p in cell.work_area] + [m.y for m in layout.values()] + [b.y for b in cell.bins.values()] + [base_xy[1]]
    pad = cell.markers.size_mm + 40.0
    x_grid = np.arange(min(xs) - pad, max(xs) + pad, resolution_mm)
    y_grid = np.arange(min(ys) - pad, max(ys) + pad, resolution_mm)
    # rows along x (drawn upward), columns along y
    safe_ok = reachable_xy(arm, x_grid, y_grid, motion.safe_z_mm).T
    grip_ok = reachable_xy(arm, x_grid, y_grid, grip_z).T
    bad = unreachable_places(cell, arm)

    fig, (top, side) = plt.subplots(1, 2, figsize=(13, 6.5), gridspec_kw={"width_ratios": [1.15, 1]})
    extent = (y_grid[0], y_grid[-1], x_grid[0], x_grid[-1])
    both = np.zeros(safe_ok.shape + (4,))
    both[safe_ok] = matplotlib.colors.to_rgba(_SAFE_COLOUR, 1.0)
    both[grip_ok] = matplotlib.colors.to_rgba(_GRIP_COLOUR, 0.8)
    top.imshow(both, origin="lower", extent=extent, interpolation="nearest")
    wa = np.array(cell.work_area + cell.work_area[:1])
    top.plot(wa[:, 1], wa[:, 0], "-", color="black", lw=1.5, label="work area")
    for marker_id, m in layout.items():
        outline = _marker_outline(m.x, m.y, m.yaw_deg, cell.markers.size_mm)
        top.fill(outline[:, 1], outline[:, 0], color="0.15" if m.z == 0 else "0.45")
        top.annotate(f"{marker_id}" + (f" z{m.z:g}" if m.z else ""), (m.y, m.x), color="white",
                     ha="center", va="center", fontsize=7)
    for name, b in cell.bins.items():
        top.plot(b.y, b.x, "s", ms=14, mfc="none", mec="#555555", mew=2)
        top.annotate(name, (b.y, b.x), xytext=(0, -16), textcoords="offset points", ha="center", fontsize=8)
    for zone in cell.keep_out:
        if zone.shape == "cylinder":
            t = np.linspace(0, 2 * np.pi, 60)
            top.fill(zone.y + zone.radius_mm * np.sin(t), zone.x + zone.radius_mm * np.cos(t),
                     color="#ff7f0e", alpha=0.35, hatch="//")
        else:
            (x0, y0, _), (x1, y1, _) = zone.min_mm, zone.max_mm
            top.fill([y0, y1, y1, y0], [x0, x0, x1, x1], color="#ff7f0e", alpha=0.35, hatch="//")
    for u in bad:
        top.plot(u.xyz_mm[1], u.xyz_mm[0], "x", color=_BAD_COLOUR, ms=12, mew=3)
    top.plot(base_xy[1], base_xy[0], "k+", ms=12, mew=2)
    top.set_xlim(y_grid[-1], y_grid[0])  # +y to the left, as seen from above with +x up
    top.set_ylim(x_grid[0], x_grid[-1])
    top.set_aspect("equal")
    top.set_xlabel("y (mm, +y to the left)")
    top.set_ylabel("x (mm)")
    top.set_title(f"{cell.cell}: top view")
    handles = [matplotlib.patches.Patch(color=_SAFE_COLOUR, label=f"reachable at safe z={motion.safe_z_mm:g}"),
               matplotlib.patches.Patch(color=_GRIP_COLOUR, alpha=0.8, label=f"reachable at grip z={grip_z:g} (and safe z)"),
               matplotlib.lines.Line2D([], [], color="black", label="work area"),
               matplotlib.lines.Line2D([], [], marker="x", ls="", color=_BAD_COLOUR, mew=3, label="cannot reach")]
    top.legend(handles=handles, loc="lower left", fontsize=8, framealpha=0.9)

    r_max = max(np.hypot(np.array(xs) - base_xy[0], np.array(ys) - base_xy[1]).max(),
                arm.upper_arm_mm + arm.forearm_mm) + pad
    r_grid = np.arange(0.0, r_max, resolution_mm)
    z_grid = np.arange(-20.0, arm.base_height_mm + arm.upper_arm_mm + arm.forearm_mm + 20.0, resolution_mm)
    rz_ok = reachable_rz(arm, r_grid, z_grid)
    img = np.zeros(rz_ok.shape + (4,))
    img[rz_ok] = matplotlib.colors.to_rgba(_GRIP_COLOUR, 0.5)
    side.imshow(img, origin="lower", extent=(r_grid[0], r_grid[-1], z_grid[0], z_grid[-1]), interpolation="nearest")
    side.axhline(0, color="0.3", lw=2)
    side.axhline(motion.safe_z_mm, color=_SAFE_COLOUR, lw=1.5, ls="--")
    side.annotate(f"safe z={motion.safe_z_mm:g}", (r_grid[-1], motion.safe_z_mm), ha="right", va="bottom", fontsize=8)
    side.axhline(grip_z, color=_GRIP_COLOUR, lw=1, ls=":")
    wa_r = np.hypot(wa[:, 0] - base_xy[0], wa[:, 1] - base_xy[1])
    r_near = _polygon_min_radius(np.array(cell.work_area) - base_xy)
    side.plot([r_near, wa_r.max()], [-8, -8], color="black", lw=4, solid_capstyle="butt")
    side.annotate("work area (radial span)", (r_near, -14), fontsize=8, va="top")
    by_place: dict[tuple[float, float], list[str]] = {}
    for name, b in cell.bins.items():
        key = (round(float(np.hypot(b.x - base_xy[0], b.y - base_xy[1]))), round(b.z + motion.drop_z_mm))
        by_place.setdefault(key, []).append(name)
    for (r_b, z_b), names in by_place.items():
        side.plot([r_b], [z_b], "v", color="#555555")
        side.annotate("/".join(names), (r_b, z_b), xytext=(0, 6), textcoords="offset points",
                      ha="center", fontsize=7, rotation=60)
    home = np.radians([[cell.motion.home_deg.base, cell.motion.home_deg.shoulder, cell.motion.home_deg.elbow]])
    r_chain, z_chain = arm.chain_rz_mm(home)                 # shoulder, elbow, wrist
    tool = arm.forward(home)
    chain_r = [0, 0, *r_chain[0], float(np.hypot(*(tool[0, :2] - base_xy)))]
    chain_z = [0, arm.base_height_mm, *z_chain[0], tool[0, 2]]
    side.plot(chain_r, chain_z, "-o", color="0.2", lw=2, ms=4, label="home pose")
    side.set_aspect("equal")
    side.set_xlim(-30, r_grid[-1])
    side.set_ylim(-30, z_grid[-1])
    side.set_xlabel("r (mm from base axis)")
    side.set_ylabel("z (mm)")
    side.set_title("side view (any base angle)")
    side.legend(loc="upper right", fontsize=8)
    fig.tight_layout()
    fig.savefig(out_path, dpi=110)
    plt.close(fig)


def _polygon_min_radius(poly_xy: np.ndarray) -> float:
    """Distance from the origin (the base axis: give the polygon relative to it) to the nearest point of a
    polygon (0 if it contains it)."""
    a = poly_xy
    b = np.roll(poly_xy, -1, axis=0)
    ab = b - a
    t = np.clip(np.einsum("ij,ij->i", -a, ab) / np.einsum("ij,ij->i", ab, ab), 0.0, 1.0)
    closest = a + t[:, None] * ab
    return float(np.hypot(closest[:, 0], closest[:, 1]).min())
