"""The cell file: the demo and starter cells load; each kind of broken file gives one clear line per
problem naming the key or YAML line, exit code 2 from `gripsight validate`, and no traceback."""

from __future__ import annotations

import copy

import pytest
import yaml

from gripsight.app.cli import main
from gripsight.app.cellfile import load_cell, parse_cell, starter_cell_text
from gripsight.app.errors import CellFileError
from tests.conftest import SAMPLE_CELL, sample_cell_data


def test_demo_cell_loads_with_hash_and_values():
    cell = load_cell(SAMPLE_CELL)
    assert cell.cell == "print-farm-token-sorter"
    assert cell.arm.joints.shoulder.max_deg == 150
    assert cell.markers.layout[9].z == 60
    assert set(cell.bins) == {"red", "green", "blue", "yellow", "reject"}
    assert len(cell.sha256) == 64
    assert cell.motion.time_scaling == "quintic"


def test_starter_file_is_a_valid_cell_and_keeps_its_comments():
    text = starter_cell_text()
    assert "MEASURE" in text
    cell = parse_cell(yaml.safe_load(text))
    assert cell.arm.linkage.type == "parallel"


def test_defaults_fill_optional_sections():
    data = sample_cell_data()
    for key in ("camera", "motion", "keep_out"):
        data.pop(key)
    cell = parse_cell(data)
    assert cell.camera.lens == "estimate"
    assert cell.motion.sample_hz == 50
    assert cell.keep_out == []


def _mutate(path_keys, value):
    data = copy.deepcopy(sample_cell_data())
    node = data
    for key in path_keys[:-1]:
        node = node[key]
    if value is _DELETE:
        del node[path_keys[-1]]
    else:
        node[path_keys[-1]] = value
    return yaml.safe_dump(data, sort_keys=False)


_DELETE = object()

# (name, file text, expected substring of the first error line)
BROKEN = [
    ("missing key", _mutate(["arm", "upper_arm_mm"], _DELETE), "arm.upper_arm_mm: required key is missing"),
    ("wrong type", _mutate(["arm", "forearm_mm"], [160]), "arm.forearm_mm: must be a number"),
    ("min above max", _mutate(["arm", "joints", "shoulder", "min_deg"], 170),
     "arm.joints.shoulder.min_deg: must be less than max_deg (150)"),
    ("negative length", _mutate(["arm", "upper_arm_mm"], -150), "arm.upper_arm_mm: input should be greater than 0"),
    ("unknown linkage", _mutate(["arm", "linkage", "type"], "delta"),
     "arm.linkage.type: must be one of 'serial', 'parallel' or 'four_bar', got 'delta'"),
    ("non-numeric value", _mutate(["markers", "size_mm"], "forty"), "markers.size_mm: must be a number, got 'forty'"),
    ("quoted number", _mutate(["motion", "safe_z_mm"], "100"), "motion.safe_z_mm: must be a number, got '100'"),
    ("nan", _mutate(["bins", "red", "x"], float("nan")), "bins.red.x: must be a finite number"),
    ("unknown key", _mutate(["arm", "fore_arm_mm"], 160), "arm.fore_arm_mm: unknown key"),
    ("four_bar without lengths", _mutate(["arm", "linkage"], {"type": "four_bar"}),
     "arm.linkage.crank_mm: required for a four_bar linkage"),
    ("servo range", _mutate(["arm", "joints", "base", "max_deg"], 120),
     "arm.joints.base.max_deg: 120 deg maps to 2833 us, outside the servo range 500-2500 us"),
    ("home outside limits", _mutate(["motion", "home_deg", "shoulder"], 170),
     "motion.home_deg.shoulder: 170 is outside the joint limits [0, 150]"),
    ("marker id not in dictionary", _mutate(["markers", "layout", 9], _DELETE).replace("  layout:\n", "  layout:\n    77: {x: 300, y: 0}\n"),
     "markers.layout.77: id 77 does not exist in aruco_4x4_50"),
    ("unknown marker dictionary", _mutate(["markers", "dictionary"], "aruco_4x4_60"),
     "markers.dictionary: must be one of 'aruco_4x4_50', 'aruco_4x4_100'"),
    ("bin without class", _mutate(["bins", "purple"], {"x": 1, "y": 2}), "bins.purple: no part class 'purple'"),
    ("yaml syntax error", "cell: x\narm: {upper_arm_mm: 150\nmarkers: [\n", "line "),
    ("duplicate key", "cell: a\ncell: b\n", "line 2, column 1: YAML error: duplicate key 'cell'"),
    ("python tag", "cell: !!python/object/apply:os.system ['echo pwned']\n", "YAML error: could not determine a constructor"),
    ("empty file", "", "the file is empty"),
    ("a list, not a mapping", "- 1\n- 2\n", "the file is a list, not a mapping of keys"),
]


