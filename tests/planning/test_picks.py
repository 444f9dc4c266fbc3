"""Pick-and-place planning end to end: the sequence written to joints.csv is checked against the arm's
own FK, the pick points, the vertical descents and every joint and speed limit; rejections carry
their reason; bad parts files give clear errors."""

from __future__ import annotations

import csv
import itertools
import json

import numpy as np
import pytest
import yaml

from gripsight.planning.arm import Arm, Reason
from gripsight.planning.checks import Check, CheckContext, first_failure
from gripsight.app.cli import main
from gripsight.app.cellfile import load_cell, parse_cell
from gripsight.planning.errors import CellProblems
from gripsight.planning.motion import SampledSegment, Segment, SegmentKind
from gripsight.planning.ordering import order_cost_mm, order_nearest_two_opt
from gripsight.planning.picks import Planner
from gripsight.planning.safety import SAFETY_LINES
from gripsight.app.partsfile import parse_parts
from tests.conftest import SAMPLE_CELL, cell_data_with_linkage, sample_cell_data

SIX_REACHABLE_TWO_NOT = [
    {"id": "r1", "class": "red", "x_mm": 200, "y_mm": 0},
    {"id": "b1", "class": "blue", "x_mm": 250, "y_mm": -100, "yaw_deg": 30},
    {"id": "g1", "class": "green", "x_mm": 150, "y_mm": 120},
    {"id": "y1", "class": "yellow", "x_mm": 300, "y_mm": 50},
    {"id": "r2", "class": "red", "x_mm": 160, "y_mm": -140, "yaw_deg": 45},
    {"id": "g2", "class": "green", "x_mm": 280, "y_mm": 150},
    {"id": "far", "class": "blue", "x_mm": 335, "y_mm": -190},      # r = 385 mm: beyond the arm
    {"id": "far2", "class": "yellow", "x_mm": 340, "y_mm": 170},    # r = 380 mm
]


def read_joints_csv(path):
    lines = path.read_text().splitlines()
    comments = [line for line in lines if line.startswith("#")]
    rows = list(csv.DictReader(line for line in lines if not line.startswith("#")))
    return comments, rows


@pytest.fixture(scope="module")
def demo_plan(tmp_path_factory):
    out = tmp_path_factory.mktemp("plan")
    parts = out / "parts.yaml"
    parts.write_text(yaml.safe_dump({"parts": SIX_REACHABLE_TWO_NOT}))
    assert main(["plan", "--parts", str(parts), "--cell", str(SAMPLE_CELL), "--out", str(out / "result")]) == 0
    cell = load_cell(SAMPLE_CELL)
    comments, rows = read_joints_csv(out / "result" / "joints.csv")
    data = json.loads((out / "result" / "plan.json").read_text())
    return cell, Arm.from_config(cell.arm), comments, rows, data, out / "result"


def test_six_planned_two_rejected_out_of_reach(demo_plan):
    _, _, _, _, data, _ = demo_plan
    status = {p["id"]: (p["status"], p["reason"]) for p in data["parts"]}
    assert [pid for pid, (st, _) in status.items() if st == "planned"] == ["r1", "b1", "g1", "y1", "r2", "g2"]
    assert status["far"] == ("rejected", "out_of_reach")
    assert status["far2"] == ("rejected", "out_of_reach")
    far = next(p for p in data["parts"] if p["id"] == "far")["rejection"]
    assert far["unit"] == "mm" and far["value"] == pytest.approx(np.hypot(335, 190), abs=0.01)
    assert data["totals"]["planned"] == 6 and data["totals"]["rejected_by_reason"] == {"out_of_reach": 2}
    assert {p["part"]: p["bin"] for p in data["picks"]} == {"r1": "red", "b1": "blue", "g1": "green",
                                                          "y1": "yellow", "r2": "red", "g2": "green"}


