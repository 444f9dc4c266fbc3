"""Hardening: bad photos for every command, fuzzed input files, random cells, killed writers and runs,
two writers on one folder, paths that try to leave --out, and the table of error messages."""

from __future__ import annotations

import ast
import json
import os
import re
import shutil
import signal
import subprocess
import sys
import time
import zlib
from pathlib import Path

import cv2
import numpy as np
import pytest
import yaml
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from gripsight.planning.arm import Reason
from gripsight.app.cli import main
from gripsight.app.cellfile import load_cell, parse_cell
from gripsight.app.errors import CellFileError
from gripsight.planning.errors import CellProblems
from gripsight.app.fileio import child_folder
from gripsight.planning.picks import Planner
from gripsight.app.partsfile import parse_parts
from tests.conftest import ROOT, SAMPLE_CELL, sample_cell_data

SAMPLES = ROOT / "sample_images"
CLI = [sys.executable, "-c", "from gripsight.app.cli import entry; entry()"]


# ------------------------------------------------------------------ bad photos, every command
def _png_header_claiming(width: int, height: int) -> bytes:
    ihdr = width.to_bytes(4, "big") + height.to_bytes(4, "big") + bytes([8, 2, 0, 0, 0])
    chunk = b"IHDR" + ihdr
    return (b"\x89PNG\r\n\x1a\n" + len(ihdr).to_bytes(4, "big") + chunk
            + zlib.crc32(chunk).to_bytes(4, "big") + b"\x00" * 64)


