"""The held part: from grip to release the part hangs below the tool and is checked like a link.

A part gripped ``grip_depth_mm`` below its top hangs ``height_mm - grip_depth_mm`` below the tool point
and reaches ``grip_depth_mm`` above it. Its footprint (a box's rectangle, a cylinder's circle as a
circumscribed 8-gon) is centred on the tool point and turns with the base (the tool is level and turns
with the base only). On every sample where the gripper holds it (the lift off the table, the carry, the
descent into its tray) it must stay

- above the table and every tray floor by the cell's ``floor_clearance_mm`` (its own lift starts on the
  table, so the lift is only kept from going below it; the carry stays above the highest tray floor,
  since the cell file gives no tray sizes; the descent into its tray stays above that tray's floor),
- out of every keep-out zone,
- out of the raised markers' boxes (the marker paper's footprint, from the table up to the marker's z),
- out of the other parts still on the table (their footprints up to their heights),

each "out of" with the clearance above the obstacle's top. Separation in the table plane is tested on
the axes of both outlines (separating axis theorem, Gottschalk, Lin & Manocha, "OBBTree", SIGGRAPH
1996): :func:`_separated_xy` for one obstacle, and :mod:`planning.heldcheck` (``held_part_failure``)
over a whole chain's samples and all obstacles at once, pruned by boxes and z ranges first. Heights the planner adapts are computed here too
(:func:`pick_heights`), and :func:`class_carry_problems` says, for ``validate`` and the planner alike,
which part class cannot be carried at all.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.planning.arm import Arm, Reason
from gripsight.planning.errors import Problem
from gripsight.planning.targets import PartTarget

__all__ = ["Obstacle", "PickHeights", "footprint_outline_mm", "static_obstacles", "part_obstacle",
           "pick_heights", "class_carry_problems"]

_ROUND_SIDES = 8     # a circle as the regular 8-gon around it (conservative: contains the circle)


@dataclass(frozen=True)
class Obstacle:
    """A convex prism standing on the table frame: outline (K, 2) mm, from ``z_lo_mm`` to ``z_hi_mm``."""

    name: str
    outline_xy_mm: np.ndarray
    z_lo_mm: float
    z_hi_mm: float
    clearance_mm: float = 0.0      # the held part must pass this far above its top


@dataclass(frozen=True)
class PickHeights:
    """The tool heights of one pick (mm): above the part, grip, carry, release."""

    approach_z_mm: float
    grip_z_mm: float
    carry_z_mm: float
    release_z_mm: float
    hang_mm: float


def footprint_outline_mm(length_mm: float, width_mm: float, yaw_deg: float, round_: bool) -> np.ndarray:
    """A footprint's convex outline around its centre, (K, 2) mm, counter-clockwise."""
    if round_:
        r = 0.5 * width_mm / np.cos(np.pi / _ROUND_SIDES)
        a = np.arange(_ROUND_SIDES) * 2 * np.pi / _ROUND_SIDES
        return np.column_stack([r * np.cos(a), r * np.sin(a)])
    yaw = np.radians(yaw_deg)
    u, v = np.array([np.cos(yaw), np.sin(yaw)]), np.array([-np.sin(yaw), np.cos(yaw)])
    corners = np.array([[-1, -1], [1, -1], [1, 1], [-1, 1]], float) * 0.5
    return corners[:, :1] * length_mm * u + corners[:, 1:] * width_mm * v


def part_obstacle(part: PartTarget, clearance_mm: float) -> Obstacle:
    """A part on the table as an obstacle: its footprint from the table to its height."""
    outline = footprint_outline_mm(part.length_mm, part.width_mm, part.yaw_deg, part.round) + np.asarray(part.xy_mm)
    return Obstacle(f"part {part.id}", outline, -np.inf, float(part.height_mm), clearance_mm)


def static_obstacles(cell) -> list[Obstacle]:
    """The cell's keep-out zones and raised markers' boxes (markers with z > 0: the marker paper, side
    ``size_mm + 2 margin_mm``, turned by its yaw, from the table up to z)."""
    out = []
    clearance = cell.motion.floor_clearance_mm
    for zone in cell.keep_out:
        if zone.shape == "cylinder":
            outline = footprint_outline_mm(2 * zone.radius_mm, 2 * zone.radius_mm, 0.0, True) + [zone.x, zone.y]
            out.append(Obstacle(f"keep-out zone '{zone.name}'", outline, -np.inf, float(zone.top_mm)))
        else:
            (x0, y0, z0), (x1, y1, z1) = zone.min_mm, zone.max_mm
            outline = np.array([[x0, y0], [x1, y0], [x1, y1], [x0, y1]], float)
            out.append(Obstacle(f"keep-out zone '{zone.name}'", outline, float(z0), float(z1)))
    side = cell.markers.size_mm + 2 * cell.markers.margin_mm
    for marker_id, m in cell.markers.layout.items():
        if m.z > 0:
            outline = footprint_outline_mm(side, side, m.yaw_deg, False) + [m.x, m.y]
            out.append(Obstacle(f"raised marker {marker_id}", outline, -np.inf, float(m.z), clearance))
    return out