def test_csv_starts_with_safety_cell_and_hash(demo_plan):
    cell, _, comments, rows, _, _ = demo_plan
    assert comments[0] == "# gripsight joint sequence"
    for line in SAFETY_LINES:
        assert f"# SAFETY: {line}" in comments
    assert f"# cell: {cell.cell}" in comments
    assert f"# cell_sha256: {cell.sha256}" in comments
    assert list(rows[0]) == ["time_s", "segment", "part", "x_mm", "y_mm", "z_mm", "base_deg", "shoulder_deg",
                             "elbow_deg", "gripper", "base_us", "shoulder_us", "elbow_us", "gripper_us"]


def _arrays(rows):
    t = np.array([float(r["time_s"]) for r in rows])
    xyz = np.array([[float(r["x_mm"]), float(r["y_mm"]), float(r["z_mm"])] for r in rows])
    q_deg = np.array([[float(r["base_deg"]), float(r["shoulder_deg"]), float(r["elbow_deg"])] for r in rows])
    us = np.array([[float(r["base_us"]), float(r["shoulder_us"]), float(r["elbow_us"])] for r in rows])
    return t, xyz, q_deg, us


def test_fk_of_every_row_matches_its_xyz(demo_plan):
    _, arm, _, rows, _, _ = demo_plan
    _, xyz, q_deg, _ = _arrays(rows)
    err = np.linalg.norm(arm.forward(np.radians(q_deg)) - xyz, axis=1)
    assert err.max() < 0.01


def test_tool_passes_through_each_pick_point_at_grip_height(demo_plan):
    cell, arm, _, rows, data, _ = demo_plan
    _, xyz, q_deg, _ = _arrays(rows)
    tool = arm.forward(np.radians(q_deg))
    for part in (p for p in SIX_REACHABLE_TWO_NOT if not p["id"].startswith("far")):
        cls = cell.parts[part["class"]]
        target = np.array([part["x_mm"], part["y_mm"], cls.height_mm - cell.motion.grip_depth_mm])
        closing = [i for i, r in enumerate(rows) if r["part"] == part["id"] and r["segment"] == "close"]
        assert closing, part["id"]
        assert np.linalg.norm(tool[closing] - target, axis=1).max() < 0.05


def test_descents_are_vertical_lines(demo_plan):
    _, arm, _, rows, _, _ = demo_plan
    _, _, q_deg, _ = _arrays(rows)
    tool = arm.forward(np.radians(q_deg))
    kinds = [r["segment"] for r in rows]
    idx = [i for i, k in enumerate(kinds) if k in ("descend", "rise")]
    assert len(idx) > 100
    # group consecutive samples of one vertical move; each stays on the vertical line of its end
    groups = np.split(np.array(idx), np.flatnonzero(np.diff(idx) > 1) + 1)
    for g in groups:
        end = tool[g[-1]]
        dev = np.hypot(tool[g, 0] - end[0], tool[g, 1] - end[1])
        assert dev.max() < 0.05


def test_no_sample_exceeds_a_joint_limit_or_speed_limit(demo_plan):
    cell, arm, _, rows, _, _ = demo_plan
    t, xyz, q_deg, us = _arrays(rows)
    for j, name in enumerate(("base", "shoulder", "elbow")):
        joint = getattr(cell.arm.joints, name)
        assert q_deg[:, j].min() >= joint.min_deg - 1e-6
        assert q_deg[:, j].max() <= joint.max_deg + 1e-6
        speed = np.abs(np.diff(q_deg[:, j])) / np.diff(t)
        assert speed.max() <= joint.max_speed_deg_s * (1 + 1e-4), name
    assert np.all(arm.check_joints(np.radians(q_deg)) == Reason.OK)
    assert us.min() >= 500 and us.max() <= 2500          # common practice servo range
    np.testing.assert_allclose(np.diff(t), 1 / cell.motion.sample_hz, atol=1e-4)   # one uniform clock
    assert xyz[:, 2].min() >= cell.motion.floor_clearance_mm


def test_plots_are_written(demo_plan):
    *_, out = demo_plan
    for name in ("joints.png", "path.png"):
        assert (out / name).read_bytes()[:4] == b"\x89PNG"