def _bad_photos(folder: Path, source: Path) -> dict[str, tuple[Path, bool]]:
    """name -> (file, usable?)"""
    image = cv2.imread(str(source))
    raw = source.read_bytes()
    out = {}

    def put(name, data_or_image, usable, ext=".png"):
        path = folder / f"{name}{ext}"
        if isinstance(data_or_image, bytes):
            path.write_bytes(data_or_image)
        else:
            cv2.imwrite(str(path), data_or_image)
        out[name] = (path, usable)

    put("zero-byte", b"", False, ".jpg")
    put("truncated", raw[: len(raw) // 2], False, ".jpg")
    put("text", b"not a photo, just words\n", False, ".jpg")
    put("alpha", cv2.cvtColor(image, cv2.COLOR_BGR2BGRA), True)
    put("sixteen-bit", image.astype(np.uint16) * 257, True)
    put("grey", cv2.cvtColor(image, cv2.COLOR_BGR2GRAY), True)
    put("one-pixel", image[:1, :1], False)
    put("huge-header", _png_header_claiming(20000, 20000), False)
    put("spaces and ünïcode", image, True, ".jpg")
    return out


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cal")
    cal = tmp / "calibration.yaml"
    assert main(["calibrate", str(SAMPLES / "calibration.jpg"), "--cell", str(SAMPLE_CELL), "--out", str(cal)]) == 0
    return cal


@pytest.mark.parametrize("command", ["calibrate", "check", "detect", "plan"])
def test_bad_photos_give_one_line_or_a_result_never_a_trace(tmp_path, capsys, calibrated, command):
    source = SAMPLES / ("calibration.jpg" if command == "calibrate" else "demo/demo_01.jpg")
    for name, (path, usable) in _bad_photos(tmp_path, source).items():
        args = {"calibrate": ["calibrate", str(path), "--cell", str(SAMPLE_CELL), "--out", str(tmp_path / "c.yaml")],
                "check": ["check", str(path), "--cell", str(SAMPLE_CELL), "--calibration", str(calibrated)],
                "detect": ["detect", str(path), "--cell", str(SAMPLE_CELL), "--calibration", str(calibrated)],
                "plan": ["plan", str(path), "--cell", str(SAMPLE_CELL), "--calibration", str(calibrated),
                         "--out", str(tmp_path / "plan" / name)]}[command]
        code = main(args)
        out, err = capsys.readouterr()
        assert "Traceback" not in err + out, (command, name)
        if usable:
            assert code == 0, (command, name, err)
        else:
            assert code == 2, (command, name)      # a bad input file: DEVELOPERS.md, "Exit codes"
            lines = err.strip().splitlines()
            assert len(lines) == 1 and lines[0].startswith("error: ") and path.name in lines[0], (command, name, err)


def test_pixel_limit_is_checked_before_decoding(tmp_path, capsys):
    path = tmp_path / "big.png"
    path.write_bytes(_png_header_claiming(20000, 20000))
    assert main(["detect", str(path), "--cell", str(SAMPLE_CELL)]) == 2
    assert "20000x20000 px is more than the limit of 50,000,000 pixels" in capsys.readouterr().err
    small = tmp_path / "photo.jpg"
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", small)
    assert main(["--max-pixels", "1000", "detect", str(small), "--cell", str(SAMPLE_CELL)]) == 2
    assert "1280x960 px is more than the limit of 1,000 pixels" in capsys.readouterr().err
    os.environ.pop("GRIPSIGHT_MAX_PIXELS", None)


def test_unreadable_photo(tmp_path, capsys, monkeypatch):
    path = tmp_path / "locked.jpg"
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", path)
    path.chmod(0)
    if os.access(path, os.R_OK):
        # root reads any file: make the photo reader's open fail the way a permission error does
        import builtins

        import gripsight.vision.photo as photo_module

        def denied(file, *args, **kwargs):
            if Path(file) == path:
                raise PermissionError(13, "Permission denied")
            return builtins.open(file, *args, **kwargs)

        monkeypatch.setattr(photo_module, "open", denied, raising=False)
    try:
        assert main(["detect", str(path), "--cell", str(SAMPLE_CELL)]) == 2
        err = capsys.readouterr().err
        assert "locked.jpg: cannot be read (Permission denied); check its permissions" in err
    finally:
        path.chmod(0o644)


def test_run_and_batch_take_bad_photos_as_rows(tmp_path, capsys):
    folder = tmp_path / "photos"
    folder.mkdir()
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", folder / "a.jpg")
    (folder / "b.jpg").write_bytes(b"")
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    assert main(["run", str(folder), "--out", str(tmp_path / "run")]) == 0
    assert "b.jpg: error:" in capsys.readouterr().out
    assert main(["batch", str(folder), "--workers", "1", "--out", str(tmp_path / "batch")]) == 5


# ------------------------------------------------------------------ fuzzed input files
_VALUES = st.one_of(st.none(), st.booleans(), st.integers(-10**30, 10**30), st.floats(allow_nan=True, allow_infinity=True),
                    st.text(max_size=12), st.lists(st.integers(), max_size=4), st.dictionaries(st.text(max_size=5), st.integers(), max_size=3),
                    st.recursive(st.integers(), lambda c: st.lists(c, max_size=2), max_leaves=40))


def _paths(data, prefix=()):
    if isinstance(data, dict):
        for k, v in data.items():
            yield prefix + (k,)
            yield from _paths(v, prefix + (k,))
    elif isinstance(data, list):
        for i, v in enumerate(data):
            yield prefix + (i,)
            yield from _paths(v, prefix + (i,))


def _mutate(data, path, action, value):
    node = data
    for key in path[:-1]:
        node = node[key]
    if action == "delete" and isinstance(node, dict):
        del node[path[-1]]
    elif action == "extra" and isinstance(node, dict):
        node["zz_extra"] = value
    else:
        node[path[-1]] = value
    return data


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.data())
def test_fuzzed_cell_files_load_or_fail_with_a_key(tmp_path, data):
    cell = sample_cell_data()
    paths = list(_paths(cell))
    path = data.draw(st.sampled_from(paths))
    action = data.draw(st.sampled_from(["replace", "delete", "extra"]))
    mutated = _mutate(cell, path, action, data.draw(_VALUES))
    file = tmp_path / "cell.yaml"
    file.write_text(yaml.safe_dump(mutated, sort_keys=False))
    try:
        load_cell(file)
    except (CellFileError, CellProblems) as exc:
        assert exc.problems and all(isinstance(p.where, str) and p.message for p in exc.problems)
        assert "\n" not in str(exc)


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.sampled_from(["!!python/object/apply:os.system ['touch {flag}']", "!!python/name:os.system",
                        "!!binary AAAA", "&a [*a]", "[" * 5000, "{x: " * 300, "\t\x00\x01", "cell: !!set {a, b}"]))