@pytest.mark.parametrize("name, text, expected", BROKEN, ids=[b[0] for b in BROKEN])
def test_broken_cell_file_gives_one_line_per_problem_and_exit_2(tmp_path, capsys, name, text, expected):
    path = tmp_path / "cell.yaml"
    path.write_text(text)
    code = main(["validate", str(path)])
    out, err = capsys.readouterr()
    assert code == 2
    lines = err.strip().splitlines()
    assert lines, "an error must be printed"
    assert all(line.startswith(f"error: {path}: ") for line in lines)
    assert any(expected in line for line in lines), lines
    assert "Traceback" not in err and out == ""


def test_directory_and_missing_file(tmp_path, capsys):
    assert main(["validate", str(tmp_path)]) == 2
    assert "is a directory, not a cell file" in capsys.readouterr().err
    assert main(["validate", str(tmp_path / "nope.yaml")]) == 2
    assert "no such cell file" in capsys.readouterr().err


def test_binary_file(tmp_path, capsys):
    path = tmp_path / "cell.yaml"
    path.write_bytes(b"\xff\xd8\xff\xe0 not yaml")
    assert main(["validate", str(path)]) == 2
    assert "is not UTF-8 text" in capsys.readouterr().err


def test_every_problem_is_reported_not_just_the_first(tmp_path):
    data = sample_cell_data()
    data["arm"]["upper_arm_mm"] = -1
    data["arm"]["joints"]["elbow"]["max_speed_deg_s"] = "fast"
    data["motion"]["time_scaling"] = "linear"
    with pytest.raises(CellFileError) as info:
        parse_cell(data, "cell.yaml")
    wheres = [p.where for p in info.value.problems]
    assert wheres == ["arm.upper_arm_mm", "arm.joints.elbow.max_speed_deg_s", "motion.time_scaling"]


def test_validate_ok_summary(capsys):
    assert main(["validate", str(SAMPLE_CELL)]) == 0
    out = capsys.readouterr().out
    assert out.startswith("ok: print-farm-token-sorter: parallel arm 150+160 mm, 9 markers (1 raised)")
    assert "reach at grip height z=6 mm: r 118.1-351.0 mm" in out


@pytest.mark.parametrize("name", ["aruco_mip_36h12", "aruco_7x7_1000", "apriltag_36h11"])
def test_every_opencv_dictionary_accepted_by_name(tmp_path, name):
    """Issue 19: a dictionary OpenCV predefines (cv2.aruco.DICT_ARUCO_MIP_36h12, DICT_7X7_1000) is a valid
    cell; ids are checked against its size."""
    path = tmp_path / "cell.yaml"
    path.write_text(_mutate(["markers", "dictionary"], name))
    assert main(["validate", str(path)]) == 0


@pytest.mark.parametrize("change, key, fragment", [
    (lambda d: d["bins"]["red"].update(x=900, y=0), "bins.red", "cannot be reached at drop height"),
    # inside each joint's limits, but upper arm and forearm folded past the elbow stop (interior 10 deg)
    (lambda d: d["motion"]["home_deg"].update(shoulder=20, elbow=20), "motion.home_deg", "the home pose breaks the arm's own limits"),
])
def test_validate_refuses_what_plan_refuses_naming_the_key(tmp_path, capsys, change, key, fragment):
    # one cell check for validate and plan: a cell `validate` passes is never refused by `plan` for the cell
    data = sample_cell_data()
    change(data)
    cell = tmp_path / "cell.yaml"
    cell.write_text(yaml.safe_dump(data))
    parts = tmp_path / "parts.yaml"
    parts.write_text("parts:\n  - {class: red, x_mm: 200, y_mm: 0}\n")
    assert main(["validate", str(cell)]) == 2
    said = capsys.readouterr().err
    assert f"{cell}: {key}: {fragment}" in said
    assert main(["plan", "--parts", str(parts), "--cell", str(cell), "--out", str(tmp_path / "o")]) == 2
    assert f"{key}: {fragment}" in capsys.readouterr().err


