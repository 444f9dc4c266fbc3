"""Resume only what is the same (issue 14, item 4): a resumed run or batch reuses a photo's result only
if the photo, the cell file and the calibration file are byte-identical; leftover temporary files go."""

from __future__ import annotations

import json
import shutil

import pytest
import yaml

from gripsight.app.cli import main
from tests.conftest import ROOT, SAMPLE_CELL

SAMPLES = ROOT / "sample_images"


def _setup(tmp_path, names, sub="batch"):
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    folder = tmp_path / "photos"
    folder.mkdir()
    for name in names:
        shutil.copy(SAMPLES / sub / name, folder / name)
    return folder


def _taller_red(cell_path):
    data = yaml.safe_load(cell_path.read_text())
    data["parts"]["red"]["height_mm"] = 70          # the changed heights
    cell_path.write_text(yaml.safe_dump(data, sort_keys=False))


def test_batch_resume_with_another_cell_file_redoes_the_rows(tmp_path, capsys):
    folder = _setup(tmp_path, ["batch_01.jpg", "batch_02.jpg"])
    out = tmp_path / "out"
    assert main(["batch", str(folder), "--workers", "1", "--out", str(out)]) == 0
    _taller_red(tmp_path / "cell.yaml")
    leftover = out / "batch_01.jpg" / ".plan.abcd1234.tmp.json"
    leftover.write_text("{half")
    assert main(["batch", str(folder), "--workers", "1", "--out", str(out), "--resume"]) == 0
    assert main(["batch", str(folder), "--workers", "1", "--out", str(tmp_path / "fresh")]) == 0
    capsys.readouterr()
    # before the fix: the resumed rows were the old cell's (red parts carried at 22 mm)
    assert (out / "batch.csv").read_text() == (tmp_path / "fresh" / "batch.csv").read_text()
    plan = json.loads((out / "batch_01.jpg" / "plan.json").read_text())
    fresh = json.loads((tmp_path / "fresh" / "batch_01.jpg" / "plan.json").read_text())
    assert plan["cell_sha256"] == fresh["cell_sha256"]
    assert not leftover.exists()


@pytest.mark.parametrize("change", ["cell", "calibration", "photo"])
def test_run_resume_refuses_when_an_input_changed(tmp_path, capsys, change):
    folder = _setup(tmp_path, ["demo_01.jpg", "demo_02.jpg"], sub="demo")
    out = tmp_path / "out"
    assert main(["run", str(folder), "--out", str(out)]) == 0
    state = json.loads((out / "run_state.json").read_text())
    assert state["done"] == ["demo_01.jpg", "demo_02.jpg"]
    if change == "cell":
        _taller_red(tmp_path / "cell.yaml")
        expected = "that run was of another folder or cell file"
    elif change == "calibration":
        cal = tmp_path / "calibration.yaml"
        cal.write_text(cal.read_text() + "\n# touched\n")
        expected = "that run was made with another calibration file"
    else:
        (folder / "demo_01.jpg").write_bytes((SAMPLES / "demo" / "demo_03.jpg").read_bytes())
        expected = "photo demo_01.jpg changed since that run planned it"
    capsys.readouterr()
    assert main(["run", str(folder), "--out", str(out), "--resume"]) == 1
    assert expected in capsys.readouterr().err