def test_yaml_tags_and_odd_text_never_run_code(tmp_path, text):
    flag = tmp_path / "pwned"
    file = tmp_path / "cell.yaml"
    file.write_text("cell: x\nmarkers: " + text.replace("{flag}", str(flag)) + "\n")
    with pytest.raises(CellFileError):
        load_cell(file)
    assert not flag.exists()


@settings(max_examples=80, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.data())
def test_fuzzed_calibration_files(tmp_path, calibrated, data):
    from gripsight.app.calfile import read_calibration

    record = yaml.safe_load(calibrated.read_text())
    path = data.draw(st.sampled_from(list(_paths(record))))
    mutated = _mutate(record, path, data.draw(st.sampled_from(["replace", "delete", "extra"])), data.draw(_VALUES))
    file = tmp_path / "calibration.yaml"
    file.write_text(yaml.safe_dump(mutated, sort_keys=False))
    try:
        stored = read_calibration(file)
        assert np.isfinite(stored.mapping.H_table_from_pixel).all()
    except (CellFileError, CellProblems) as exc:
        assert exc.problems


# ------------------------------------------------------------------ random cells and targets
@settings(max_examples=25, deadline=None)
@given(linkage=st.sampled_from(["serial", "parallel", "four_bar"]), upper=st.floats(110, 190), fore=st.floats(110, 200),
       base_h=st.floats(50, 120), seed=st.integers(0, 2**16))
def test_random_cells_emit_only_checked_samples(linkage, upper, fore, base_h, seed):
    from tests.conftest import cell_data_with_linkage

    data = cell_data_with_linkage(linkage)
    data["arm"].update(upper_arm_mm=upper, forearm_mm=fore, base_height_mm=base_h)
    if linkage == "four_bar":
        data["arm"]["linkage"]["coupler_mm"] = upper - 2
    cell = parse_cell(data)
    try:
        planner = Planner(cell)
    except (CellFileError, CellProblems) as exc:            # a bin, the home pose or a class out of reach: said before planning
        assert all(p.where.startswith(("bins.", "motion.home_deg", "parts.")) for p in exc.problems)   # parts.<class>.height_mm: cannot be carried
        return
    rng = np.random.default_rng(seed)
    entries = [{"class": str(rng.choice(list(cell.parts))), "x_mm": float(rng.uniform(-50, 450)),
                "y_mm": float(rng.uniform(-300, 300)), "yaw_deg": float(rng.uniform(-90, 90))} for _ in range(6)]
    plan = planner.plan(parse_parts(entries, cell))
    arm = planner.arm
    q = plan.samples.joints_rad
    assert np.isfinite(q).all()
    assert np.all(arm.check_joints(q) == Reason.OK)
    assert np.all(np.abs(np.diff(q, axis=0)) / planner.dt_s <= arm.max_speed_rad_s * (1 + 1e-9))
    np.testing.assert_allclose(arm.forward(q), plan.samples.xyz_mm, atol=1e-6)
    assert plan.samples.xyz_mm[:, 2].min() >= cell.motion.floor_clearance_mm - 1e-9
    for o in plan.parts:
        assert (o.status == "planned") == (o.rejection is None)
        if o.rejection is not None:
            assert o.rejection.check and o.rejection.detail
    targets = rng.uniform([-600, -600, -300], [600, 600, 600], (2000, 3))
    sol = arm.inverse(targets)
    assert np.isfinite(sol.joints_rad[sol.ok]).all()