def test_validate_lists_shared_colours_and_warns_when_shapes_cannot_tell_them_apart(tmp_path, capsys):
    data = copy.deepcopy(sample_cell_data())
    red = data["parts"]["red"]                      # box 22 x 22 mm, 22 mm high
    data["parts"]["red_disc"] = {"lab": list(red["lab"]), "tolerance": 20, "height_mm": 14, "shape": "cylinder",
                                 "footprint_mm": [30]}
    data["bins"]["red_disc"] = {"x": 150, "y": 240}
    path = tmp_path / "cell.yaml"
    path.write_text(yaml.safe_dump(data))
    assert main(["validate", str(path)]) == 0
    out, err = capsys.readouterr()
    assert ("shared colour: red, red_disc (CIEDE2000 up to 0.0 apart, under half the tolerance): told apart by shape "
            "and size (red box 22x22 mm, 22 mm high; red_disc cylinder 30 mm, 14 mm high)") in out
    assert "blue" not in out.split("shared colour:")[1] and err == ""
    # a 24 x 24 box of (nearly) the red: sides 9 % from the cube's, the same shape: too close, a warning, exit 0
    data["parts"]["red_big"] = {"lab": [48, 60, 42], "tolerance": 20, "height_mm": 22, "shape": "box",
                                "footprint_mm": [24, 24]}
    data["bins"]["red_big"] = {"x": 60, "y": 240}
    path.write_text(yaml.safe_dump(data))
    assert main(["validate", str(path)]) == 0
    out, err = capsys.readouterr()
    # CIEDE2000 (46, 60, 42) to (48, 60, 42) = dL / SL = 2 / 1.0251 = 1.951 (Sharma, Wu and Dalal 2005: only
    # lightness differs, SL = 1 + 0.015 (L - 50)^2 / sqrt(20 + (L - 50)^2) at the mean L 47); members in file order
    assert "shared colour: red, red_big, red_disc (CIEDE2000 up to 2.0 apart" in out
    assert err.strip() == ("warning: parts.red and parts.red_big: one colour, and shapes and sizes too close to tell "
                           "apart (box 22x22 mm, 22 mm high; box 24x24 mm, 22 mm high: the same shape, footprints "
                           "within 15%); a part of either may be sorted as the other: change a colour or a size")
    # the demo cell (one class per colour) says nothing more
    assert main(["validate", str(SAMPLE_CELL)]) == 0
    out, err = capsys.readouterr()
    assert "shared colour" not in out and err == ""


@pytest.mark.parametrize("size_mm, camera, warned", [
    (60, {"height_mm": 760}, True), (60, {"centre_mm": [202.5, 0.0, 760.0]}, True),
    (40, {"height_mm": 760}, False), (60, {}, False)])
def test_validate_warns_of_a_table_marker_behind_a_raised_markers_stand(tmp_path, capsys, size_mm, camera, warned):
    """The demo layout was made for 40 mm markers; with 60 mm ones the riser's 80 mm box stands in front of
    marker 3 as a camera 760 mm above the markers' middle sees it (tests/vision/test_markergeom.py works it
    out by hand). Said from the cell file alone when it places the camera; nothing assumed otherwise."""
    data = sample_cell_data()
    data["markers"]["size_mm"] = size_mm
    data["camera"].update(camera)
    path = tmp_path / "cell.yaml"
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    assert main(["validate", str(path)]) == 0
    err = capsys.readouterr().err
    said = [line for line in err.splitlines() if "stand" in line]
    if warned:
        assert said == [f"warning: markers.layout.3: raised marker 9's stand will stand in front of it as seen from "
                        f"{'camera.centre_mm' if 'centre_mm' in camera else 'a camera 760 mm (camera.height_mm) above the markers' + chr(39) + ' middle'}"
                        " (its image covers 5 % of the black square); calibration will set it aside if its corners "
                        "are off: move one of them apart"]
    else:
        assert said == []