def _carry_floor_mm(cell, tallest_other_mm: float) -> float:
    """The highest thing the carried part may pass over: the table, tray floors, raised markers, other parts."""
    tops = [0.0, tallest_other_mm]
    tops += [b.z for b in cell.bins.values()]
    tops += [m.z for m in cell.markers.layout.values()]
    return float(max(tops))


def pick_heights(cell, height_mm: float, bin_name: str, tallest_other_mm: float) -> PickHeights:
    """The tool heights a pick of a part ``height_mm`` tall uses, adapted to what it holds.

    - approach: ``safe_z_mm``, or higher so the open jaws (at the tool point) pass over the part's top;
    - carry (lift, transfer, above the tray): ``safe_z_mm``, or higher so the hanging part passes over
      the highest tray floor, raised marker and other part by ``floor_clearance_mm``;
    - release: ``bins.<name>.z + drop_z_mm``, or higher so the part's bottom stays ``floor_clearance_mm``
      above the tray floor (released just above it).
    """
    m = cell.motion
    clearance = m.floor_clearance_mm
    hang = float(height_mm - m.grip_depth_mm)
    floor_z = cell.bins[bin_name].z
    release = max(floor_z + m.drop_z_mm, floor_z + hang + clearance)
    carry = max(m.safe_z_mm, hang + clearance + _carry_floor_mm(cell, tallest_other_mm), release)
    approach = max(m.safe_z_mm, height_mm + clearance)
    return PickHeights(float(approach), float(height_mm - m.grip_depth_mm), float(carry), float(release), hang)


def _separated_xy(held_xy: np.ndarray, outline: np.ndarray) -> np.ndarray:
    """Per sample, True where the held outlines (M, n, 2) and one fixed outline (K, 2) are apart: some
    edge normal of either outline separates their projections (separating axis theorem)."""
    m = len(held_xy)
    e_held = np.roll(held_xy, -1, axis=1) - held_xy
    e_obs = np.roll(outline, -1, axis=0) - outline
    axes = np.concatenate([np.stack([-e_held[..., 1], e_held[..., 0]], -1),
                           np.broadcast_to(np.stack([-e_obs[:, 1], e_obs[:, 0]], -1), (m, len(outline), 2))], axis=1)
    p = np.einsum("mai,mni->man", axes, held_xy)
    q = np.einsum("mai,ki->mak", axes, outline)
    return ((p.max(-1) <= q.min(-1)) | (q.max(-1) <= p.min(-1))).any(-1)


def class_carry_problems(cell, arm: Arm) -> list[Problem]:
    """Part classes the arm cannot carry at all, each naming ``parts.<class>.height_mm``: with the
    heights of :func:`pick_heights` (no other part on the table: the least a pick needs), the class's tray
    must be reachable at carry and release height, and some point of the work area at approach and
    carry height."""
    from gripsight.planning.reach import radial_reach

    problems: list[Problem] = []
    heights = {name: p.height_mm for name, p in cell.parts.items()}
    work = np.asarray(cell.work_area, float)
    edges = np.concatenate([work[i] + np.linspace(0, 1, 50)[:, None] * (work[(i + 1) % len(work)] - work[i])
                            for i in range(len(work))]) if len(work) else np.zeros((0, 2))
    r_work = np.hypot(*(edges - np.asarray(arm.base_xy_mm, float)).T) if len(edges) else np.zeros(0)   # from the base axis
    for name, height in heights.items():
        if height <= cell.motion.grip_depth_mm:
            continue                          # the cell file's own check names this one
        bin_name = name if name in cell.bins else "reject" if "reject" in cell.bins else None
        if bin_name is None:
            continue
        h = pick_heights(cell, height, bin_name, 0.0)
        b = cell.bins[bin_name]
        pts = np.array([[b.x, b.y, h.carry_z_mm], [b.x, b.y, h.release_z_mm]], float)
        sol = arm.inverse(pts)
        what = None
        for (label, z), code in zip((("carry", h.carry_z_mm), ("release", h.release_z_mm)), sol.reason):
            if code != Reason.OK and what is None:
                what = f"its tray '{bin_name}' at {label} height z={z:.0f} mm is out of reach ({Reason(int(code)).label})"
        if what is None and len(r_work):
            for label, z in (("approach", h.approach_z_mm), ("carry", h.carry_z_mm)):
                rr = radial_reach(arm, z, step_mm=1.0)
                if rr.r_min_mm is None or r_work.max() < rr.r_min_mm or r_work.min() > rr.r_max_mm:
                    span = "nothing" if rr.r_min_mm is None else f"r {rr.r_min_mm:.0f}-{rr.r_max_mm:.0f} mm"
                    what = f"no point of the work area is reachable at {label} height z={z:.0f} mm (reachable: {span})"
                    break
        if what is not None:
            problems.append(Problem(f"parts.{name}.height_mm",
                                    f"a part {height:g} mm tall hangs {h.hang_mm:g} mm below the tool; {what}; "
                                    f"this class cannot be carried (lower the part or raise the trays' reach)"))
    return problems