# ------------------------------------------------------------------ nothing lost
_WRITER = """
import sys
from gripsight.app.fileio import write_text_atomic
target, n = sys.argv[1], int(sys.argv[2])
i = 0
while True:
    write_text_atomic(target, ("A" if i % 2 else "B") * n)
    i += 1
"""


def test_a_killed_writer_leaves_the_old_file_or_the_new_never_half(tmp_path):
    target = tmp_path / "out.txt"
    n = 4_000_000
    rng = np.random.default_rng(0)
    for _ in range(8):
        proc = subprocess.Popen([sys.executable, "-c", _WRITER, str(target), str(n)], cwd=ROOT)
        time.sleep(float(rng.uniform(0.3, 0.9)))
        proc.send_signal(signal.SIGKILL)
        proc.wait()
        if target.exists():
            text = target.read_text()
            assert len(text) == n and text in ("A" * n, "B" * n)
    assert target.exists()


def _demo_copy(tmp_path) -> Path:
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    shutil.copytree(SAMPLES / "demo", tmp_path / "demo")
    return tmp_path / "demo"


def _kill_when(proc, ready, timeout=120):
    end = time.time() + timeout
    while time.time() < end and proc.poll() is None:
        if ready():
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait()
            return True
        time.sleep(0.05)
    proc.wait()
    return False


def _body(path: Path) -> list[str]:
    return [line for line in path.read_text().splitlines() if not line.startswith("#")]


def _batch_photos(tmp_path, n: int) -> Path:
    """The first n batch photos in a folder, with the cell and calibration photo beside it."""
    folder = tmp_path / "photos"
    folder.mkdir()
    for photo in sorted((SAMPLES / "batch").glob("*.jpg"))[:n]:
        shutil.copy(photo, folder / photo.name)
    shutil.copy(SAMPLES / "calibration.jpg", tmp_path / "calibration.jpg")
    shutil.copy(SAMPLE_CELL, tmp_path / "cell.yaml")
    return folder


