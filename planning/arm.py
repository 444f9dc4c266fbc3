"""Arm geometry: forward and inverse kinematics for three elbow linkages, vectorised over N poses.

Joints (angles in radians inside, degrees at the edges):

- ``base``: yaw about the table's z axis, 0 along +x, positive toward +y.
- ``shoulder``: upper-arm elevation above horizontal.
- ``elbow``: the elbow servo's angle. The forearm's absolute elevation psi depends on the linkage:
  ``serial`` psi = shoulder + elbow; ``parallel`` psi = elbow (parallelogram drive);
  ``four_bar`` psi from the closure of :class:`planning.linkage.FourBar` with elbow = crank angle.

Forward kinematics, in the arm's vertical plane (r radial, z up), with u(t) = (cos t, sin t)::

    wrist = (shoulder_offset, base_height) + L2 u(shoulder) + L3 u(psi)
    tool  = wrist + (reach, -drop)                           tool kept level
    tool  = wrist + reach u(psi) - drop u(psi + 90 deg)      tool fixed to the forearm
    x, y  = base_x + r cos(base), base_y + r sin(base)

``base_xy_mm`` is where the base axis stands in the table (markers') frame: (0, 0) unless a fit from
photos of the gripper marker (:mod:`planning.armfit`) found it elsewhere.

Inverse kinematics is closed form (law of cosines on the shoulder-wrist triangle), elbow ``up`` (the
elbow above the shoulder-to-wrist line) or ``down``. Every target gets a :class:`Reason`; angles are
kept for targets that only fail a limit (so a report can quote the value) and are NaN where no
geometric solution exists (``out_of_reach``, ``linkage_cannot_assemble``).
"""

from __future__ import annotations

from dataclasses import dataclass
from enum import Enum, IntEnum

import numpy as np

from gripsight.planning.angles import wrap_angle
from gripsight.planning.linkage import FourBar, grashof_class
from gripsight.planning.points import as_n_by_3
from gripsight.planning.servo import ServoMap

__all__ = ["Arm", "Branch", "IKSolution", "Linkage", "Reason", "JOINT_NAMES"]

JOINT_NAMES = ("base", "shoulder", "elbow")
_LIMIT_TOL_RAD = 1e-9


class Linkage(str, Enum):
    SERIAL = "serial"
    PARALLEL = "parallel"
    FOUR_BAR = "four_bar"


class Branch(str, Enum):
    UP = "up"
    DOWN = "down"


class Reason(IntEnum):
    """Why a pose cannot be used; ``OK`` if it can. ``label`` is the text used in outputs."""

    OK = 0
    OUT_OF_REACH = 1
    LINKAGE_CANNOT_ASSEMBLE = 2
    ELBOW_INTERIOR = 3
    JOINT_LIMIT_BASE = 4
    JOINT_LIMIT_SHOULDER = 5
    JOINT_LIMIT_ELBOW = 6

    @property
    def label(self) -> str:
        return {
            0: "ok", 1: "out_of_reach", 2: "linkage_cannot_assemble", 3: "elbow_interior",
            4: "joint_limit:base", 5: "joint_limit:shoulder", 6: "joint_limit:elbow",
        }[int(self)]


_JOINT_LIMIT_REASONS = (Reason.JOINT_LIMIT_BASE, Reason.JOINT_LIMIT_SHOULDER, Reason.JOINT_LIMIT_ELBOW)


def _first_reason(failures) -> np.ndarray:
    """Per pose, the code of the first failing check, 0 (OK) where none fails: ``failures`` is (code,
    mask (N,)) in priority order; one argmax over the stacked masks instead of a where per check."""
    masks = np.vstack([m for _, m in failures] + [np.ones_like(failures[0][1], bool)])
    codes = np.array([int(c) for c, _ in failures] + [int(Reason.OK)], np.int8)
    return codes[masks.argmax(axis=0)]


