"""Shared fixtures: the demo cell and cells of every linkage type."""

from __future__ import annotations

import copy
import shutil
from pathlib import Path

import pytest
import yaml

ROOT = Path(__file__).resolve().parents[1]
SAMPLE_CELL = ROOT / "sample_images" / "cell.yaml"


def sample_cell_data() -> dict:
    """The demo cell as plain YAML data (a fresh copy every call)."""
    return yaml.safe_load(SAMPLE_CELL.read_text())


def cell_data_with_linkage(kind: str, level: bool = True) -> dict:
    """The demo cell with another elbow linkage; joint limits opened so each type is exercised.

    The four-bar is a non-parallelogram with Grashof lengths (crank 40, coupler 148, rocker 45 on a
    150 mm upper arm).
    """
    data = copy.deepcopy(sample_cell_data())
    arm = data["arm"]
    arm["tool"]["level"] = level
    if kind == "serial":
        arm["linkage"] = {"type": "serial"}
        arm["joints"]["elbow"].update(min_deg=-170, max_deg=170,
                                      servo={"channel": 2, "map": [[-180, 500], [180, 2500]]})
        data["motion"]["home_deg"]["elbow"] = -90
    elif kind == "four_bar":
        arm["linkage"] = {"type": "four_bar", "crank_mm": 40, "coupler_mm": 148, "rocker_mm": 45, "assembly": "open"}
        arm["joints"]["elbow"].update(min_deg=-150, max_deg=150,
                                      servo={"channel": 2, "map": [[-150, 500], [150, 2500]]})
        data["motion"]["home_deg"]["elbow"] = 0
    else:
        arm["linkage"] = {"type": "parallel"}
    return data


@pytest.fixture
def sample_cell():
    from gripsight.app.cellfile import load_cell

    return load_cell(SAMPLE_CELL)


def calibrated_photos(tmp: Path, photos) -> tuple[Path, Path]:
    """In ``tmp``: the sample cell (cell.yaml), a folder ``photos`` holding copies of ``photos`` and the
    sample calibration made with that cell (calibration.yaml). Returns (the folder, the calibration)."""
    from gripsight.app.cli import main

    shutil.copy(SAMPLE_CELL, tmp / "cell.yaml")
    folder = tmp / "photos"
    folder.mkdir()
    for photo in photos:
        shutil.copy(photo, folder / Path(photo).name)
    cal = tmp / "calibration.yaml"
    assert main(["calibrate", str(ROOT / "sample_images" / "calibration.jpg"), "--cell", str(tmp / "cell.yaml"),
                 "--out", str(cal)]) == 0
    return folder, cal