def test_run_killed_mid_folder_resumes_to_the_uninterrupted_result(tmp_path):
    folder = _demo_copy(tmp_path)
    assert main(["run", str(folder), "--out", str(tmp_path / "whole")]) == 0
    out = tmp_path / "killed"

    def two_done():
        try:
            return len(json.loads((out / "run_state.json").read_text())["done"]) >= 2
        except (OSError, ValueError, KeyError):
            return False

    proc = subprocess.Popen(CLI + ["run", str(folder), "--out", str(out)], cwd=ROOT, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    assert _kill_when(proc, two_done), "the run finished before it could be killed"
    assert main(["run", str(folder), "--out", str(out), "--resume"]) == 0
    assert _body(out / "run.csv") == _body(tmp_path / "whole" / "run.csv")


def test_batch_killed_mid_folder_resumes_to_the_uninterrupted_result(tmp_path, capsys):
    folder = _batch_photos(tmp_path, 8)
    assert main(["batch", str(folder), "--workers", "2", "--out", str(tmp_path / "whole")]) == 0
    out = tmp_path / "killed"
    proc = subprocess.Popen(CLI + ["batch", str(folder), "--workers", "2", "--out", str(out)], cwd=ROOT,
                            start_new_session=True, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    assert _kill_when(proc, lambda: len(list(out.glob("*/row.json"))) >= 3), "the batch finished too soon"
    assert not (out / "batch.csv").exists()
    assert main(["batch", str(folder), "--workers", "2", "--out", str(out), "--resume"]) == 0
    capsys.readouterr()
    assert (out / "batch.csv").read_text() == (tmp_path / "whole" / "batch.csv").read_text()


def test_a_second_batch_on_the_same_folder_refuses(tmp_path, capsys):
    folder = _batch_photos(tmp_path, 6)
    out = tmp_path / "out"
    first = subprocess.Popen(CLI + ["batch", str(folder), "--workers", "1", "--out", str(out)], cwd=ROOT,
                             stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    end = time.time() + 60
    while not (out / ".gripsight.lock").exists() and time.time() < end:
        time.sleep(0.02)
    code = main(["batch", str(folder), "--workers", "1", "--out", str(out)])
    err = capsys.readouterr().err
    first.wait()
    assert code == 1
    assert re.search(r"another gripsight command \(pid \d+\) is writing here", err)
    assert first.returncode == 0      # the lock file stays; the kernel's lock on it ended with the process


@pytest.mark.parametrize("name", ["../../etc/passwd", "/abs/photo.jpg", "..", ".", "a/../../b.jpg", "x\\..\\..\\y.jpg"])
def test_photo_names_cannot_leave_the_output_folder(tmp_path, name):
    out = tmp_path / "out"
    out.mkdir()
    path = child_folder(out, name)
    assert path.resolve().parent == out.resolve()


# ------------------------------------------------------------------ the table of error messages
_ERROR_TYPES = {"GripsightError", "CellFileError", "PhotoError", "CalibrationError", "ServoRangeError",
                "PathGeometryError", "Problem", "CellProblems", "LensFileError", "SheetError", "PlanningError",
                "VisionError", "InputError", "UsageError"}


def _literal_fragments(node) -> list[str]:
    if isinstance(node, ast.Constant) and isinstance(node.value, str):
        return [node.value]
    if isinstance(node, ast.JoinedStr):
        return [v.value for v in node.values if isinstance(v, ast.Constant) and isinstance(v.value, str)]
    return []


def _messages_in_code():
    """The longest literal fragment of every message given to an error type or a Problem."""
    found = []
    for pkg in ("planning", "vision"):
        for path in sorted((ROOT / pkg).rglob("*.py")):
            tree = ast.parse(path.read_text())
            for node in ast.walk(tree):
                if isinstance(node, ast.Call) and getattr(node.func, "id", getattr(node.func, "attr", "")) in _ERROR_TYPES:
                    args = node.args[1:] if getattr(node.func, "id", "") == "Problem" else node.args[:1]
                    for arg in args:
                        pieces = [p.strip(" :;,.()'") for p in _literal_fragments(arg)]
                        pieces = [p for p in pieces if len(p) >= 12]
                        if pieces:
                            found.append((path.name, node.lineno, max(pieces, key=len)))
    return found


def test_every_error_message_is_in_the_developers_table():
    doc = (ROOT / "DEVELOPERS.md").read_text()
    table = doc[doc.index("## Error messages"):]
    flat = re.sub(r"[`*]", "", table)
    missing = [(f, line, text) for f, line, text in _messages_in_code() if re.sub(r"[`*]", "", text) not in flat]
    assert not missing, "add these to DEVELOPERS.md's error table:\n" + "\n".join(f"{f}:{n}: {t}" for f, n, t in missing)


def test_strict_json_writes_null_for_non_finite_floats_and_numpy_scalars_as_numbers():
    # RFC 8259 has no NaN or Infinity; Python's json module (the reference for everything else) reads
    # the text back to the same values
    from gripsight.app.fileio import strict_json

    plain = {"a": [1, 2.5, "x", None, True], "b": {"c": (1.0, -0.0)}}
    assert strict_json(plain, indent=None) == json.dumps(plain)
    odd = {"nan": float("nan"), "inf": [float("inf"), np.float64(-np.inf)], "n": np.int64(3), "f": np.float32(0.5),
           "ok": np.bool_(True), "t": (np.float64(2.0),)}
    assert json.loads(strict_json(odd)) == {"nan": None, "inf": [None, None], "n": 3, "f": 0.5, "ok": True, "t": [2.0]}
