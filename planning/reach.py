"""The reachable region of an arm: radial limits, grids for drawing, and cell places it cannot reach.

Pure numpy over :class:`planning.arm.Arm`; the drawing is in :mod:`planning.reach_plot`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from gripsight.planning.arm import Arm, Reason

__all__ = ["RadialReach", "Unreachable", "radial_reach", "reachable_xy", "reachable_rz",
           "lowest_grip_z_mm", "unreachable_places"]


@dataclass(frozen=True)
class RadialReach:
    """Closest and farthest reachable radius (mm) at one tool height, along the base's zero direction."""

    z_mm: float
    r_min_mm: float | None
    r_max_mm: float | None

    def describe(self) -> str:
        if self.r_min_mm is None:
            return f"z={self.z_mm:g} mm: nothing reachable"
        return f"z={self.z_mm:g} mm: r {self.r_min_mm:.1f}-{self.r_max_mm:.1f} mm"


@dataclass(frozen=True)
class Unreachable:
    """A bin or work-area corner the tool cannot reach at a height it needs."""

    what: str
    xyz_mm: tuple[float, float, float]
    reason: str

    def describe(self) -> str:
        x, y, z = self.xyz_mm
        return f"{self.what} at ({x:.0f}, {y:.0f}) mm, z={z:.0f} mm: {self.reason}"


def _max_radius_mm(arm: Arm) -> float:
    return (abs(arm.shoulder_offset_mm) + arm.upper_arm_mm + arm.forearm_mm
            + abs(arm.tool_reach_mm) + abs(arm.tool_drop_mm) + 1.0)


def radial_reach(arm: Arm, z_mm: float, step_mm: float = 0.05) -> RadialReach:
    """Smallest and largest reachable radius from the base axis at tool height ``z_mm`` (limits applied)."""
    r = np.arange(0.0, _max_radius_mm(arm), step_mm)
    ok = arm.inverse(_from_base_along_x(arm, r, np.full_like(r, z_mm))).ok
    if not ok.any():
        return RadialReach(z_mm, None, None)
    return RadialReach(z_mm, float(r[ok].min()), float(r[ok].max()))


def reachable_xy(arm: Arm, x_mm: np.ndarray, y_mm: np.ndarray, z_mm: float) -> np.ndarray:
    """Mask of reachable table points at height ``z_mm`` on the grid ``x_mm`` x ``y_mm``, shape (ny, nx)."""
    xx, yy = np.meshgrid(np.asarray(x_mm, float), np.asarray(y_mm, float))
    pts = np.column_stack([xx.ravel(), yy.ravel(), np.full(xx.size, float(z_mm))])
    return arm.inverse(pts).ok.reshape(xx.shape)


def reachable_rz(arm: Arm, r_mm: np.ndarray, z_mm: np.ndarray) -> np.ndarray:
    """Mask of reachable (r, z) points in the arm's vertical plane (r from the base axis, along the
    table's +x), shape (nz, nr)."""
    rr, zz = np.meshgrid(np.asarray(r_mm, float), np.asarray(z_mm, float))
    return arm.inverse(_from_base_along_x(arm, rr.ravel(), zz.ravel())).ok.reshape(rr.shape)


def _from_base_along_x(arm: Arm, r_mm: np.ndarray, z_mm: np.ndarray) -> np.ndarray:
    """Table points (N, 3) at radii ``r_mm`` from the base axis along the table's +x, heights ``z_mm``."""
    bx, by = arm.base_xy_mm
    return np.column_stack([bx + r_mm, np.full(len(r_mm), float(by)), z_mm])


def lowest_grip_z_mm(cell) -> float:
    """Lowest tool height a pick needs: min over classes of (height - grip depth); 0 with no classes."""
    heights = [p.height_mm - cell.motion.grip_depth_mm for p in cell.parts.values()]
    return float(min(heights)) if heights else 0.0


def unreachable_places(cell, arm: Arm) -> list[Unreachable]:
    """Bins (at drop and safe height) and work-area corners (at grip and safe height) out of reach."""
    motion = cell.motion
    places: list[tuple[str, tuple[float, float, float]]] = []
    for name, b in cell.bins.items():
        places.append((f"bin {name}", (b.x, b.y, b.z + motion.drop_z_mm)))
        places.append((f"bin {name}", (b.x, b.y, motion.safe_z_mm)))
    grip_z = lowest_grip_z_mm(cell)
    for i, (x, y) in enumerate(cell.work_area):
        places.append((f"work-area corner {i}", (x, y, grip_z)))
        places.append((f"work-area corner {i}", (x, y, motion.safe_z_mm)))
    sol = arm.inverse(np.array([p for _, p in places], dtype=float))
    return [Unreachable(what, xyz, Reason(int(code)).label)
            for (what, xyz), code in zip(places, sol.reason) if code != Reason.OK]
