"""Arm kinematics against outside references: roboticstoolbox-python DH models, scipy root finding,
the law of cosines; round trips over random poses for every linkage type and tool mounting."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import brentq

from gripsight.planning.angles import wrap_angle
from gripsight.planning.arm import Arm, Branch, Linkage, Reason
from gripsight.app.cellfile import parse_cell
from gripsight.planning.linkage import FourBar, grashof_class
from tests.conftest import cell_data_with_linkage

LINKAGES = ["serial", "parallel", "four_bar"]


def make_arm(kind: str, level: bool = True, **arm_overrides) -> Arm:
    data = cell_data_with_linkage(kind, level)
    data["arm"].update(arm_overrides)
    return Arm.from_config(parse_cell(data).arm)


def random_joint_poses(arm: Arm, n: int, rng) -> np.ndarray:
    """Random (base, shoulder, elbow servo) within the joint limits, radians."""
    lo, hi = arm.limits_rad[:, 0], arm.limits_rad[:, 1]
    return lo + (hi - lo) * rng.random((n, 3))


def reachable_targets(arm: Arm, n: int, rng) -> np.ndarray:
    """n random tool points the arm can reach: FK of random valid poses, kept only if IK accepts them."""
    out = []
    while sum(len(o) for o in out) < n:
        q = random_joint_poses(arm, 4 * n, rng)
        ok = arm.check_joints(q) == Reason.OK
        p = arm.forward(q[ok])
        out.append(p[arm.inverse(p).ok])
    return np.concatenate(out)[:n]


@pytest.mark.parametrize("level", [True, False], ids=["tool-level", "tool-on-forearm"])
@pytest.mark.parametrize("kind", LINKAGES)
def test_fk_of_ik_round_trip_10000_targets(kind, level):
    arm = make_arm(kind, level)
    rng = np.random.default_rng(0)
    targets = reachable_targets(arm, 10_000, rng)
    sol = arm.inverse(targets)
    assert sol.ok.all()
    err_mm = np.linalg.norm(arm.forward(sol.joints_rad) - targets, axis=1)
    assert err_mm.max() < 1e-6


@pytest.mark.parametrize("branch", ["up", "down"])
@pytest.mark.parametrize("level", [True, False], ids=["tool-level", "tool-on-forearm"])
@pytest.mark.parametrize("kind", LINKAGES)
def test_ik_of_fk_recovers_angles_on_the_chosen_branch(kind, level, branch):
    arm = make_arm(kind, level, elbow_interior_deg=[5, 175])
    rng = np.random.default_rng(1)
    q = random_joint_poses(arm, 20_000, rng)
    psi = arm.forearm_rad(q[:, 1], q[:, 2])
    beta = 0.0 if level else np.arctan2(-arm.tool_drop_mm, arm.forearm_mm + arm.tool_reach_mm)
    # Branch "up": the elbow is above the shoulder->tool-link line, i.e. psi + beta < shoulder.
    bend = wrap_angle(psi + beta - q[:, 1])
    on_branch = (bend < 0) if branch == "up" else (bend > 0)
    tool = arm.forward(q)
    # IK reaches over the front (r > 0); a tool point behind the base axis is the same point at base + 180.
    in_front = tool[:, 0] * np.cos(q[:, 0]) + tool[:, 1] * np.sin(q[:, 0]) > 1.0
    keep = (arm.check_joints(q) == Reason.OK) & on_branch & in_front
    if arm.four_bar is not None:  # two crank positions give each psi; IK returns the convex one
        keep &= arm.four_bar.convex_mask(q[:, 1], q[:, 2], psi)
    q = q[keep]
    assert len(q) > 1000
    sol = arm.inverse(arm.forward(q), branch=branch)
    ok = sol.ok
    assert ok.mean() > 0.99  # the few others sit within 1e-9 rad of a limit
    assert np.abs(sol.joints_rad[ok] - q[ok]).max() < 1e-7


def test_parallel_equals_four_bar_with_parallelogram_lengths():
    """A parallelogram (crank = rocker, coupler = upper arm) four-bar in open assembly is the parallel drive."""
    parallel = make_arm("parallel")
    data = cell_data_with_linkage("parallel")
    data["arm"]["linkage"] = {"type": "four_bar", "crank_mm": 45, "rocker_mm": 45,
                              "coupler_mm": data["arm"]["upper_arm_mm"], "assembly": "open"}
    four_bar = Arm.from_config(parse_cell(data).arm)
    rng = np.random.default_rng(2)
    q = random_joint_poses(parallel, 5000, rng)
    q = q[parallel.check_joints(q) == Reason.OK]
    np.testing.assert_allclose(four_bar.forward(q), parallel.forward(q), atol=1e-9)
    for branch in ("up", "down"):
        targets = parallel.forward(q)
        a, b = parallel.inverse(targets, branch), four_bar.inverse(targets, branch)
        np.testing.assert_array_equal(a.reason, b.reason)
        np.testing.assert_allclose(b.joints_rad[b.ok], a.joints_rad[a.ok], atol=1e-9)
    assert four_bar.grashof() == "change-point"


def _dh_robot(arm: Arm, with_tool: bool):
    """Standard DH model of the serial arm (roboticstoolbox-python, Corke 2023): base yaw, shoulder, elbow."""
    import roboticstoolbox as rtb
    from spatialmath import SE3

    links = [rtb.RevoluteDH(d=arm.base_height_mm, a=arm.shoulder_offset_mm, alpha=np.pi / 2),
             rtb.RevoluteDH(a=arm.upper_arm_mm),
             rtb.RevoluteDH(a=arm.forearm_mm)]
    tool = SE3(arm.tool_reach_mm, -arm.tool_drop_mm, 0) if with_tool else SE3()
    return rtb.DHRobot(links, tool=tool, name="gripsight-serial")


def test_serial_fk_matches_roboticstoolbox_dh_model_tool_on_forearm():
    arm = make_arm("serial", level=False)
    robot = _dh_robot(arm, with_tool=True)
    q = random_joint_poses(arm, 200, np.random.default_rng(3))
    ours = arm.forward(q)
    theirs = np.array([robot.fkine(qi).t for qi in q])
    np.testing.assert_allclose(ours, theirs, atol=1e-9)


def test_serial_fk_matches_roboticstoolbox_dh_model_level_tool():
    """Level tool: the DH wrist point plus the fixed (reach, -drop) offset turned by the base yaw."""
    arm = make_arm("serial", level=True)
    robot = _dh_robot(arm, with_tool=False)
    q = random_joint_poses(arm, 200, np.random.default_rng(4))
    wrist = np.array([robot.fkine(qi).t for qi in q])
    offset = np.column_stack([arm.tool_reach_mm * np.cos(q[:, 0]), arm.tool_reach_mm * np.sin(q[:, 0]),
                              np.full(len(q), -arm.tool_drop_mm)])
    np.testing.assert_allclose(arm.forward(q), wrist + offset, atol=1e-9)


def test_four_bar_worked_example_against_scipy_root():
    """Closure |A - B| = coupler solved independently with scipy's brentq over psi.

    Worked example (ours): upper arm 150, crank 40, coupler 148, rocker 45 mm; shoulder 60 deg,
    crank at -20 deg. The closed form must equal the root of the closure whose B lies on the far side
    of line E-A from O (open), and the other root for crossed.
    """
    fb = FourBar(150.0, 40.0, 148.0, 45.0)
    th1, th2 = np.radians(60.0), np.radians(-20.0)
    e = 150.0 * np.array([np.cos(th1), np.sin(th1)])
    a = -40.0 * np.array([np.cos(th2), np.sin(th2)])

    def closure(psi):
        b = e - 45.0 * np.array([np.cos(psi), np.sin(psi)])
        return np.linalg.norm(a - b) - 148.0

    grid = np.linspace(-np.pi, np.pi, 3601)
    values = np.array([closure(p) for p in grid])
    roots = [brentq(closure, grid[i], grid[i + 1], xtol=1e-14)
             for i in np.flatnonzero(np.sign(values[:-1]) != np.sign(values[1:]))]
    assert len(roots) == 2

    def is_open(psi):
        b = e - 45.0 * np.array([np.cos(psi), np.sin(psi)])
        v = a - e
        cross = lambda p, q: p[0] * q[1] - p[1] * q[0]  # noqa: E731
        return cross(v, -e) * cross(v, b - e) < 0

    open_root = [r for r in roots if is_open(r)]
    crossed_root = [r for r in roots if not is_open(r)]
    assert len(open_root) == len(crossed_root) == 1
    assert abs(fb.forearm_rad(th1, th2) - open_root[0]) < 1e-10
    crossed = FourBar(150.0, 40.0, 148.0, 45.0, crossed=True)
    assert abs(crossed.forearm_rad(th1, th2) - crossed_root[0]) < 1e-10
    # and the inverse gives the crank back
    assert fb.convex_mask(th1, th2, open_root[0])
    assert abs(fb.crank_rad(th1, open_root[0]) - th2) < 1e-9
    # Grashof: s + l = 40 + 150 < 45 + 148; the shortest link is the crank -> crank-rocker
    assert grashof_class(150, 40, 148, 45) == "crank-rocker"


@pytest.mark.parametrize("lengths, expected", [
    ((100, 100, 100, 100), "change-point"),     # rhombus: s + l = p + q
    ((30, 100, 90, 80), "double-crank"),       # shortest link is the ground
    ((100, 90, 30, 80), "double-rocker"),      # shortest link is the coupler
    ((100, 90, 80, 30), "rocker-crank"),       # shortest link is the output (rocker)
    ((100, 60, 70, 50), "triple-rocker"),      # 50 + 100 > 60 + 70: non-Grashof
])
def test_grashof_classes(lengths, expected):
    # Grashof's law (s + l <= p + q) and the class by shortest link: standard mechanism texts (from memory).
    assert grashof_class(*lengths) == expected


def test_law_of_cosines_values_for_a_planar_two_link():
    """Hand check: 150/160 mm links, wrist at distance 200 mm level with the shoulder.
    cos(alpha) = (150^2 + 200^2 - 160^2) / (2*150*200) = 0.6150 -> alpha = 52.048 deg (elbow up)."""
    data = cell_data_with_linkage("serial")
    data["arm"].update(shoulder_offset_mm=0, base_height_mm=100, tool={"reach_mm": 0, "drop_mm": 0, "level": True})
    data["arm"]["joints"]["shoulder"].update(min_deg=0, max_deg=150)
    arm = Arm.from_config(parse_cell(data).arm)
    sol = arm.inverse([[200.0, 0.0, 100.0]])
    assert sol.reason_labels() == ["ok"]
    assert np.degrees(sol.joints_rad[0, 1]) == pytest.approx(np.degrees(np.arccos(0.615)), abs=1e-9)
    assert np.degrees(sol.joints_rad[0, 1]) == pytest.approx(52.048, abs=1e-3)


def test_ik_reasons_name_the_failing_check(sample_cell):
    arm = Arm.from_config(sample_cell.arm)
    targets = np.array([
        [200.0, 0.0, 14.0],     # ok
        [600.0, 0.0, 14.0],     # beyond the arm
        [-150.0, 10.0, 30.0],   # behind the base: base would be ~176 deg
        [60.0, 0.0, 14.0],      # folded too tight: elbow interior below 20 deg
        [150.0, 0.0, -60.0],    # below the table: the forearm would dip to -101 deg, limit -90
    ])
    labels = arm.inverse(targets).reason_labels()
    assert labels[0] == "ok"
    assert labels[1] == "out_of_reach"
    assert labels[2] == "joint_limit:base"
    assert labels[3] == "elbow_interior"
    assert labels[4] == "joint_limit:elbow"
    sol = arm.inverse(targets)
    assert np.isnan(sol.joints_rad[1]).all()          # no geometric solution: no angles
    assert np.isfinite(sol.joints_rad[2]).all()       # limit failure: the angles are kept for the report
    assert np.degrees(sol.joints_rad[2, 0]) == pytest.approx(np.degrees(np.arctan2(10, -150)), abs=1e-9)


def test_four_bar_that_cannot_assemble_is_reported():
    # coupler far too short to close the loop for most poses
    data = cell_data_with_linkage("four_bar")
    data["arm"]["linkage"].update(coupler_mm=20)
    arm = Arm.from_config(parse_cell(data).arm)
    sol = arm.inverse([[220.0, 0.0, 40.0]])
    assert sol.reason_labels() == ["linkage_cannot_assemble"]
    assert np.isnan(arm.forearm_rad(np.radians([60.0]), np.radians([0.0]))).all()


def test_ik_rejects_bad_shapes():
    arm = make_arm("parallel")
    with pytest.raises(ValueError, match=r"xyz_mm: expected shape \(N, 3\)"):
        arm.inverse(np.zeros((4, 2)))
    with pytest.raises(ValueError, match="joints_rad"):
        arm.forward(np.zeros((2, 4)))


def test_ik_never_reports_nan_as_success():
    arm = make_arm("four_bar")
    rng = np.random.default_rng(5)
    pts = rng.uniform([-500, -500, -200], [500, 500, 500], size=(50_000, 3))
    sol = arm.inverse(pts)
    assert np.isfinite(sol.joints_rad[sol.ok]).all()
    assert (sol.reason[np.isnan(sol.joints_rad).any(axis=1)] != Reason.OK).all()


def test_enums():
    assert Linkage("four_bar") is Linkage.FOUR_BAR
    assert Branch("down") is Branch.DOWN
    with pytest.raises(ValueError):
        Linkage("delta")
    assert Reason.JOINT_LIMIT_SHOULDER.label == "joint_limit:shoulder"
