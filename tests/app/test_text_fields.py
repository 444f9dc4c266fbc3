"""Text fields cannot break a file (issue 14, item 5): control characters in the cell file are refused
with their key path; every CSV, comment line and HTML writer quotes or escapes what it writes."""

from __future__ import annotations

import csv
import io

import pytest

from gripsight.app.batchtables import write_batch_tables
from gripsight.app.cellfile import load_cell, parse_cell
from gripsight.app.errors import CellFileError
from gripsight.app.export import CSV_COLUMNS, joints_csv_text
from gripsight.app.jointcheck import check_joint_file_text
from gripsight.app.partsfile import parse_parts
from gripsight.app.textsafe import one_line
from gripsight.planning.picks import Planner
from tests.conftest import SAMPLE_CELL, sample_cell_data


@pytest.mark.parametrize(("where", "edit"), [
    ("cell", lambda d: d.update(cell="token sorter\n0.0000,start,,0,0,0")),     # the newline in the name
    ("cell", lambda d: d.update(cell="token\rsorter")),
    ("keep_out.0.name", lambda d: d["keep_out"][0].update(name="post\x00")),
    ("parts.re\\u2028d", lambda d: d["parts"].update({"re\u2028d": d["parts"].pop("red")})),
])
def test_control_characters_in_the_cell_file_are_refused_with_the_key(where, edit):
    data = sample_cell_data()
    edit(data)
    with pytest.raises(CellFileError) as err:
        parse_cell(data, "cell.yaml")
    assert err.value.problems[0].where == where
    assert "control character or line break" in err.value.problems[0].message
    assert "\n" not in str(err.value) and "\r" not in str(err.value)


def _body_rows(text: str) -> list[list[str]]:
    """Rows as a line-by-line reader sees them (the way a careless script or a spreadsheet import reads)."""
    return [line.split(",") for line in text.splitlines() if line and not line.startswith("#")]


def test_part_ids_with_line_breaks_stay_in_their_field_of_joints_csv():
    cell = load_cell(SAMPLE_CELL)
    parts = parse_parts([{"id": "r1\n0.0,transfer", "class": "red", "x_mm": 200, "y_mm": 0},
                         {"id": "g,1\r", "class": "green", "x_mm": 150, "y_mm": 120}], cell)
    planner = Planner(cell)
    plan = planner.plan(parts)
    text = joints_csv_text(plan, cell, planner.arm)
    lines = _body_rows(text)
    assert lines[0] == CSV_COLUMNS and len(lines) == len(plan.samples.t_s) + 1
    rows = list(csv.reader(io.StringIO("\n".join(",".join(r) for r in lines))))
    assert {r[2] for r in list(csv.reader([l for l in text.splitlines() if not l.startswith("#")]))[1:]} >= {"r1\\n0.0,transfer", "g,1\\r"}
    assert all(len(r) >= len(CSV_COLUMNS) for r in rows)
    assert check_joint_file_text(text, cell) == len(plan.samples.t_s)


def test_batch_csv_and_report_keep_hostile_photo_names_and_errors_in_their_cells(tmp_path):
    cell = load_cell(SAMPLE_CELL)
    row = {"photo": "a\nb<script>.jpg", "status": "error", "error": "bad\r\nphoto, truly", "registration": "",
           "drift": "", "parts": 0, "found": {}, "planned": 0, "rejected": {}, "cycle_s": 0.0, "truth": None,
           "thumbnail": ""}
    write_batch_tables(tmp_path, [row], cell)
    text = (tmp_path / "batch.csv").read_text()
    assert len(text.splitlines()) == 2                       # the header and one row, whatever the name holds
    parsed = list(csv.reader(io.StringIO(text)))
    assert parsed[1][0] == "a\\nb<script>.jpg" and parsed[1][2] == "bad\\r\\nphoto, truly"
    html = (tmp_path / "report.html").read_text()
    assert "<script>" not in html and "b&lt;script&gt;.jpg" in html      # html.escape (Python docs)


def test_one_line_escapes_every_line_break_python_knows():
    # str.splitlines breaks on these (Python docs, "str.splitlines"); none may survive
    for ch in "\n\r\x0b\x0c\x1c\x1d\x1e\x85\u2028\u2029":
        assert len(one_line(f"a{ch}b").splitlines()) == 1