@dataclass(frozen=True)
class IKSolution:
    """Result of :meth:`Arm.inverse` for N targets.

    Attributes
    ----------
    joints_rad : ndarray, shape (N, 3)
        base, shoulder, elbow servo angles in radians (NaN rows where no geometric solution exists).
    forearm_rad : ndarray, shape (N,)
        Absolute forearm elevation psi.
    reason : ndarray of int, shape (N,)
        :class:`Reason` codes; 0 where the pose is usable.
    """

    joints_rad: np.ndarray
    forearm_rad: np.ndarray
    reason: np.ndarray

    @property
    def ok(self) -> np.ndarray:
        return self.reason == Reason.OK

    @property
    def joints_deg(self) -> np.ndarray:
        return np.degrees(self.joints_rad)

    def reason_labels(self) -> list[str]:
        return [Reason(int(r)).label for r in self.reason]


@dataclass(frozen=True)
class Arm:
    """A three-joint tabletop arm. Build it from the cell file with :meth:`from_config`."""

    base_height_mm: float
    shoulder_offset_mm: float
    upper_arm_mm: float
    forearm_mm: float
    tool_reach_mm: float
    tool_drop_mm: float
    tool_level: bool
    linkage: Linkage
    limits_rad: np.ndarray              # (3, 2) min, max per joint
    elbow_interior_rad: tuple[float, float]
    branch: Branch = Branch.UP
    four_bar: FourBar | None = None
    servos: tuple[ServoMap, ...] = ()
    max_speed_rad_s: np.ndarray | None = None
    base_xy_mm: tuple[float, float] = (0.0, 0.0)

    @classmethod
    def from_config(cls, arm_cfg) -> "Arm":
        """Build from a validated ``ArmConfig`` (see :mod:`planning.config`)."""
        joints = [getattr(arm_cfg.joints, n) for n in JOINT_NAMES]
        link = arm_cfg.linkage
        four_bar = None
        if link.type == "four_bar":
            four_bar = FourBar(arm_cfg.upper_arm_mm, link.crank_mm, link.coupler_mm, link.rocker_mm,
                               crossed=link.assembly == "crossed")
        return cls(
            base_height_mm=arm_cfg.base_height_mm,
            shoulder_offset_mm=arm_cfg.shoulder_offset_mm,
            upper_arm_mm=arm_cfg.upper_arm_mm,
            forearm_mm=arm_cfg.forearm_mm,
            tool_reach_mm=arm_cfg.tool.reach_mm,
            tool_drop_mm=arm_cfg.tool.drop_mm,
            tool_level=arm_cfg.tool.level,
            linkage=Linkage(link.type),
            limits_rad=np.radians([[j.min_deg, j.max_deg] for j in joints]),
            elbow_interior_rad=tuple(np.radians(arm_cfg.elbow_interior_deg)),
            branch=Branch(arm_cfg.elbow),
            four_bar=four_bar,
            servos=tuple(ServoMap.from_config(n, j.servo) for n, j in zip(JOINT_NAMES, joints)),
            max_speed_rad_s=np.radians([j.max_speed_deg_s for j in joints]),
            base_xy_mm=(float(arm_cfg.base_xy_mm[0]), float(arm_cfg.base_xy_mm[1])),
        )

    # ------------------------------------------------------------ linkage
    def forearm_rad(self, shoulder_rad, elbow_rad) -> np.ndarray:
        """Absolute forearm elevation psi from the shoulder and elbow servo angles (NaN: cannot assemble)."""
        th1 = np.asarray(shoulder_rad, dtype=float)
        th2 = np.asarray(elbow_rad, dtype=float)
        if self.linkage is Linkage.SERIAL:
            return th1 + th2
        if self.linkage is Linkage.PARALLEL:
            return th2 + 0.0 * th1
        return self.four_bar.forearm_rad(th1, th2)

    def elbow_servo_rad(self, shoulder_rad, forearm_rad) -> np.ndarray:
        """Elbow servo angle that gives forearm elevation psi (NaN: cannot assemble)."""
        th1 = np.asarray(shoulder_rad, dtype=float)
        psi = np.asarray(forearm_rad, dtype=float)
        if self.linkage is Linkage.SERIAL:
            return wrap_angle(psi - th1)
        if self.linkage is Linkage.PARALLEL:
            return psi + 0.0 * th1
        return self.four_bar.crank_rad(th1, psi)

    def elbow_interior_angle_rad(self, shoulder_rad, forearm_rad) -> np.ndarray:
        """Angle at the elbow between upper arm and forearm: pi - |psi - shoulder| (pi = straight)."""
        return np.pi - np.abs(wrap_angle(np.asarray(forearm_rad) - np.asarray(shoulder_rad)))

    def grashof(self) -> str | None:
        """Grashof class of the elbow four-bar (``None`` for a serial elbow)."""
        if self.linkage is Linkage.FOUR_BAR:
            fb = self.four_bar
            return grashof_class(fb.upper_arm_mm, fb.crank_mm, fb.coupler_mm, fb.rocker_mm)
        if self.linkage is Linkage.PARALLEL:
            return "change-point"
        return None

    # ------------------------------------------------------------ forward
    def _tool_offset(self, psi):
        if self.tool_level:
            return np.full_like(psi, self.tool_reach_mm), np.full_like(psi, -self.tool_drop_mm)
        c, s = np.cos(psi), np.sin(psi)
        return self.tool_reach_mm * c + self.tool_drop_mm * s, self.tool_reach_mm * s - self.tool_drop_mm * c

    def forward(self, joints_rad) -> np.ndarray:
        """Tool point in the table frame for joint angles.

        Parameters
        ----------
        joints_rad : array_like, shape (N, 3)
            base, shoulder, elbow servo angles in radians.

        Returns
        -------
        ndarray, shape (N, 3)
            Tool point x, y, z in table mm (NaN rows where the linkage cannot assemble).
        """
        q = as_n_by_3(joints_rad, "joints_rad")
        psi = self.forearm_rad(q[:, 1], q[:, 2])
        return self._forward_psi(q[:, 0], q[:, 1], psi)

    def _forward_psi(self, base, shoulder, psi):
        tr, tz = self._tool_offset(psi)
        r = self.shoulder_offset_mm + self.upper_arm_mm * np.cos(shoulder) + self.forearm_mm * np.cos(psi) + tr
        z = self.base_height_mm + self.upper_arm_mm * np.sin(shoulder) + self.forearm_mm * np.sin(psi) + tz
        bx, by = self.base_xy_mm
        return np.column_stack([bx + r * np.cos(base), by + r * np.sin(base), z])

    def chain_rz_mm(self, joints_rad) -> tuple[np.ndarray, np.ndarray]:
        """Shoulder, elbow and wrist in the arm's vertical plane: radius from the base axis and height,
        each shape (N, 3) (the whole arm lies in the half-plane at the base angle)."""
        q = as_n_by_3(joints_rad, "joints_rad")
        psi = self.forearm_rad(q[:, 1], q[:, 2])
        r = np.empty((len(q), 3))
        z = np.empty((len(q), 3))
        r[:, 0], z[:, 0] = self.shoulder_offset_mm, self.base_height_mm
        r[:, 1] = self.shoulder_offset_mm + self.upper_arm_mm * np.cos(q[:, 1])
        z[:, 1] = self.base_height_mm + self.upper_arm_mm * np.sin(q[:, 1])
        r[:, 2] = r[:, 1] + self.forearm_mm * np.cos(psi)
        z[:, 2] = z[:, 1] + self.forearm_mm * np.sin(psi)
        return r, z

    def elbow_wrist_mm(self, joints_rad) -> tuple[np.ndarray, np.ndarray]:
        """Elbow and wrist points in table mm, each shape (N, 3), for drawing."""
        q = as_n_by_3(joints_rad, "joints_rad")
        r, z = self.chain_rz_mm(q)
        c, s = np.cos(q[:, 0]), np.sin(q[:, 0])
        bx, by = self.base_xy_mm
        return tuple(np.column_stack([bx + r[:, k] * c, by + r[:, k] * s, z[:, k]]) for k in (1, 2))

    # ------------------------------------------------------------ inverse
    def inverse(self, xyz_mm, branch: Branch | str | None = None) -> IKSolution:
        """Joint angles that put the tool point at table points, in closed form.

        Parameters
        ----------
        xyz_mm : array_like, shape (N, 3)
            Tool targets in the table frame, mm.
        branch : Branch or {'up', 'down'}, optional
            Elbow branch; default the arm's configured one.

        Returns
        -------
        IKSolution
            Angles and a per-target :class:`Reason` (first failing of: out_of_reach,
            linkage_cannot_assemble, elbow_interior, joint_limit:base/shoulder/elbow).

        Notes
        -----
        A target on the base axis (r = 0) has no defined base yaw; 0 is used.
        """
        p = as_n_by_3(xyz_mm)
        branch = self.branch if branch is None else Branch(branch)
        x, y, z = p[:, 0] - self.base_xy_mm[0], p[:, 1] - self.base_xy_mm[1], p[:, 2]
        r = np.sqrt(x * x + y * y)                       # (np.hypot is several times slower)
        base = np.arctan2(y, x) * (r > 1e-9)
        l2 = self.upper_arm_mm
        if self.tool_level:
            wx = r - self.shoulder_offset_mm - self.tool_reach_mm
            wz = z + self.tool_drop_mm - self.base_height_mm
            l3, beta = self.forearm_mm, 0.0
        else:  # forearm and tool are one rigid link of length l3 at angle beta to the forearm
            along = self.forearm_mm + self.tool_reach_mm
            wx, wz = r - self.shoulder_offset_mm, z - self.base_height_mm
            l3, beta = float(np.hypot(along, self.tool_drop_mm)), float(np.arctan2(-self.tool_drop_mm, along))
        d2 = wx * wx + wz * wz
        d = np.sqrt(d2)
        with np.errstate(divide="ignore", invalid="ignore"):
            cos_a = (l2 * l2 + d2 - l3 * l3) / (2.0 * l2 * d)
        reachable = (np.abs(cos_a) <= 1.0 + 1e-12) & (d > 1e-9)
        alpha = np.arccos(np.clip(cos_a, -1.0, 1.0))
        sign = 1.0 if branch is Branch.UP else -1.0
        shoulder = np.arctan2(wz, wx) + sign * alpha
        psi = np.arctan2(wz - l2 * np.sin(shoulder), wx - l2 * np.cos(shoulder)) - beta
        shoulder, psi = wrap_angle(shoulder), wrap_angle(psi)
        elbow = self.elbow_servo_rad(shoulder, psi)

        reason = _first_reason([(Reason.OUT_OF_REACH, ~reachable), (Reason.LINKAGE_CANNOT_ASSEMBLE, np.isnan(elbow)),
                                *self._limit_failures(base, shoulder, psi, elbow)])
        joints = np.empty((len(p), 3))
        joints[:, 0], joints[:, 1], joints[:, 2] = base, shoulder, elbow
        joints[~reachable] = np.nan
        psi[~reachable] = np.nan
        return IKSolution(joints, psi, reason)

    def _limit_failures(self, base, shoulder, psi, elbow):
        """(reason, mask) pairs in priority order, for the limit checks after geometry."""
        lo_i, hi_i = self.elbow_interior_rad
        interior = self.elbow_interior_angle_rad(shoulder, psi)
        with np.errstate(invalid="ignore"):
            out = [(Reason.ELBOW_INTERIOR, ~((interior >= lo_i - _LIMIT_TOL_RAD) & (interior <= hi_i + _LIMIT_TOL_RAD)))]
            for code, value, (lo, hi) in zip(_JOINT_LIMIT_REASONS, (base, shoulder, elbow), self.limits_rad):
                out.append((code, ~((value >= lo - _LIMIT_TOL_RAD) & (value <= hi + _LIMIT_TOL_RAD))))
        return out

    def check_joints(self, joints_rad) -> np.ndarray:
        """Reason codes for joint-space poses (limits, interior stop, assembly), shape (N,)."""
        q = as_n_by_3(joints_rad, "joints_rad")
        psi = self.forearm_rad(q[:, 1], q[:, 2])
        return _first_reason([(Reason.LINKAGE_CANNOT_ASSEMBLE, np.isnan(psi)),
                              *self._limit_failures(q[:, 0], q[:, 1], psi, q[:, 2])])

    # ------------------------------------------------------------ servos
    def pulses_us(self, joints_rad, check: bool = True) -> np.ndarray:
        """Servo pulse widths for joint angles, shape (N, 3), via each joint's :class:`ServoMap`."""
        q = np.degrees(as_n_by_3(joints_rad, "joints_rad"))
        return np.column_stack([s.pulse_us_from_deg(q[:, i], check=check) for i, s in enumerate(self.servos)])
