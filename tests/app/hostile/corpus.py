"""Generate the hostile corpus: bad photos, cell files, parts files, calibration files, state files and
output paths, each case with the outcome it must have.

An expected outcome is ``error`` (non-zero exit code, and a fragment the one-line message must contain:
the file, key path or photo it is about), ``warning`` (exit 0, a ``warning:`` line in the terminal) or
``result`` (exit 0). Every case also must not hang, crash or print a trace (see ``runner``).
"""

from __future__ import annotations

import copy
import hashlib
import json
import os
import shutil
import zlib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Optional

import cv2
import numpy as np
import yaml

from tests.app.hostile.third import third_pass

__all__ = ["Case", "build_corpus"]

ROOT = Path(__file__).resolve().parents[3]
SAMPLES = ROOT / "sample_images"
BAD_INPUT = 2       # exit code of a bad input file (cell, photo, calibration, parts, state); DEVELOPERS.md
FAILED = 1          # exit code of a failure to write or to do the work


@dataclass
class Case:
    name: str
    argv: list[str]
    kind: str                               # error | warning | result
    exit_code: Optional[int]
    fragment: str = ""                      # the output must contain this (case-insensitive)
    cwd: Optional[str] = None
    env: dict = field(default_factory=dict)
    readonly: Optional[Path] = None         # writes under this folder fail with EROFS
    file_size_bytes: Optional[int] = None   # RLIMIT_FSIZE: writes past this fail (a full disk)
    memory_bytes: Optional[int] = None      # a tighter RLIMIT_AS than the runner's default
    time_limit_s: Optional[float] = None
    check: Optional[Callable] = None        # check(outcome) -> None if fine, else what is wrong
    cost: float = 1.0                       # rough seconds, to start the slow ones first


# ------------------------------------------------------------------ inputs made from the samples
def _png_header(width: int, height: int) -> bytes:
    ihdr = width.to_bytes(4, "big") + height.to_bytes(4, "big") + bytes([8, 2, 0, 0, 0])
    chunk = b"IHDR" + ihdr
    return (b"\x89PNG\r\n\x1a\n" + len(ihdr).to_bytes(4, "big") + chunk
            + zlib.crc32(chunk).to_bytes(4, "big") + b"\x00" * 64)


def _jpeg_header(width: int, height: int) -> bytes:
    sof = b"\xff\xc0\x00\x11\x08" + height.to_bytes(2, "big") + width.to_bytes(2, "big") + b"\x03" + b"\x01\x22\x00\x02\x11\x01\x03\x11\x01"
    return b"\xff\xd8\xff\xe0\x00\x10JFIF\x00\x01\x01\x00\x00\x01\x00\x01\x00\x00" + sof + b"\x00" * 64 + b"\xff\xd9"


def _tiff_huge(path: Path, width: int, height: int) -> None:
    """A real, valid, uncompressed TIFF of width x height that is tiny on disk (one strip of zeros,
    sparse file): decoding it would take width*height*3 bytes."""
    import struct

    entries = [(256, 4, 1, width), (257, 4, 1, height), (258, 3, 1, 8), (259, 3, 1, 1), (262, 3, 1, 1),
               (273, 4, 1, 8 + 2 + 12 * 10 + 4), (277, 3, 1, 1), (278, 4, 1, height), (279, 4, 1, width * height),
               (284, 3, 1, 1)]
    ifd = struct.pack("<H", len(entries))
    for tag, typ, count, value in entries:
        ifd += struct.pack("<HHI", tag, typ, count) + (struct.pack("<HH", value, 0) if typ == 3 else struct.pack("<I", value))
    ifd += struct.pack("<I", 0)
    data = b"II*\x00" + struct.pack("<I", 8) + ifd
    with open(path, "wb") as fh:
        fh.write(data)
        fh.truncate(len(data) + width * height)     # sparse: no disk used


def _bmp_header(width: int, height: int) -> bytes:
    import struct

    size = width * height * 3
    return (b"BM" + struct.pack("<IHHI", 54 + size, 0, 0, 54)
            + struct.pack("<IiiHHIIiiII", 40, width, height, 1, 24, 0, size, 2835, 2835, 0, 0) + b"\x00" * 64)


def _dump(path: Path, data) -> Path:
    path.write_text(yaml.safe_dump(data, sort_keys=False))
    return path


def _set(data: dict, keypath: str, value) -> dict:
    data = copy.deepcopy(data)
    node = data
    keys = keypath.split(".")
    for k in keys[:-1]:
        node = node[int(k) if isinstance(node, list) else k]
    last = keys[-1]
    node[int(last) if isinstance(node, list) else last] = value
    return data


def _strict_json(outcome) -> Optional[str]:
    """stdout must parse as strict JSON (no NaN, Infinity)."""
    text = outcome.output.split("\n", 1)[1] if "\n" in outcome.output else outcome.output
    start = text.find("{")

    def refuse(token):
        raise ValueError(f"not JSON: {token}")
    try:
        json.loads(text[start:], parse_constant=refuse)
    except ValueError as exc:
        return f"stdout is not strict JSON: {exc}"
    return None


def _exists(path: Path, should: bool = True):
    def check(outcome):
        if path.exists() != should:
            return f"{path} {'missing' if should else 'exists'}"
        return None
    return check


def _mode_follows_umask(path: Path):
    def check(outcome):
        if not path.is_file():
            return f"{path} missing"
        mode = path.stat().st_mode & 0o777
        return None if mode == 0o644 else f"{path} has mode {mode:o}, expected 644 under umask 022"
    return check