@pytest.mark.parametrize("kind", ["serial", "parallel", "four_bar"])
def test_every_linkage_plans_checked_sequences(kind):
    cell = parse_cell(cell_data_with_linkage(kind))
    planner = Planner(cell)
    rng = np.random.default_rng(7)
    entries = [{"class": str(rng.choice(["red", "blue", "green", "yellow"])),
                "x_mm": float(rng.uniform(90, 340)), "y_mm": float(rng.uniform(-200, 200)),
                "yaw_deg": float(rng.uniform(-90, 90))} for _ in range(12)]
    plan = planner.plan(parse_parts(entries, cell))
    assert len(plan.picks) >= 6
    q = plan.samples.joints_rad
    assert np.all(planner.arm.check_joints(q) == Reason.OK)
    np.testing.assert_allclose(planner.arm.forward(q), plan.samples.xyz_mm, atol=1e-6)
    speed = np.abs(np.diff(q, axis=0)) / planner.dt_s
    assert np.all(speed <= planner.arm.max_speed_rad_s * (1 + 1e-9))
    for o in plan.parts:
        assert (o.status == "planned") == (o.rejection is None)


def test_part_on_keep_out_zone_is_rejected(tmp_path):
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["keep_out"].append({"name": "feeder", "shape": "box", "min_mm": [180, -20, 0], "max_mm": [230, 20, 40]})
    cell = parse_cell(data)
    plan = Planner(cell).plan(parse_parts([{"id": "a", "class": "red", "x_mm": 205, "y_mm": 0},
                                           {"id": "b", "class": "red", "x_mm": 250, "y_mm": 100}], cell))
    by_id = {o.part.id: o for o in plan.parts}
    assert by_id["a"].status == "rejected"
    assert by_id["a"].rejection.label == "keep_out:feeder"
    assert by_id["a"].rejection.segment == "descend"
    assert by_id["b"].status == "planned"


def test_part_too_close_to_the_base_names_the_elbow_stop(sample_cell):
    plan = Planner(sample_cell).plan(parse_parts([{"id": "near", "class": "yellow", "x_mm": 70, "y_mm": 20}], sample_cell))
    rej = plan.parts[0].rejection
    assert rej.check == "elbow_interior" and rej.segment == "descend"
    assert rej.limit == 20 and rej.value < 20


def test_grip_fit_and_floor_clearance_rejections():
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["parts"]["flat"] = {"lab": [50, 0, 0], "height_mm": 9, "footprint_mm": [20, 20]}
    data["bins"]["flat"] = {"x": 110, "y": 240}
    cell = parse_cell(data)
    parts = parse_parts([
        {"id": "wide", "class": "red", "x_mm": 200, "y_mm": 0, "width_mm": 30, "length_mm": 30, "yaw_deg": 45},
        {"id": "low", "class": "flat", "x_mm": 220, "y_mm": 30},
    ], cell)
    by_id = {o.part.id: o.rejection for o in Planner(cell).plan(parts).parts}
    assert by_id["wide"].check == "grip_fit"
    assert by_id["wide"].value == pytest.approx(30 * np.sqrt(2), abs=1e-6)   # the diagonal across the jaws
    assert by_id["wide"].limit == 38
    assert by_id["low"].check == "floor_clearance"
    assert by_id["low"].value == pytest.approx(1.0)


def test_joint_speed_check_names_joint_and_value(sample_cell):
    arm = Arm.from_config(sample_cell.arm)
    ctx = CheckContext(arm, 2.0, (), 0.02)
    q = np.radians([[0, 60, -30], [5, 60, -30]])                 # base moves 5 deg in one 20 ms sample
    pts = arm.forward(q)
    seg = SampledSegment(Segment(SegmentKind.TRANSFER, None, pts[0]), 0.02, np.array([0, 0.02]), pts, q,
                         np.zeros(2, dtype=np.int8))
    rej = first_failure(ctx, seg, t0_s=3.0)
    assert rej.label == "joint_speed:base"
    assert rej.value == pytest.approx(250.0) and rej.limit == 240
    assert rej.describe() == "joint_speed:base: base 250.0 deg/s > 240 deg/s (transfer at t=3.02 s)"


