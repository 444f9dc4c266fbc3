"""Never destroy what is there (issue 14, item 6): new files first, then the old one to history; no
output path that is a folder where a file is meant, or an input, or another output; state replaced,
never deleted first."""

from __future__ import annotations

import errno
import os
import shutil

import pytest
import yaml

from gripsight.app.cli import main
from tests.conftest import ROOT, SAMPLE_CELL

SAMPLES = ROOT / "sample_images"


@pytest.fixture()
def cell_dir(tmp_path):
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    return tmp_path


def _disk_full_after(monkeypatch, n_ok: int):
    """os.fsync fails with ENOSPC after ``n_ok`` calls (a disk that fills up while writing)."""
    real, calls = os.fsync, [0]

    def fsync(fd):
        calls[0] += 1
        if calls[0] > n_ok:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(fd)

    monkeypatch.setattr(os, "fsync", fsync)


def test_calibrate_out_onto_an_existing_folder_moves_nothing(cell_dir, capsys):
    folder = cell_dir / "mine"
    folder.mkdir()
    (folder / "notes.txt").write_text("the user's own file")
    code = main(["calibrate", str(cell_dir / "calibration.jpg"), "--out", str(folder)])
    assert code == 1 and "is a folder; --out needs a file name" in capsys.readouterr().err
    # before the fix: the folder, user file and all, went to mine_history/ and a file took its place
    assert (folder / "notes.txt").read_text() == "the user's own file"
    assert not (cell_dir / "mine_history").exists()


@pytest.mark.parametrize("overlay", ["photo", "out"])
def test_calibrate_overlay_onto_the_photo_or_the_output_is_refused(cell_dir, capsys, overlay):
    photo = cell_dir / "calibration.jpg"
    before = photo.read_bytes()
    out = cell_dir / "cal.yaml"
    target = photo if overlay == "photo" else out
    code = main(["calibrate", str(photo), "--out", str(out), "--overlay", str(target)])
    err = capsys.readouterr().err
    assert code == 1
    assert ("--overlay is the photo" in err) if overlay == "photo" else ("--out and --overlay name the same path" in err)
    assert photo.read_bytes() == before and not out.exists()


def test_calibrate_on_a_full_disk_keeps_the_old_calibration(cell_dir, capsys, monkeypatch):
    photo = cell_dir / "calibration.jpg"
    cal = cell_dir / "calibration.yaml"
    assert main(["calibrate", str(photo)]) == 0
    old = cal.read_bytes()
    _disk_full_after(monkeypatch, 0)
    assert main(["calibrate", str(photo)]) != 0
    capsys.readouterr()
    # before the fix: the old file was moved to history first and no new one was written
    assert cal.read_bytes() == old


def test_plan_on_a_full_disk_leaves_the_old_pair_of_files(cell_dir, capsys, monkeypatch):
    parts = cell_dir / "parts.yaml"
    parts.write_text(yaml.safe_dump([{"id": "r1", "class": "red", "x_mm": 200, "y_mm": 0}]))
    out = cell_dir / "out"
    assert main(["plan", "--parts", str(parts), "--cell", str(cell_dir / "cell.yaml"), "--out", str(out), "--no-plots"]) == 0
    old = {name: (out / name).read_bytes() for name in ("joints.csv", "plan.json")}
    parts.write_text(yaml.safe_dump([{"id": "r2", "class": "red", "x_mm": 220, "y_mm": 40}]))
    _disk_full_after(monkeypatch, 1)        # joints.csv's new bytes reach the disk, plan.json's do not
    assert main(["plan", "--parts", str(parts), "--cell", str(cell_dir / "cell.yaml"), "--out", str(out), "--no-plots"]) != 0
    capsys.readouterr()
    # before the fix: a new joints.csv beside the old plan.json
    assert {name: (out / name).read_bytes() for name in old} == old
    assert not [p.name for p in out.iterdir() if ".tmp" in p.name]


def test_a_rerun_on_a_full_disk_keeps_the_run_state(cell_dir, capsys, monkeypatch):
    folder = cell_dir / "photos"
    folder.mkdir()
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", folder / "demo_01.jpg")
    out = cell_dir / "out"
    assert main(["run", str(folder), "--out", str(out)]) == 0
    state = (out / "run_state.json").read_bytes()
    _disk_full_after(monkeypatch, 0)
    assert main(["run", str(folder), "--out", str(out)]) != 0
    capsys.readouterr()
    assert (out / "run_state.json").read_bytes() == state     # before the fix: deleted before failing


def test_run_out_equal_to_its_photo_folder_is_refused(cell_dir, capsys):
    folder = cell_dir / "photos"
    folder.mkdir()
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", folder / "demo_01.jpg")
    assert main(["run", str(folder), "--out", str(folder)]) == 1
    assert "--out is the photo folder" in capsys.readouterr().err
    assert sorted(p.name for p in folder.iterdir()) == ["demo_01.jpg"]
