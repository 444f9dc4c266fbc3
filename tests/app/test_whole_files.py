"""A joint file is whole and checked, or not written (issue 14, item 2): run.csv only from this run's
checked plans, and a last pass over every joint file (sample clock, joint speeds, gripper changes)."""

from __future__ import annotations

import csv
import shutil

import numpy as np
import pytest

from gripsight.app.cli import main
from gripsight.app.cellfile import load_cell
from gripsight.app.export import joints_csv_text
from gripsight.app.jointcheck import JointFileRefused, check_joint_file_text
from gripsight.app.partsfile import parse_parts
from gripsight.planning.picks import Planner
from tests.conftest import ROOT, SAMPLE_CELL

SAMPLES = ROOT / "sample_images"


def _rows(path):
    lines = [line for line in path.read_text().splitlines() if not line.startswith("#")]
    return list(csv.reader(lines))[1:]


@pytest.fixture(scope="module")
def joints_text():
    cell = load_cell(SAMPLE_CELL)
    parts = parse_parts([{"id": "r1", "class": "red", "x_mm": 200, "y_mm": 0},
                         {"id": "g1", "class": "green", "x_mm": 150, "y_mm": 120}], cell)
    planner = Planner(cell)
    return cell, joints_csv_text(planner.plan(parts), cell, planner.arm)


def _edit(text: str, row: int, column: int, value: str) -> str:
    lines = text.split("\n")
    body = [i for i, line in enumerate(lines) if line and not line.startswith("#")][1:]
    fields = lines[body[row]].split(",")
    fields[column] = value
    lines[body[row]] = ",".join(fields)
    return "\n".join(lines)


def test_a_planned_joint_file_passes_the_whole_file_check(joints_text):
    cell, text = joints_text
    assert check_joint_file_text(text, cell) == len(text.splitlines()) - sum(line.startswith("#") for line in text.splitlines()) - 1


def test_time_going_back_is_refused(joints_text):
    cell, text = joints_text
    with pytest.raises(JointFileRefused, match=r"time going from 0\.1000 s to 0\.0400 s at row 7"):
        check_joint_file_text(_edit(text, 6, 0, "0.0400"), cell, "joints.csv")


def test_a_joint_jump_beyond_its_speed_limit_is_refused(joints_text):
    cell, text = joints_text
    row = _rows_of(text)[40]
    jumped = f"{float(row[6]) + 116.0:.6f}"      # the 116 deg base jump in one 20 ms sample
    with pytest.raises(JointFileRefused, match=r"base stepping \+116\.000 deg in 0\.02 s at row 41 \(5800\.0 deg/s > 240 deg/s\)"):
        check_joint_file_text(_edit(text, 40, 6, jumped), cell)


def test_the_gripper_changing_outside_a_close_or_open_dwell_is_refused(joints_text):
    cell, text = joints_text
    rows = _rows_of(text)
    i = next(k for k, r in enumerate(rows) if r[1] == "transfer" and r[9] == "open")
    with pytest.raises(JointFileRefused, match=rf"the gripper turning closed at row {i + 1} in a 'transfer' move"):
        check_joint_file_text(_edit(text, i, 9, "closed"), cell)


def test_the_file_is_read_as_csv_reader_reads_it(joints_text):
    # the check splits a file without quotes on commas in one pass: the same fields as the standard
    # library's csv.reader (the reference), with and without a quoted part id in the file
    from gripsight.app.jointcheck import _table

    cell, text = joints_text
    for variant in (text, text.replace(",r1,", ',"r,1",')):
        rows = _rows_of(variant)
        header, columns = _table(variant, "joints.csv")
        assert header == _header_of(variant)
        assert [list(r) for r in zip(*columns)] == rows
    assert ",r1," in text and '"r,1"' not in text


def test_a_row_of_another_width_and_a_word_among_numbers_are_refused(joints_text):
    cell, text = joints_text
    lines = text.split("\n")
    body = [i for i, line in enumerate(lines) if line and not line.startswith("#")]
    short = lines.copy()
    short[body[5]] = short[body[5]].rsplit(",", 1)[0]
    with pytest.raises(JointFileRefused, match=r"row 5 with 13 fields, not 14"):
        check_joint_file_text("\n".join(short), cell)
    with pytest.raises(JointFileRefused, match=r"not numbers where numbers belong \(could not convert string to float: 'x'\)"):
        check_joint_file_text(_edit(_edit(text, 9, 8, "x"), 30, 6, "y"), cell)     # row 10's elbow comes first


def _header_of(text):
    return next(csv.reader([line for line in text.split("\n") if line and not line.startswith("#")]))


def _rows_of(text):
    return list(csv.reader([line for line in text.split("\n") if line and not line.startswith("#")]))[1:]


def test_rerun_with_an_unreadable_photo_never_keeps_its_old_rows(tmp_path, capsys):
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    folder = tmp_path / "demo"
    folder.mkdir()
    for name in ("demo_01.jpg", "demo_02.jpg", "demo_03.jpg"):
        shutil.copy(SAMPLES / "demo" / name, folder / name)
    out = tmp_path / "out"
    assert main(["run", str(folder), "--out", str(out)]) == 0
    old_rows = _rows(out / "demo_02.jpg" / "joints.csv")
    (folder / "demo_02.jpg").write_bytes(b"not a photo any more")
    assert main(["run", str(folder), "--out", str(out)]) == 0
    capsys.readouterr()
    rows = [r[1:] for r in _rows(out / "run.csv")]          # run.csv's first column names the photo
    t_s = np.array([float(r[0]) for r in rows])
    # before the fix: the old joints.csv of demo_02 (still in the folder) was pasted in, time going back
    assert np.all(np.diff(t_s) > 0)
    assert np.allclose(np.diff(t_s), 0.02, atol=2e-4)     # one 50 Hz sample clock (the cell's sample_hz)
    assert not any(r in rows for r in old_rows[5:10])