def test_unreachable_bin_is_a_cell_error_before_planning():
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["bins"]["red"] = {"x": 110, "y": 400}
    with pytest.raises(CellProblems, match=r"bins.red: cannot be reached at drop height \(z=50 mm\): out_of_reach"):
        Planner(parse_cell(data, "cell.yaml"))


def test_unknown_class_goes_to_reject_bin(sample_cell):
    parts = parse_parts([{"id": "odd", "class": "purple", "x_mm": 220, "y_mm": 60, "height_mm": 20, "width_mm": 20}],
                        sample_cell)
    plan = Planner(sample_cell).plan(parts)
    assert plan.picks[0].bin_name == "reject" and plan.parts[0].status == "planned"


def test_order_detected_keeps_input_order(sample_cell):
    entries = [{"id": f"p{i}", "class": "red", "x_mm": x, "y_mm": y}
               for i, (x, y) in enumerate([(300, -100), (150, 0), (250, 120)])]
    plan = Planner(sample_cell).plan(parse_parts(entries, sample_cell), order="detected")
    assert [p.part_id for p in plan.picks] == ["p0", "p1", "p2"]


def test_two_opt_never_worse_than_nearest_and_near_optimal():
    rng = np.random.default_rng(3)
    excess = []
    for _ in range(60):
        parts = rng.uniform([90, -200], [340, 200], (6, 2))
        bins = rng.uniform([50, -250], [250, 250], (4, 2))[rng.integers(0, 4, 6)]
        start = np.array([205.0, 0.0])
        order = order_nearest_two_opt(start, parts, bins)
        assert sorted(order) == list(range(6))
        best = min(order_cost_mm(p, start, parts, bins) for p in itertools.permutations(range(6)))
        excess.append(order_cost_mm(order, start, parts, bins) / best - 1)
    assert np.mean(excess) < 0.05