# ------------------------------------------------------------------ the corpus
def build_corpus(root: Path) -> list[Case]:  # noqa: C901 - one long list of cases, read top to bottom
    """Write every input under ``root`` and return the cases."""
    root = Path(root)
    base = root / "base"
    base.mkdir(parents=True, exist_ok=True)
    cell_path = base / "cell.yaml"
    shutil.copy(SAMPLES / "cell.yaml", cell_path)
    cell_data = yaml.safe_load(cell_path.read_text())
    photo = base / "photo.jpg"
    shutil.copy(SAMPLES / "demo" / "demo_01.jpg", photo)
    calib_photo = base / "calibration.jpg"
    shutil.copy(SAMPLES / "calibration.jpg", calib_photo)
    cal_path = base / "calibration.yaml"
    from gripsight.app.cli import main as cli_main

    with open(os.devnull, "w") as devnull:
        import contextlib

        with contextlib.redirect_stdout(devnull), contextlib.redirect_stderr(devnull):
            assert cli_main(["calibrate", str(calib_photo), "--cell", str(cell_path), "--out", str(cal_path)]) == 0
    cal_data = yaml.safe_load(cal_path.read_text())
    folder = base / "photos"
    folder.mkdir(exist_ok=True)
    shutil.copy(photo, folder / "demo_01.jpg")
    image = cv2.imread(str(photo))
    raw = photo.read_bytes()

    cases: list[Case] = []
    CELL = ["--cell", str(cell_path)]
    CAL = ["--calibration", str(cal_path)]

    def add(name, argv, kind, code, fragment="", **kw):
        cases.append(Case(name, [str(a) for a in argv], kind, code, fragment, **kw))

    # ============================================================== photos
    pdir = root / "photos"
    pdir.mkdir()

    def put(name: str, content) -> Path:
        path = pdir / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            cv2.imwrite(str(path), content)
        return path

    bad_photos = {
        "zero-byte.jpg": b"",
        "text.jpg": b"not a photo, just words\n",
        "half-no-end.jpg": raw[: len(raw) // 2],
        "half-with-end.jpg": raw[: len(raw) // 2] + b"\xff\xd9",
        "random.jpg": np.random.default_rng(16).integers(0, 256, 5000, dtype=np.uint8).tobytes(),
        "png-truncated.png": cv2.imencode(".png", image)[1].tobytes()[:5000],
        "huge-header.png": _png_header(20000, 20000),
        "huge-header.jpg": _jpeg_header(60000, 60000),
        "huge-header.bmp": _bmp_header(30000, 30000),
        "huge-header.ppm": b"P6\n30000 30000\n255\n" + b"\x00" * 64,
        "gif.gif": b"GIF89a\x01\x00\x01\x00\x80\x00\x00\x00\x00\x00\xff\xff\xff!\xf9\x04\x01\x00\x00\x00\x00,"
                   b"\x00\x00\x00\x00\x01\x00\x01\x00\x00\x02\x02D\x01\x00;",
        "one-pixel.png": image[:1, :1],
        "tiny-20px.png": image[:20, :20],
    }
    for name, content in bad_photos.items():
        path = put(name, content)
        add(f"photo/{name}", ["detect", path, *CELL, *CAL], "error", BAD_INPUT, name)
    _tiff_huge(pdir / "huge-20000.tif", 20000, 20000)
    add("photo/huge-20000.tif", ["detect", pdir / "huge-20000.tif", *CELL, *CAL], "error", BAD_INPUT, "pixels",
        memory_bytes=3 * 1024**3, check=lambda o: None if o.max_rss_mb < 600 else f"peak RSS {o.max_rss_mb:.0f} MB: decoded before refusing")
    fifo = pdir / "fifo.jpg"
    os.mkfifo(fifo)
    add("photo/fifo", ["detect", fifo, *CELL, *CAL], "error", BAD_INPUT, "not a regular file", time_limit_s=20)
    (pdir / "zero-device.jpg").symlink_to("/dev/zero")
    add("photo/dev-zero", ["detect", pdir / "zero-device.jpg", *CELL, *CAL], "error", BAD_INPUT, "not a regular file",
        time_limit_s=20)
    (pdir / "folder.jpg").mkdir()
    add("photo/folder", ["detect", pdir / "folder.jpg", *CELL, *CAL], "error", BAD_INPUT, "folder.jpg")
    add("photo/missing", ["detect", pdir / "missing.jpg", *CELL, *CAL], "error", BAD_INPUT, "missing.jpg")
    (pdir / "dangling.jpg").symlink_to(pdir / "nowhere.jpg")
    add("photo/dangling-link", ["detect", pdir / "dangling.jpg", *CELL, *CAL], "error", BAD_INPUT, "dangling.jpg")
    # usable photos
    good = {
        "trailer.jpg": raw + b"\x00garbage after the end marker" * 40,
        "alpha.png": cv2.cvtColor(image, cv2.COLOR_BGR2BGRA),
        "sixteen-bit.png": image.astype(np.uint16) * 257,
        "photo.tif": image,
        "photo.bmp": image,
        "photo.webp": image,
        "spaces and ünïcode.jpg": image,
        "UPPER.JPG": image,
        "png-named.jpg": cv2.imencode(".png", image)[1].tobytes(),
    }
    for name, content in good.items():
        path = put(name, content)
        add(f"photo/ok/{name}", ["detect", path, *CELL, *CAL], "result", 0, "p4")      # all four parts found
    put("grey.png", cv2.cvtColor(image, cv2.COLOR_BGR2GRAY))
    add("photo/grey", ["detect", pdir / "grey.png", *CELL, *CAL], "warning", 0, "grey")
    put("blank.png", np.full_like(image, 128))
    add("photo/blank-detect", ["detect", pdir / "blank.png", *CELL, *CAL], "error", FAILED, "markers seen")
    add("photo/blank-check", ["check", pdir / "blank.png", *CELL, *CAL], "error", FAILED, "markers seen")
    add("photo/blank-calibrate", ["calibrate", pdir / "blank.png", *CELL, "--out", root / "out-blank-cal.yaml"],
        "error", None, "blank.png")
    put("half-size.png", cv2.resize(image, (640, 480), interpolation=cv2.INTER_AREA))
    add("photo/half-size-vs-calibration", ["detect", pdir / "half-size.png", *CELL, *CAL], "error", BAD_INPUT, "640x480")
    # a photo of "another cell": the markers' patches swapped around, so the layout no longer fits
    centres = {m["id"]: np.mean(m["corners_px"], axis=0).round().astype(int) for m in cal_data["markers"] if m["used"]}
    shuffled = image.copy()
    for a, b in ((0, 3), (1, 6), (2, 7), (4, 5)):
        if a in centres and b in centres:
            (ua, va), (ub, vb) = centres[a], centres[b]
            pa = image[va - 45:va + 45, ua - 45:ua + 45].copy()
            pb = image[vb - 45:vb + 45, ub - 45:ub + 45].copy()
            if pa.shape == pb.shape == (90, 90, 3):
                shuffled[va - 45:va + 45, ua - 45:ua + 45] = pb
                shuffled[vb - 45:vb + 45, ub - 45:ub + 45] = pa
    put("another-cell.png", shuffled)
    add("photo/another-cell-detect", ["detect", pdir / "another-cell.png", *CELL, *CAL], "error", FAILED, "another cell")
    add("photo/another-cell-plan", ["plan", pdir / "another-cell.png", *CELL, *CAL, "--out", root / "o-another"],
        "error", FAILED, "another cell")
    add("photo/another-cell-calibrate", ["calibrate", pdir / "another-cell.png", *CELL, "--out", root / "o-another.yaml"],
        "error", FAILED, "another cell")
    # calibrating from a photo where the raised marker (9) is covered: its row says so, and the previous
    # calibration's camera centre is kept (moved with the fitted change) instead of a guess
    riser = next(np.asarray(m["corners_px"], float) for m in cal_data["markers"] if m["id"] == 9)
    (u0, v0), (u1, v1) = riser.min(axis=0).astype(int) - 25, riser.max(axis=0).astype(int) + 25
    no_riser = image.copy()
    no_riser[max(v0, 0):v1, max(u0, 0):u1] = np.median(image[v1:v1 + 20, u0:u1].reshape(-1, 3), axis=0)
    no_riser_photo = put("no-riser.png", no_riser)
    add("photo/calibrate-marker-not-seen", ["calibrate", no_riser_photo, *CELL, "--out", root / "o-unseen.yaml"],
        "result", 0, "not seen")
    again = root / "recal"
    again.mkdir()
    shutil.copy(cal_path, again / "calibration.yaml")
    add("photo/recalibrate-keeps-centre", ["calibrate", no_riser_photo, *CELL, "--out", again / "calibration.yaml"],
        "result", 0,
        "kept the previous calibration's centre")
    put("flipped.png", cv2.flip(image, 1))
    add("photo/mirrored", ["detect", pdir / "flipped.png", *CELL, *CAL], "error", None, "flipped.png")
    for cmd in ("calibrate", "check", "plan"):
        extra = {"calibrate": ["--out", root / f"o-{cmd}.yaml"], "check": CAL, "plan": [*CAL, "--out", root / f"o-{cmd}"]}[cmd]
        for name in ("zero-byte.jpg", "half-with-end.jpg", "huge-header.png"):
            add(f"photo/{cmd}/{name}", [cmd, pdir / name, *CELL, *extra], "error", BAD_INPUT, name)
        add(f"photo/{cmd}/fifo", [cmd, fifo, *CELL, *extra], "error", BAD_INPUT, "not a regular file", time_limit_s=20)
    add("photo/strict-json", ["detect", photo, *CELL, *CAL, "--json"], "result", 0, '"photo"', check=_strict_json)
    add("photo/strict-json-grey", ["detect", pdir / "grey.png", *CELL, *CAL, "--json"], "warning", 0, "grey",
        check=_strict_json)

    # ============================================================== cell files
    cdir = root / "cells"
    cdir.mkdir()

    def cell_case(name, data_or_text, kind="error", code=BAD_INPUT, fragment="", cmd="validate", **kw):
        path = cdir / f"{name.replace('/', '_')}.yaml"
        if isinstance(data_or_text, bytes):
            path.write_bytes(data_or_text)
        elif isinstance(data_or_text, str):
            path.write_text(data_or_text)
        else:
            _dump(path, data_or_text)
        argv = {"validate": ["validate", path], "detect": ["detect", photo, "--cell", path, *CAL],
                "calibrate": ["calibrate", calib_photo, "--cell", path, "--out", root / "o-cells" / f"{path.stem}.yaml"]}[cmd]
        add(f"cell/{name}", argv, kind, code, fragment, **kw)
        return path

    positive_keys = ["arm.upper_arm_mm", "arm.forearm_mm", "arm.base_height_mm", "markers.size_mm",
                     "motion.speed_mm_s", "motion.sample_hz", "motion.safe_z_mm", "motion.dwell_s",
                     "arm.joints.base.max_speed_deg_s", "parts.red.height_mm", "parts.red.tolerance",
                     "arm.gripper.max_opening_mm", "camera.drift_tolerance_mm", "arm.tool.reach_mm"]
    bad_values = {"nan": float("nan"), "inf": float("inf"), "negative": -1.0, "text": "ten", "huge": 1e308}
    for key in positive_keys:
        for label, value in bad_values.items():
            if key == "arm.base_height_mm" and label == "negative":
                continue                    # a base below the table's plane is allowed
            cell_case(f"{key}={label}", _set(cell_data, key, value), fragment=key)
    for key, value in [("motion.speed_mm_s", 1e-9), ("motion.dwell_s", 1e9), ("arm.joints.elbow.max_speed_deg_s", 1e-9),
                       ("motion.sample_hz", 1e-6), ("motion.dwell_s", 1e5)]:
        cell_case(f"samples/{key}={value:g}", _set(cell_data, key, value), fragment=key, time_limit_s=30)
    cell_case("yaml12-number", cell_path.read_text().replace("speed_mm_s: 150", "speed_mm_s: 1.5e2")
              .replace("dwell_s: 0.4", "dwell_s: 4e-1"), kind="result", code=0, fragment="ok")
    cell_case("self-intersecting-work-area", _set(cell_data, "work_area", [[90, -200], [340, 200], [340, -200], [90, 200]]),
              fragment="work_area")
    cell_case("work-area-two-points", _set(cell_data, "work_area", [[90, -200], [340, 200]]), fragment="work_area")
    cell_case("work-area-zero-area", _set(cell_data, "work_area", [[90, 0], [200, 0], [340, 0]]), fragment="work_area")
    cell_case("marker-id-out-of-dictionary", _set(cell_data, "markers.layout", {**cell_data["markers"]["layout"], 77: {"x": 0, "y": 0}}),
              fragment="markers.layout")
    cell_case("unknown-dictionary", _set(cell_data, "markers.dictionary", "aruco_9x9_9"), fragment="markers.dictionary")
    cell_case("empty", "", fragment="cell")
    cell_case("plain-text", "hello there\n", fragment="cell")
    cell_case("a-list", "- 1\n- 2\n", fragment="cell")
    cell_case("binary", bytes(range(256)) * 4, fragment="UTF-8")
    cell_case("tabs", "cell: x\n\tmarkers: 1\n", fragment="line 2")
    cell_case("unclosed-bracket", "cell: [1, 2\n", fragment="line")
    cell_case("duplicate-key", cell_path.read_text() + "\ncell: again\n", fragment="duplicate")
    bomb = "a0: &a0 [x, x, x, x, x, x, x, x, x, x]\n" + "".join(
        f"a{i}: &a{i} [{', '.join([f'*a{i - 1}'] * 10)}]\n" for i in range(1, 10))
    cell_case("alias-bomb", bomb, fragment="alias", time_limit_s=20)
    cell_case("alias-legit", cell_path.read_text().replace("servo: {channel: 0, map: [[-90, 500], [90, 2500]]}",
                                                            "servo: &s0 {channel: 0, map: [[-90, 500], [90, 2500]]}"),
              kind="result", code=0, fragment="ok")
    cell_case("deep-nesting", "cell: " + "[" * 100000 + "]" * 100000 + "\n", fragment="cell", time_limit_s=20)
    big = cdir / "huge.yaml"
    with open(big, "w") as fh:
        fh.write(cell_path.read_text())
        fh.write("# padding\n" * 3_000_000)
    add("cell/huge-file", ["validate", big], "error", BAD_INPUT, "too large", time_limit_s=20)
    add("cell/missing", ["validate", cdir / "nope.yaml"], "error", BAD_INPUT, "nope.yaml")
    add("cell/folder", ["validate", cdir], "error", BAD_INPUT, "cells")
    cfifo = cdir / "fifo.yaml"
    os.mkfifo(cfifo)
    add("cell/fifo", ["validate", cfifo], "error", BAD_INPUT, "not a regular file", time_limit_s=20)
    (cdir / "zero.yaml").symlink_to("/dev/zero")
    add("cell/dev-zero", ["validate", cdir / "zero.yaml"], "error", BAD_INPUT, "not a regular file", time_limit_s=20)
    lens_text = cdir / "lens.txt"
    lens_text.write_text("this is not a lens file\n")
    lens_cell = copy.deepcopy(cell_data)
    lens_cell["camera"].update(lens="file", lens_file=str(lens_text))
    cell_case("lens-file-text", lens_cell, fragment="lens.txt", cmd="calibrate")
    lens_cell2 = copy.deepcopy(cell_data)
    lens_cell2["camera"].update(lens="file", lens_file=str(cdir / "no-lens.yaml"))
    cell_case("lens-file-missing", lens_cell2, fragment="no-lens.yaml", cmd="calibrate")
    cell_case("lens-file-missing-validate", lens_cell2, fragment="no-lens.yaml")
    lens_yaml = cdir / "lens-4032.yaml"
    lens_yaml.write_text("image_width: 4032\nimage_height: 3024\ncamera_matrix: [[3000, 0, 2016], [0, 3000, 1512], [0, 0, 1]]\n"
                         "distortion_coefficients: [0, 0, 0, 0, 0]\n")
    lens_cell3 = copy.deepcopy(cell_data)
    lens_cell3["camera"].update(lens="file", lens_file=str(lens_yaml))
    cell_case("lens-file-4032x3024-scaled", lens_cell3, kind="result", code=0, fragment="verdict", cmd="calibrate")
    lens_yaml2 = cdir / "lens-crop.yaml"
    lens_yaml2.write_text(lens_yaml.read_text().replace("3024", "2268"))
    lens_cell4 = copy.deepcopy(cell_data)
    lens_cell4["camera"].update(lens="file", lens_file=str(lens_yaml2))
    cell_case("lens-file-other-aspect", lens_cell4, fragment="aspect", cmd="calibrate")
    many = copy.deepcopy(cell_data)
    for i in range(300):
        many["parts"][f"c{i}"] = {"lab": [20 + (i % 60), -60 + (i * 7) % 120, -60 + (i * 13) % 120], "tolerance": 3,
                                  "height_mm": 10, "shape": "box", "footprint_mm": [20, 20]}
        many["bins"][f"c{i}"] = {"x": 35 + (i % 10) * 3, "y": 200}
    cell_case("300-classes-detect", many, kind="result", code=0, fragment="parts", cmd="detect", time_limit_s=60, cost=8)
    huge_classes = copy.deepcopy(cell_data)
    for i in range(5000):
        huge_classes["parts"][f"c{i}"] = {"lab": [50, 0, 0], "tolerance": 3, "height_mm": 10, "shape": "box",
                                          "footprint_mm": [20, 20]}
    cell_case("5000-classes", huge_classes, fragment="parts", time_limit_s=30)
    moved_markers = copy.deepcopy(cell_data)
    for placement in moved_markers["markers"]["layout"].values():
        placement["x"] = placement["x"] - 60 if placement["x"] > 200 else placement["x"] + 45
    wrong_cell = cell_case("wrong-cell-detect", moved_markers, kind="error", code=None, fragment="wrong", cmd="detect")
    add("cell/wrong-cell-plan", ["plan", photo, "--cell", wrong_cell, *CAL, "--out", root / "o-wrong-plan"],
        "error", None, "wrong")
    add("cell/wrong-cell-calibrate", ["calibrate", calib_photo, "--cell", wrong_cell, "--out", root / "o-wrong-cal.yaml"],
        "error", None, "wrong")

    # ============================================================== parts files
    tdir = root / "parts"
    tdir.mkdir()
    PLAN_PARTS = ["plan", "--no-plots", *CELL]

    def parts_case(name, content, kind="error", code=BAD_INPUT, fragment="", **kw):
        path = tdir / f"{name}.yaml"
        path.write_text(content if isinstance(content, str) else yaml.safe_dump(content))
        add(f"parts/{name}", [*PLAN_PARTS, "--parts", path, "--out", root / "o-parts" / name], kind, code,
            fragment or (name if kind == "error" else ""), **kw)

    one = [{"id": "p1", "class": "red", "x_mm": 210, "y_mm": -35}]
    parts_case("ok", one, "result", 0, "1 planned")
    parts_case("integer-ids", "- {id: 1, class: red, x_mm: 210, y_mm: -35}\n- {id: 2, class: blue, x_mm: 200, y_mm: 40}\n",
               "result", 0, "2 planned")
    parts_case("yaml12-numbers", "- {class: red, x_mm: 2.1e2, y_mm: -35, yaw_deg: 1e1}\n", "result", 0, "1 planned")
    parts_case("empty", "", "result", 0, "0 planned")
    parts_case("nan", [{"class": "red", "x_mm": float("nan"), "y_mm": 0}], fragment="x_mm")
    parts_case("string-x", [{"class": "red", "x_mm": "far", "y_mm": 0}], fragment="x_mm")
    parts_case("huge-x", [{"class": "red", "x_mm": 1e308, "y_mm": 0}], fragment="x_mm")
    parts_case("no-class", [{"x_mm": 200, "y_mm": 0}], fragment="class")
    parts_case("duplicate-ids", [{"id": "a", "class": "red", "x_mm": 200, "y_mm": 0}] * 2, fragment="duplicate")
    parts_case("unknown-class-no-size", [{"class": "purple", "x_mm": 200, "y_mm": 0}], fragment="height_mm")
    parts_case("not-a-list", "just: words\n", fragment="parts")
    parts_case("mapping-entries-wrong", "- 5\n- text\n", fragment="mapping")
    parts_case("alias-bomb", bomb, fragment="alias", time_limit_s=20)
    parts_case("negative-size", [{"class": "red", "x_mm": 200, "y_mm": 0, "width_mm": -3}], fragment="width_mm")
    rng = np.random.default_rng(1000)
    classes = ["red", "blue", "green", "yellow"]
    many_parts = [{"class": classes[i % 4], "x_mm": float(rng.uniform(100, 330)), "y_mm": float(rng.uniform(-190, 190))}
                  for i in range(1001)]
    # 1,000 parts would be the limit's own case, but planning time now grows much faster than n^2 (the held
    # part is checked against every part still on the table: 100 parts ~40 s, 200 parts ~5 min); the
    # ordering alone is tested at 1,000 parts in tests/planning/test_ordering.py
    parts_case("60-parts", many_parts[:60], "result", 0, "planned", time_limit_s=120, cost=30)
    parts_case("1001-parts", many_parts, fragment="1,001 parts", time_limit_s=30)
    parts_case("100000-parts", "".join(f"- {{class: red, x_mm: {200 + i % 50}, y_mm: {i % 40}}}\n" for i in range(100000)),
               fragment="parts", time_limit_s=30, cost=5)

    # ============================================================== calibration files
    kdir = root / "calibrations"
    kdir.mkdir()

    def cal_case(name, data_or_text, kind="error", code=BAD_INPUT, fragment="", cmd="detect", **kw):
        path = kdir / f"{name}.yaml"
        if isinstance(data_or_text, str):
            path.write_text(data_or_text)
        else:
            _dump(path, data_or_text)
        argv = {"detect": ["detect", photo, *CELL, "--calibration", path],
                "check": ["check", photo, *CELL, "--calibration", path],
                "plan": ["plan", photo, *CELL, "--calibration", path, "--out", root / "o-cal" / name, "--no-plots"]}[cmd]
        add(f"calibration/{cmd}/{name}", argv, kind, code, fragment or (f"{name}.yaml" if kind == "error" else ""), **kw)

    H = cal_data["H_table_from_pixel"]
    nan_h = copy.deepcopy(cal_data)
    nan_h["H_table_from_pixel"][0][0] = float("nan")
    inf_h = copy.deepcopy(cal_data)
    inf_h["H_table_from_pixel"][1][2] = float("inf")
    for cmd in ("detect", "check", "plan"):
        cal_case("nan-homography", nan_h, cmd=cmd)
        cal_case("singular-homography", _set(cal_data, "H_table_from_pixel", [[0, 0, 0]] * 3), cmd=cmd)
        cal_case("string-homography", _set(cal_data, "H_table_from_pixel", "identity"), cmd=cmd)
        cal_case("lens-scale-zero", _set(cal_data, "lens.scale_px", 0), cmd=cmd)
        cal_case("centre-z-zero", _set(cal_data, "camera_centre_mm", [200, 0, 0]), cmd=cmd)
        cal_case("centre-below-table", _set(cal_data, "camera_centre_mm", [200, 0, -700]), cmd=cmd)
    cal_case("inf-homography", inf_h)
    cal_case("rank-one-homography", _set(cal_data, "H_table_from_pixel", [[1, 2, 3], [2, 4, 6], [3, 6, 9]]))
    cal_case("two-by-three", _set(cal_data, "H_table_from_pixel", H[:2]))
    cal_case("homography-of-text", _set(cal_data, "H_table_from_pixel", [["a", "b", "c"]] * 3))
    cal_case("lens-lambda-nan", _set(cal_data, "lens.lambda", float("nan")))
    cal_case("lens-lambda-huge", _set(cal_data, "lens.lambda", 1e300))
    cal_case("lens-scale-negative", _set(cal_data, "lens.scale_px", -800))
    cal_case("lens-model-unknown", _set(cal_data, "lens.model", "fisheye-magic"))
    cal_case("lens-centre-text", _set(cal_data, "lens.centre_px", "middle"))
    cal_case("centre-nan", _set(cal_data, "camera_centre_mm", [float("nan"), 0, 700]))
    cal_case("centre-text", _set(cal_data, "camera_centre_mm", "above"))
    cal_case("centre-two-values", _set(cal_data, "camera_centre_mm", [200, 0]))
    cal_case("photo-width-zero", _set(cal_data, "photo.width_px", 0))
    cal_case("photo-size-text", _set(cal_data, "photo.height_px", "tall"))
    cal_case("markers-not-list", _set(cal_data, "markers", "many"))
    cal_case("empty", "")
    cal_case("a-list", "- 1\n- 2\n")
    cal_case("a-cell-file", cell_path.read_text())
    cal_case("truncated", cal_path.read_text()[:300])
    cal_case("alias-bomb", bomb, fragment="alias", time_limit_s=20)
    bigsize = copy.deepcopy(cal_data)
    bigsize["photo"].update(width_px=4032, height_px=3024)
    cal_case("lens-for-4032x3024", bigsize, fragment="4032x3024")
    cal_case("other-cell", _set(cal_data, "cell", "someone-elses-cell"), kind="warning", code=0, fragment="someone-elses-cell")
    # a poor calibration in use: said
    poor = copy.deepcopy(cal_data)
    poor["verdict"] = {**poor.get("verdict", {}), "grade": "poor"} if isinstance(poor.get("verdict"), dict) else "poor"
    cal_case("poor-verdict", poor, kind="warning", code=0, fragment="poor")

    # ============================================================== state files: run --resume, batch --resume
    sdir = root / "state"
    sdir.mkdir()
    sha = hashlib.sha256(cell_path.read_bytes()).hexdigest()
    good_state = {"folder": str(folder.resolve()), "cell_sha256": sha, "done": [], "summaries": [],
                  "joints_deg": [0.0, 90.0, 0.0], "t_s": 0.0, "bins": {b: 0 for b in cell_data["bins"]}, "speed_scale": 1.0}
    states = {
        "truncated": json.dumps(good_state)[:40],
        "empty": "",
        "a-list": "[]",
        "binary": "\x00\x01\x02 not json",
        "done-number": json.dumps({**good_state, "done": 5}),
        "summaries-text": json.dumps({**good_state, "done": ["demo_01.jpg"], "summaries": "x"}),
        "joints-short": json.dumps({**good_state, "joints_deg": [0.0]}),
        "joints-nan": json.dumps({**good_state, "joints_deg": [float("nan"), 90, 0]}),
        "joints-text": json.dumps({**good_state, "joints_deg": "home"}),
        "bins-list": json.dumps({**good_state, "bins": [1, 2]}),
        "bins-negative": json.dumps({**good_state, "bins": {b: -5 for b in cell_data["bins"]}}),
        "t-text": json.dumps({**good_state, "t_s": "later"}),
        "t-infinite": json.dumps({**good_state, "t_s": 1e400}),
        "speed-text": json.dumps({**good_state, "speed_scale": "fast"}),
        "missing-keys": json.dumps({"folder": good_state["folder"], "cell_sha256": sha}),
    }
    for name, text in states.items():
        out = sdir / f"run-{name}"
        out.mkdir()
        (out / "run_state.json").write_text(text)
        add(f"state/run_state/{name}", ["run", folder, *CELL, *CAL, "--out", out, "--resume"], "error", BAD_INPUT,
            "run_state.json")
    # batch rows: a damaged row.json is said and that photo is done again
    batch_out = sdir / "batch-good"
    with open(os.devnull, "w") as devnull:
        import contextlib

        with contextlib.redirect_stdout(devnull), contextlib.redirect_stderr(devnull):
            assert cli_main(["batch", str(folder), "--workers", "1", *CELL, *CAL, "--out", str(batch_out)]) == 0
    row_path = batch_out / "demo_01.jpg" / "row.json"
    row = json.loads(row_path.read_text())
    rows = {
        "truncated": row_path.read_text()[:30],
        "empty": "",
        "a-list": "[1, 2]",
        "found-text": json.dumps({**row, "found": "many"}),
        "parts-nan": json.dumps({**row, "parts": float("nan")}),
        "rejected-list": json.dumps({**row, "rejected": [1]}),
        "planned-text": json.dumps({**row, "planned": "three"}),
    }
    for name, text in rows.items():
        out = sdir / f"batch-{name}"
        shutil.copytree(batch_out, out)
        (out / "demo_01.jpg" / "row.json").write_text(text)
        add(f"state/row/{name}", ["batch", folder, "--workers", "1", *CELL, *CAL, "--out", out, "--resume"], "warning", 0, "row.json",
            cost=4)

    # ============================================================== output paths
    odir = root / "outputs"
    odir.mkdir()
    a_folder = odir / "a-folder.png"
    a_folder.mkdir()
    a_file = odir / "a-file"
    a_file.write_text("x")
    for name, argv in {
        "detect-overlay": ["detect", photo, *CELL, *CAL, "--overlay", a_folder],
        "check-overlay": ["check", photo, *CELL, *CAL, "--overlay", a_folder],
        "reach-out": ["reach", cell_path, "--out", a_folder],
        "markers-out": ["markers", cell_path, "--out", a_folder],
        "calibrate-out": ["calibrate", calib_photo, *CELL, "--out", a_folder],
        "calibrate-overlay": ["calibrate", calib_photo, *CELL, "--out", odir / "c.yaml", "--overlay", a_folder],
    }.items():
        add(f"out/folder/{name}", argv, "error", FAILED, "a-folder.png")
    for name, argv in {
        "plan": ["plan", photo, *CELL, *CAL, "--out", a_file],
        "run": ["run", folder, *CELL, *CAL, "--out", a_file],
        "batch": ["batch", folder, "--workers", "1", *CELL, *CAL, "--out", a_file],
        "plan-under-file": ["plan", photo, *CELL, *CAL, "--out", a_file / "sub"],
        "detect-overlay-under-file": ["detect", photo, *CELL, *CAL, "--overlay", a_file / "o.png"],
        "reach-under-file": ["reach", cell_path, "--out", a_file / "r.png"],
    }.items():
        add(f"out/file/{name}", argv, "error", FAILED, "a-file")
    ro = odir / "readonly"
    ro.mkdir()
    writers = {
        "plan": lambda o: ["plan", photo, *CELL, *CAL, "--out", o, "--no-plots"],
        "run": lambda o: ["run", folder, *CELL, *CAL, "--out", o],
        "batch": lambda o: ["batch", folder, "--workers", "1", *CELL, *CAL, "--out", o],
        "calibrate": lambda o: ["calibrate", calib_photo, *CELL, "--out", o / "cal.yaml"],
        "markers": lambda o: ["markers", cell_path, "--out", o / "sheet.pdf"],
        "reach": lambda o: ["reach", cell_path, "--out", o / "reach.png"],
        "detect-overlay": lambda o: ["detect", photo, *CELL, *CAL, "--overlay", o / "overlay.png"],
        "init": lambda o: ["init", o / "new-cell.yaml"],
    }
    for name, make in writers.items():
        sub = ro / name
        sub.mkdir()
        add(f"out/readonly/{name}", make(sub), "error", FAILED, "read-only", readonly=sub, cost=3)
        full = odir / f"full-{name}"
        full.mkdir()
        add(f"out/full/{name}", make(full), "error", FAILED, str(full), file_size_bytes=2000, cost=3)
    # the umask is followed
    umask_out = odir / "umask"
    add("out/umask-plan", ["plan", photo, *CELL, *CAL, "--out", umask_out, "--no-plots"], "result", 0, "planned",
        check=_mode_follows_umask(umask_out / "joints.csv"))
    # plan without --out: a folder named after the photo, in the current folder
    cwd = odir / "cwd"
    cwd.mkdir()
    add("out/plan-default-folder", ["plan", photo, *CELL, *CAL, "--no-plots"], "result", 0, "photo",
        cwd=str(cwd), check=_exists(cwd / "photo_plan" / "joints.csv"))
    add("misc/version", ["--version"], "result", 0, "gripsight")
    add("misc/unknown-command", ["flyaway"], "error", 2, "flyaway")
    add("misc/bad-option-value", ["reach", cell_path, "--resolution-mm", "-3"], "error", 2, "resolution")
    add("misc/plan-nothing", ["plan", *CELL], "error", 2, "--parts")
    add("misc/missing-cell-detect", ["detect", photo, "--cell", root / "no-cell.yaml", *CAL], "error", BAD_INPUT, "no-cell.yaml")
    add("misc/missing-calibration", ["detect", photo, *CELL, "--calibration", root / "no-cal.yaml"], "error", BAD_INPUT,
        "no-cal.yaml")
    add("misc/sample-outside", ["detect", photo, *CELL, *CAL, "--sample", "99999,5"], "error", None, "99999")
    add("misc/sample-nan", ["detect", photo, *CELL, *CAL, "--sample", "nan,5"], "error", None, "nan")
    add("misc/speed-scale-zero", ["plan", photo, *CELL, *CAL, "--speed-scale", "0", "--out", root / "o-speed"], "error", 2,
        "speed")
    add("misc/run-empty-folder", ["run", pdir / "folder.jpg", *CELL, *CAL, "--out", root / "o-empty-run"], "error", None,
        "no photos")
    _newer_features(root, add, cell_data, photo, calib_photo, image, CELL, CAL)
    third_pass(root, add, cell_data, cal_data, photo, calib_photo, CELL, CAL)
    assert len({c.name for c in cases}) == len(cases), "case names must be unique"
    return cases


def _no_library_noise(outcome) -> Optional[str]:
    """Only gripsight's own lines: a decoder's message (libpng's "PNG input buffer is incomplete")
    beside the one-line error is a second answer."""
    return "a library printed its own message" if "libpng" in outcome.output.lower() else None


def _newer_features(root: Path, add, cell_data: dict, photo: Path, calib_photo: Path, image, CELL, CAL) -> None:
    """The second pass (after run --watch, arm-fit, markers.on_gripper, arm.base_xy_mm, camera.height_mm,
    camera.lens_file, shapes and footprints, batch --pictures/--scheduler, check, render --hard)."""
    from PIL import Image

    ndir = root / "newer"
    ndir.mkdir()
    # ------------------------------------------------------------ photos
    encoded = cv2.imencode(".png", image)[1].tobytes()
    damaged = bytearray(encoded)
    damaged[len(damaged) // 2:len(damaged) // 2 + 50] = b"\x00" * 50
    for name, content in {"png-cut.png": encoded[:-100], "png-crc.png": bytes(damaged)}.items():
        (ndir / name).write_bytes(content)
        add(f"photo/quiet/{name}", ["detect", ndir / name, *CELL, *CAL], "error", BAD_INPUT, name, check=_no_library_noise)
    (ndir / "png-trailer.png").write_bytes(encoded + b"appended by a tool" * 10)
    add("photo/ok/png-trailer.png", ["detect", ndir / "png-trailer.png", *CELL, *CAL], "result", 0, "p4")
    cv2.imwrite(str(ndir / "w60000x10.png"), np.zeros((10, 60000, 3), np.uint8))
    add("photo/60000x10", ["detect", ndir / "w60000x10.png", *CELL, *CAL], "error", BAD_INPUT, "too small")
    cv2.imwrite(str(ndir / "w40x6000.png"), np.full((6000, 40, 3), 200, np.uint8))
    add("photo/40x6000", ["detect", ndir / "w40x6000.png", *CELL, *CAL], "error", BAD_INPUT, "40x6000")
    pil = Image.fromarray(cv2.cvtColor(image, cv2.COLOR_BGR2RGB))
    pil.convert("CMYK").save(ndir / "cmyk.jpg", "JPEG", quality=92)
    add("photo/ok/cmyk.jpg", ["detect", ndir / "cmyk.jpg", *CELL, *CAL], "result", 0, "p4")
    exif = Image.Exif()
    exif[0x0112] = 6                # "rotate 90 to view": the stored pixels are what the camera (and calibration) saw
    pil.save(ndir / "exif-rotated.jpg", "JPEG", quality=92, exif=exif)
    add("photo/ok/exif-rotated.jpg", ["detect", ndir / "exif-rotated.jpg", *CELL, *CAL], "result", 0, "p4")
    pil.save(ndir / "animated.gif", "GIF", save_all=True, append_images=[pil.rotate(5)])
    add("photo/animated.gif", ["detect", ndir / "animated.gif", *CELL, *CAL], "error", BAD_INPUT, "animated.gif")
    # ------------------------------------------------------------ newer cell keys
    grip = {"id": 11, "size_mm": 30, "margin_mm": 5, "offset_mm": [0, 0, 10]}
    with_grip = _set(cell_data, "markers.on_gripper", grip)
    for key, value, cmd in [("parts.green.footprint_mm.0", 1e-300, "detect"), ("parts.red.footprint_mm", [0.0], "validate"),
                            ("parts.red.footprint_mm", [20, 20, 20], "validate"), ("parts.red.shape", "sphere", "validate"),
                            ("camera.height_mm", 1e-300, "calibrate"), ("camera.height_mm", float("nan"), "validate"),
                            ("camera.height_mm", -700, "validate"), ("arm.base_xy_mm", [float("inf"), 0], "validate"),
                            ("arm.base_xy_mm", [1e308, 0], "validate"), ("arm.base_xy_mm", "origin", "validate"),
                            ("markers.on_gripper.size_mm", 1e-300, "markers"), ("markers.on_gripper.size_mm", -30, "validate"),
                            ("markers.on_gripper.offset_mm", [0, 0], "validate"), ("markers.on_gripper.id", 3, "validate"),
                            ("markers.on_gripper.id", 999, "validate"), ("markers.on_gripper.margin_mm", float("nan"), "validate")]:
        data = _set(with_grip if key.startswith("markers.on_gripper") else cell_data, key, value)
        path = ndir / f"cell-{key}={value}.yaml"
        _dump(path, data)
        argv = {"validate": ["validate", path], "detect": ["detect", photo, "--cell", path, *CAL],
                "calibrate": ["calibrate", calib_photo, "--cell", path, "--out", ndir / f"o-{key}.yaml"],
                "markers": ["markers", path, "--out", ndir / f"o-{key}.pdf"]}[cmd]
        add(f"cell/newer/{key}={value}/{cmd}", argv, "error", BAD_INPUT, key)
    big_grip = ndir / "cell-gripper-marker-900.yaml"
    _dump(big_grip, _set(with_grip, "markers.on_gripper.size_mm", 900))
    add("cell/newer/gripper-marker-too-big-for-paper", ["markers", big_grip, "--out", ndir / "o-big.pdf"], "error", FAILED,
        "markers.on_gripper.size_mm")
    # ------------------------------------------------------------ lens files (camera.lens_file)
    k_ok = "camera_matrix: [[900, 0, 640], [0, 900, 480], [0, 0, 1]]\n"
    zeros = "distortion_coefficients: [0, 0, 0, 0, 0]\n"
    lenses = {
        "bottom-row-zero": "camera_matrix: [[900, 0, 640], [0, 900, 480], [0, 0, 0]]\n" + zeros,
        "focal-1e-300": "camera_matrix: [[1.0e-300, 0, 640], [0, 1.0e-300, 480], [0, 0, 1]]\n" + zeros,
        "focal-1e308": "camera_matrix: [[1.0e+308, 0, 640], [0, 1.0e+308, 480], [0, 0, 1]]\n" + zeros,
        "coefficient-1e300": k_ok + "distortion_coefficients: [1.0e+300, 0, 0, 0, 0]\n",
        "size-inf": k_ok + zeros + "image_width: .inf\nimage_height: .inf\n",
        "size-tiny": k_ok + zeros + "image_width: 1.0e-300\nimage_height: 1.0e-300\n",
        "size-text": k_ok + zeros + "image_width: wide\nimage_height: 960\n",
        "size-one-of-two": k_ok + zeros + "image_width: 1280\n",
        # third pass: read with the cell file's YAML rules (PyYAML's safe_load kept the last of two keys)
        "duplicate-key": k_ok + zeros + "camera_matrix: [[800, 0, 640], [0, 800, 480], [0, 0, 1]]\n",
    }
    for name, text in lenses.items():
        lens = ndir / f"lens-{name}.yaml"
        lens.write_text(text)
        data = copy.deepcopy(cell_data)
        data["camera"].update(lens="file", lens_file=str(lens))
        path = _dump(ndir / f"cell-lens-{name}.yaml", data)
        add(f"lens/{name}", ["calibrate", calib_photo, "--cell", path, "--out", ndir / f"o-lens-{name}.yaml"], "error",
            BAD_INPUT, f"lens-{name}.yaml")
    add("lens/duplicate-key/validate", ["validate", ndir / "cell-lens-duplicate-key.yaml"], "error", BAD_INPUT,
        "lens-duplicate-key.yaml: line 3, column 1: YAML error: duplicate key 'camera_matrix'")
    # ------------------------------------------------------------ render options and scenes
    cell_path = CELL[1]
    for name, opts, fragment in [("shift-nan", ["--camera-shift-mm", "nan"], "--camera-shift-mm"),
                                 ("shift-1e300", ["--camera-shift-mm", "1e300"], "--camera-shift-mm"),
                                 ("distortion-1e300", ["--distortion", "1e300"], "--distortion"),
                                 ("white-balance-negative", ["--white-balance", "-1,1,1"], "--white-balance"),
                                 ("format-gif", ["--format", "gif"], "--format")]:
        add(f"render/{name}", ["render", cell_path, "--scenes", "1", *opts, "--out", ndir / f"o-render-{name}"], "error", 2,
            fragment)
    add("misc/render-seed-negative", ["render", cell_path, "--scenes", "1", "--seed", "-1", "--out", ndir / "o-seed"],
        "error", 2, "--seed")       # typer's own usage error (its "Error:" block, not our one line)
    scene = ndir / "scene-far.yaml"
    scene.write_text("parts: [{class: red, x_mm: 1.0e+308, y_mm: 0}]\n")
    add("render/scene-1e308", ["render", cell_path, "--scene", scene, "--out", ndir / "o-scene"], "error", BAD_INPUT, "x_mm")
    # ------------------------------------------------------------ batch and run options
    folder = photo.parent / "photos"
    for name, opts, fragment in [("scheduler-no-port", ["--scheduler", "nonsense"], "--scheduler"),
                                 ("scheduler-scheme", ["--scheduler", "http://[::1"], "--scheduler"),
                                 ("pictures-many", ["--pictures", "many"], "--pictures")]:
        add(f"batch/{name}", ["batch", folder, "-w", "1", *CELL, *CAL, "--out", ndir / f"o-batch-{name}", *opts], "error", 2,
            fragment)
    add("run/idle-stop-without-watch", ["run", folder, *CELL, *CAL, "--out", ndir / "o-idle", "--idle-stop", "5"], "error", 2,
        "--idle-stop")
    add("run/missing-folder", ["run", ndir / "no-such-folder", *CELL, *CAL, "--out", ndir / "o-missing"], "error", BAD_INPUT,
        "no-such-folder")
    add("run/watch-missing-folder", ["run", ndir / "no-such-folder", *CELL, *CAL, "--out", ndir / "o-missing-w", "--watch"],
        "error", BAD_INPUT, "no-such-folder", time_limit_s=20)
    # ------------------------------------------------------------ outputs where a FIFO stands, pictures without a format
    # (never a real device here: the suite may run as root, for whom the rename replaced /dev/full itself)
    out_fifo = ndir / "fifo-out.png"
    os.mkfifo(out_fifo)
    for name, argv in {"detect-overlay": ["detect", photo, *CELL, *CAL, "--overlay", out_fifo],
                       "reach-out": ["reach", cell_path, "--out", out_fifo],
                       "init": ["init", out_fifo, "--force"]}.items():
        add(f"out/fifo/{name}", argv, "error", FAILED, "not a regular file", time_limit_s=20,
            check=lambda o, p=out_fifo: None if p.is_fifo() else f"{p} was replaced")
    kept = ndir / "kept-calibration.yaml"
    kept.write_bytes(Path(CAL[1]).read_bytes())
    add("out/fifo/calibrate-overlay-keeps-calibration", ["calibrate", calib_photo, *CELL, "--out", kept, "--overlay", out_fifo,
                                                         "--force"], "error", FAILED, "not a regular file", time_limit_s=20,
        check=lambda o, k=kept, b=kept.read_bytes(): None if k.read_bytes() == b else f"{k} was replaced by a failed command")
    kept2 = ndir / "kept-calibration-2.yaml"
    kept2.write_bytes(Path(CAL[1]).read_bytes())
    add("out/calibrate-overlay-unwritable-keeps-calibration",
        ["calibrate", calib_photo, *CELL, "--out", kept2, "--overlay", ndir / "a-file-not-a-folder.png" / "o.png", "--force"],
        "error", FAILED, "a-file-not-a-folder.png",
        check=lambda o, k=kept2, b=kept2.read_bytes(): None if k.read_bytes() == b else f"{k} was replaced by a failed command")
    (ndir / "a-file-not-a-folder.png").write_text("x")
    add("out/reach-no-suffix", ["reach", cell_path, "--out", ndir / "reach-picture"], "error", 2, "--out")
    # ------------------------------------------------------------ a photo whose file name is not UTF-8
    odd = ndir / "odd-names"
    odd.mkdir()
    shutil.copy(photo, odd / os.fsdecode(b"bad\xffname.jpg"))
    add("photo/name-not-utf8-batch", ["batch", odd, "-w", "1", *CELL, *CAL, "--out", ndir / "o-odd-batch"], "result", 0,
        "batch.csv", check=_exists(ndir / "o-odd-batch" / "batch.csv"))
    add("photo/name-not-utf8-run", ["run", odd, *CELL, *CAL, "--out", ndir / "o-odd-run"], "result", 0, "run.csv",
        check=_exists(ndir / "o-odd-run" / "run.csv"))
    # ------------------------------------------------------------ arm-fit's stops file
    grip_cell = _dump(ndir / "cell-with-gripper-marker.yaml", with_grip)
    header = "stop,start_s,end_s,base_deg,shoulder_deg,elbow_deg,base_us,shoulder_us,elbow_us,x_mm,y_mm,z_mm\n"
    rows = [f"{k},{k * 4}.0,{k * 4 + 2}.0,0,90,0,1500.0,1666.7,1722.2,205.0,0.0,185.0\n" for k in range(1, 9)]
    stops_files = {"nan-pulse": header + rows[0].replace("1500.0", "nan") + "".join(rows[1:]),
                   "pulse-1e308": header + rows[0].replace("1500.0", "1e308") + "".join(rows[1:]),
                   "repeated-stop": header + "".join(rows) + rows[0],
                   "stop-zero": header + "0" + rows[0][1:] + "".join(rows[1:]),
                   "text": "these are not stops\n"}
    photos8 = [photo] * 8
    for name, text in stops_files.items():
        stops = ndir / f"stops-{name}.csv"
        stops.write_text(text)
        add(f"arm-fit/stops-{name}", ["arm-fit", *photos8, "--cell", grip_cell, *CAL, "--stops", stops, "--out",
                                      ndir / f"o-fit-{name}.yaml"], "error", BAD_INPUT, f"stops-{name}.csv")
    stops_dir = ndir / "stops-folder.csv"
    stops_dir.mkdir()
    add("arm-fit/stops-folder", ["arm-fit", *photos8, "--cell", grip_cell, *CAL, "--stops", stops_dir, "--out",
                                 ndir / "o-fit-folder.yaml"], "error", BAD_INPUT, "not a regular file")
    stops_fifo = ndir / "stops-fifo.csv"
    os.mkfifo(stops_fifo)
    add("arm-fit/stops-fifo", ["arm-fit", *photos8, "--cell", grip_cell, *CAL, "--stops", stops_fifo, "--out",
                               ndir / "o-fit-fifo.yaml"], "error", BAD_INPUT, "not a regular file", time_limit_s=20)
