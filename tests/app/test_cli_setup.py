"""`gripsight init` and `gripsight reach` end to end, through the console entry point."""

from __future__ import annotations

import os
import subprocess
import sys

import numpy as np

from gripsight.planning.arm import Arm
from gripsight.app.cli import main
from gripsight.app.cellfile import load_cell
from gripsight.planning.reach import radial_reach, unreachable_places
from tests.conftest import SAMPLE_CELL


def test_init_writes_a_valid_cell_and_refuses_to_overwrite(tmp_path, capsys):
    path = tmp_path / "new cell.yaml"            # a space in the name on purpose
    assert main(["init", str(path)]) == 0
    assert load_cell(path).cell == "my-cell"
    before = path.read_bytes()
    assert main(["init", str(path)]) == 1
    assert "already exists; pass --force" in capsys.readouterr().err
    assert path.read_bytes() == before
    assert main(["init", str(path), "--force"]) == 0


def test_reach_draws_and_summarises(tmp_path, capsys):
    out = tmp_path / "reach.png"
    assert main(["reach", str(SAMPLE_CELL), "--out", str(out)]) == 0
    text = capsys.readouterr().out
    assert out.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert "reach: table z=0 mm: r 128.0-350.4 mm" in text
    assert "cannot reach: work-area corner 1 at (340, -200) mm, z=6 mm: out_of_reach" in text
    assert not any(name.startswith(".") for name in os.listdir(tmp_path))  # no temp files left


def test_radial_reach_matches_the_law_of_cosines(sample_cell):
    """At the height where the tool-less wrist is level with the shoulder, the outer limit is set by
    the elbow-interior stop: |W| = sqrt(L2^2 + L3^2 - 2 L2 L3 cos(165 deg)) (law of cosines)."""
    arm = Arm.from_config(sample_cell.arm)
    z = arm.base_height_mm - arm.tool_drop_mm
    expected = arm.shoulder_offset_mm + arm.tool_reach_mm + np.sqrt(
        arm.upper_arm_mm ** 2 + arm.forearm_mm ** 2
        - 2 * arm.upper_arm_mm * arm.forearm_mm * np.cos(np.radians(165)))
    assert abs(radial_reach(arm, z, step_mm=0.01).r_max_mm - expected) < 0.01


def test_unreachable_bin_is_flagged(tmp_path):
    data = SAMPLE_CELL.read_text().replace("red:    {x: 110, y: 240}", "red:    {x: 110, y: 420}")
    path = tmp_path / "cell.yaml"
    path.write_text(data)
    cell = load_cell(path)
    flagged = [u.describe() for u in unreachable_places(cell, Arm.from_config(cell.arm))]
    assert "bin red at (110, 420) mm, z=50 mm: out_of_reach" in flagged


def test_console_script_help_and_error_exit_codes(tmp_path):
    exe = [sys.executable, "-c", "from gripsight.app.cli import entry; entry()"]
    done = subprocess.run(exe + ["--help"], capture_output=True, text=True)
    assert done.returncode == 0 and "reach" in done.stdout
    done = subprocess.run(exe + ["validate", str(tmp_path / "missing.yaml")], capture_output=True, text=True)
    assert done.returncode == 2
    assert done.stderr.strip() == f"error: {tmp_path / 'missing.yaml'}: no such cell file"


def test_reach_is_measured_from_the_base_axis(sample_cell):
    """With the base axis away from the table origin (``arm.base_xy_mm``, written by arm-fit), the radial
    reach, the side view's reachable region and the classes' carry checks are those of the arm at the
    origin (reach depends only on distances from the base axis: geometry)."""
    import dataclasses

    from gripsight.planning.held import class_carry_problems
    from gripsight.planning.reach import reachable_rz

    arm = Arm.from_config(sample_cell.arm)
    dx, dy = 300.0, -25.0                      # far enough that radii from the table origin are out of reach
    moved = dataclasses.replace(arm, base_xy_mm=(dx, dy))
    for z in (30.0, 100.0):
        a, b = radial_reach(arm, z, step_mm=0.5), radial_reach(moved, z, step_mm=0.5)
        assert (a.r_min_mm, a.r_max_mm) == (b.r_min_mm, b.r_max_mm)
    r, z = np.arange(0.0, 400.0, 5.0), np.arange(-20.0, 300.0, 5.0)
    np.testing.assert_array_equal(reachable_rz(moved, r, z), reachable_rz(arm, r, z))
    shifted = sample_cell.model_copy(update={
        "work_area": [[x + dx, y + dy] for x, y in sample_cell.work_area],
        "bins": {k: b.model_copy(update={"x": b.x + dx, "y": b.y + dy}) for k, b in sample_cell.bins.items()}})
    assert class_carry_problems(shifted, moved) == class_carry_problems(sample_cell, arm) == []