@pytest.mark.parametrize("entries, expected", [
    ([{"class": "red", "x_mm": float("nan"), "y_mm": 0}], "parts.0.x_mm: must be a finite number"),
    ([{"class": "red", "x_mm": "200", "y_mm": 0}], "parts.0.x_mm: must be a number, got '200'"),
    ([{"id": "a", "class": "red", "x_mm": 200, "y_mm": 0}, {"id": "a", "class": "red", "x_mm": 210, "y_mm": 0}],
     "parts.1.id: duplicate id 'a' (also entry 0)"),
    ([{"class": "purple", "x_mm": 200, "y_mm": 0}], "parts.0.height_mm: required for class 'purple'"),
    ([{"klass": "red", "x_mm": 200, "y_mm": 0}], "parts.0.klass: unknown key"),
])
def test_bad_parts_files_give_clear_errors(tmp_path, capsys, entries, expected):
    path = tmp_path / "parts.yaml"
    path.write_text(yaml.safe_dump({"parts": entries}))
    code = main(["plan", "--parts", str(path), "--cell", str(SAMPLE_CELL), "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2
    assert expected in err, err
    assert not (tmp_path / "o" / "joints.csv").exists()


def test_empty_parts_list_is_a_valid_empty_plan(tmp_path, capsys):
    path = tmp_path / "parts.yaml"
    path.write_text("parts: []\n")
    code = main(["plan", "--parts", str(path), "--cell", str(SAMPLE_CELL), "--out", str(tmp_path / "o"), "--json"])
    assert code == 0
    data = json.loads(capsys.readouterr().out)         # --json: stdout is only the JSON object
    assert data["picks"] == [] and data["totals"]["cycle_s"] == 0
    _, rows = read_joints_csv(tmp_path / "o" / "joints.csv")
    assert len(rows) == 1 and rows[0]["segment"] == "start"   # the arm stays at home


def test_a_home_pose_on_the_other_branch_swings_in_joint_space():
    """Home with the elbow below the shoulder-wrist line (elbow-down) while the plan runs elbow-up: the
    sequence swings in joint space from home, plans as usual, and swings back; every sample is checked."""
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["motion"]["home_deg"] = {"base": 0, "shoulder": 20, "elbow": 50}        # psi - shoulder = 30: elbow down
    data["arm"]["elbow_interior_deg"] = [20, 180]     # changing branch passes the straight arm: no stop there
    cell = parse_cell(data)
    planner = Planner(cell)
    plan = planner.plan(parse_parts([{"id": "a", "class": "red", "x_mm": 220, "y_mm": 40}], cell))
    kinds = plan.samples.segment_kind
    assert kinds[1] == "swing" and kinds[-1] == "swing"
    q = plan.samples.joints_rad
    np.testing.assert_allclose(np.degrees(q[0]), [0, 20, 50], atol=1e-9)
    np.testing.assert_allclose(np.degrees(q[-1]), [0, 20, 50], atol=1e-9)
    assert np.all(planner.arm.check_joints(q) == Reason.OK)
    assert np.all(np.abs(np.diff(q, axis=0)) / planner.dt_s <= planner.arm.max_speed_rad_s * (1 + 1e-9))
    np.testing.assert_allclose(planner.arm.forward(q), plan.samples.xyz_mm, atol=1e-6)
    assert [p.part_id for p in plan.picks] == ["a"]
    # with the demo's 165 degree elbow stop the arm cannot change branch at all: said, not attempted blindly
    data["arm"]["elbow_interior_deg"] = [20, 165]
    stopped = Planner(parse_cell(data)).plan(parse_parts([{"id": "a", "class": "red", "x_mm": 220, "y_mm": 40}], cell))
    assert stopped.parts[0].rejection.check == "elbow_interior" and stopped.parts[0].rejection.segment == "swing"


def test_a_home_pose_outside_the_elbow_stop_is_a_cell_error():
    from tests.conftest import cell_data_with_linkage

    data = cell_data_with_linkage("serial")
    data["motion"]["home_deg"] = {"base": 0, "shoulder": 90, "elbow": 0}          # a straight arm: 180 deg
    with pytest.raises(CellProblems, match="motion.home_deg: the home pose breaks the arm's own limits"):
        Planner(parse_cell(data, "cell.yaml"))


def test_speed_scale_slows_every_move(tmp_path):
    parts = tmp_path / "parts.yaml"
    parts.write_text(yaml.safe_dump({"parts": SIX_REACHABLE_TWO_NOT[:3]}))
    for scale, out in ((1.0, "full"), (0.25, "quarter")):
        assert main(["plan", "--parts", str(parts), "--cell", str(SAMPLE_CELL), "--out", str(tmp_path / out),
                     "--speed-scale", str(scale), "--no-plots"]) == 0
    full = json.loads((tmp_path / "full" / "plan.json").read_text())
    quarter = json.loads((tmp_path / "quarter" / "plan.json").read_text())
    for a, b in zip(full["picks"], quarter["picks"]):
        for sa, sb in zip(a["segments"], b["segments"]):
            if sa["kind"] not in ("close", "open"):
                # each duration is rounded up to the 20 ms clock: the full-speed one by up to 0.02 s
                assert sb["duration_s"] >= 4 * (sa["duration_s"] - 0.02) - 1e-9
    assert quarter["totals"]["speed_scale"] == 0.25
    assert "# speed_scale: 0.25" in (tmp_path / "quarter" / "joints.csv").read_text()


def test_slow_joints_stretch_the_moves_instead_of_rejecting_parts():
    """With every joint limited to 20 deg/s the tool speed no longer sets the pace: each move is
    stretched until its samples keep every joint under its limit, and every reachable part is still
    planned (no joint_speed rejection); the cycle is longer than at full joint speed."""
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    fast = Planner(parse_cell(data, "cell.yaml"))
    for joint in data["arm"]["joints"].values():
        joint["max_speed_deg_s"] = 20
    slow_cell = parse_cell(data, "cell.yaml")
    parts = parse_parts(SIX_REACHABLE_TWO_NOT, slow_cell)
    slow = Planner(slow_cell).plan(parts)
    assert [o.status for o in slow.parts].count("planned") == 6
    assert not any(o.rejection and o.rejection.check is Check.JOINT_SPEED for o in slow.parts)
    q = slow.samples.joints_rad
    step = np.diff(slow.samples.t_s)
    moving = step > 0
    speed = np.degrees(np.abs(np.diff(q, axis=0))[moving] / step[moving, None])
    assert speed.max() <= 20 * (1 + 1e-9)
    assert slow.cycle_s > 1.5 * fast.plan(parse_parts(SIX_REACHABLE_TWO_NOT, fast.cell)).cycle_s


def test_a_way_home_that_fails_is_left_out_and_the_picks_kept():
    # a lid over the home pose's vertical line: the picks (started elsewhere) pass, the rise to home
    # does not; the plan ends above the last bin and says why
    data = yaml.safe_load(SAMPLE_CELL.read_text())
    data["keep_out"].append({"name": "lid", "shape": "box", "min_mm": [195, -10, 150], "max_mm": [215, 10, 160]})
    cell = parse_cell(data)
    planner = Planner(cell)
    start = planner.arm.inverse([[150, 100, 100]]).joints_rad[0]
    plan = planner.plan(parse_parts([{"id": "a", "class": "red", "x_mm": 180, "y_mm": 120},
                                     {"id": "b", "class": "green", "x_mm": 250, "y_mm": 140}], cell),
                        start_joints_rad=start)
    assert [o.status for o in plan.parts] == ["planned", "planned"]
    assert len(plan.warnings) == 1
    assert plan.warnings[0].startswith("the move back to the home pose failed a check and was left out: "
                                       "keep_out:lid: tool enters zone 'lid' at (")
    assert "(rise at t=" in plan.warnings[0]
    last_bin = cell.bins[plan.picks[-1].bin_name]
    np.testing.assert_allclose(plan.samples.xyz_mm[-1], [last_bin.x, last_bin.y, cell.motion.safe_z_mm], atol=1e-6)


def test_a_cell_shifted_with_its_base_plans_the_same_joint_sequence():
    """A rigid shift of the whole cell (markers, work area, trays, keep-out zones, parts) together with the
    arm's base axis (``arm.base_xy_mm``, written by arm-fit) changes no joint angle: the same motion in a
    shifted frame (geometry: joint angles depend only on positions relative to the base). Before, the
    arc transfers' via points were taken about the table origin, not the base axis."""
    shift = np.array([35.0, -20.0])

    def shifted(data):
        data["markers"]["layout"] = {k: {**m, "x": m["x"] + shift[0], "y": m["y"] + shift[1]}
                                     for k, m in data["markers"]["layout"].items()}
        data["work_area"] = [[x + shift[0], y + shift[1]] for x, y in data["work_area"]]
        data["bins"] = {k: {**b, "x": b["x"] + shift[0], "y": b["y"] + shift[1]} for k, b in data["bins"].items()}
        data["keep_out"] = [{**z, "x": z["x"] + shift[0], "y": z["y"] + shift[1]} for z in data["keep_out"]]
        data["arm"]["base_xy_mm"] = shift.tolist()
        return data

    plans = []
    for data, d in ((sample_cell_data(), np.zeros(2)), (shifted(sample_cell_data()), shift)):
        cell = parse_cell(data)
        entries = [{**p, "x_mm": p["x_mm"] + d[0], "y_mm": p["y_mm"] + d[1]} for p in SIX_REACHABLE_TWO_NOT]
        plans.append(Planner(cell).plan(parse_parts({"parts": entries}, cell)))
    a, b = plans
    assert [(o.part.id, o.rejection and o.rejection.label) for o in a.parts] == \
           [(o.part.id, o.rejection and o.rejection.label) for o in b.parts]
    assert sum(o.rejection is None for o in a.parts) == 6
    np.testing.assert_allclose(b.samples.joints_rad, a.samples.joints_rad, atol=1e-9)
    np.testing.assert_allclose(b.samples.xyz_mm[:, :2], a.samples.xyz_mm[:, :2] + shift, atol=1e-9)
