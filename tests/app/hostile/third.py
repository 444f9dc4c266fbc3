"""The third hostile pass: the calibration's ``tone_power``, ``batch --workers``, ``run --watch --idle-stop`` and
photo folders holding what is not a photo file (empty files, folders and links named like photos, files that
cannot be read). Called by :func:`tests.app.hostile.corpus.build_corpus`."""

from __future__ import annotations

import copy
import os
import shutil
from pathlib import Path

import yaml

__all__ = ["third_pass"]

BAD_INPUT, FAILED, SOME_FAILED = 2, 1, 5          # DEVELOPERS.md, "Exit codes"
_UNREADABLE = "GRIPSIGHT_HOSTILE_UNREADABLE"       # shim.py: opening or listing these paths fails with EACCES


def _kept(path: Path):
    """The file must keep the bytes it had when the case was made (a failed command leaves it as it was)."""
    before = path.read_bytes()
    return lambda outcome: None if path.read_bytes() == before else f"{path} was changed by a failed command"


def _state_says(out: Path, expected: dict):
    """run_state.json's summaries: photo name -> a fragment its message must hold ("" for planned)."""
    import json

    def check(outcome):
        try:
            summaries = {s["photo"]: s for s in json.loads((out / "run_state.json").read_text())["summaries"]}
        except (OSError, ValueError, KeyError) as exc:
            return f"no readable run state ({exc})"
        for name, fragment in expected.items():
            s = summaries.get(name)
            if s is None:
                return f"{name} is not in the run state"
            if (s["status"] == "planned") != (fragment == "") or fragment not in s.get("message", ""):
                return f"{name}: {s['status']}: {s.get('message', '')!r}, expected {fragment or 'planned'!r}"
        if set(summaries) != set(expected):
            return f"run state holds {sorted(summaries)}, expected {sorted(expected)}"
        return None
    return check


def third_pass(root: Path, add, cell_data: dict, cal_data: dict, photo: Path, calib_photo: Path, CELL, CAL) -> None:
    tdir = root / "third"
    tdir.mkdir()
    cal_text = Path(CAL[1]).read_text()
    # ------------------------------------------------------------ calibration.tone_power
    previous = tdir / "o-plan-previous"
    previous.mkdir()
    (previous / "plan.json").write_text('{"previous": "plan"}\n')
    values = {"negative": -2.2, "zero": 0, "nan": float("nan"), "inf": float("inf"), "minus-inf": float("-inf"),
              "text-number": "2.2", "word": "gamma", "list": [2.2], "mapping": {"power": 2.2}, "1e308": 1e308,
              "1e-300": 1e-300, "bool": True, "lower-bound": 0.2, "upper-bound": 5.0, "empty-text": ""}
    for name, value in values.items():
        data = copy.deepcopy(cal_data)
        data["tone_power"] = value
        path = tdir / f"cal-tone-{name}.yaml"
        path.write_text(yaml.safe_dump(data, sort_keys=False))
        add(f"calibration/tone-power/{name}", ["detect", photo, *CELL, "--calibration", path], "error", BAD_INPUT,
            f"cal-tone-{name}.yaml: tone_power")
    bad = tdir / "cal-tone-negative.yaml"
    add("calibration/tone-power/negative/plan-keeps-previous", ["plan", photo, *CELL, "--calibration", bad, "--out", previous,
                                                               "--no-plots"], "error", BAD_INPUT, "tone_power",
        check=_kept(previous / "plan.json"))
    add("calibration/tone-power/negative/check", ["check", photo, *CELL, "--calibration", bad], "error", BAD_INPUT, "tone_power")
    add("calibration/tone-power/negative/run", ["run", photo.parent / "photos", *CELL, "--calibration", bad, "--out",
                                                tdir / "o-run-tone"], "error", BAD_INPUT, "tone_power")
    # written by hand: YAML's own spellings
    by_hand = {"yes": ("tone_power: yes\n", "error", "tone_power: must be a number"),
               "duplicate": ("tone_power: 1.5\ntone_power: 2.0\n", "error", "duplicate key 'tone_power'"),
               "sexagesimal": ("tone_power: 1:30\n", "error", "tone_power: must be between"),
               "yaml-1.2-number": ("tone_power: 15e-1\n", "result", "p4"),
               "null": ("tone_power: null\n", "result", "p4"),
               "one-and-a-half": ("tone_power: 1.5\n", "result", "p4")}
    for name, (line, kind, fragment) in by_hand.items():
        path = tdir / f"cal-hand-tone-{name}.yaml"
        path.write_text(cal_text + line)
        add(f"calibration/tone-power/by-hand/{name}", ["detect", photo, *CELL, "--calibration", path], kind,
            BAD_INPUT if kind == "error" else 0, fragment)
    # ------------------------------------------------------------ batch --workers, run --watch --idle-stop
    folder = photo.parent / "photos"
    batch_out = tdir / "o-batch-workers"
    batch_out.mkdir()
    (batch_out / "batch.csv").write_text("photo,status\nprevious,planned\n")
    for value in ("0", "-1", "1e9", "two", "65", "1.5", ""):
        add(f"misc/batch-workers={value or 'empty'}", ["batch", folder, "--workers", value, *CELL, *CAL, "--out", batch_out],
            "error", 2, "--workers", check=_kept(batch_out / "batch.csv"))    # typer's own usage line: misc/
    for value in ("0", "-1", "nan", "inf", "1e308", "soon", "604801"):
        add(f"misc/run-idle-stop={value}", ["run", folder, "--watch", "--idle-stop", value, *CELL, *CAL, "--out",
                                            tdir / f"o-idle-{value}"], "error", 2, "--idle-stop", time_limit_s=20)
    # ------------------------------------------------------------ a photo folder of odd entries
    odd = tdir / "odd-folder"
    odd.mkdir()
    shutil.copy(photo, odd / "a_good.jpg")
    (odd / "b_empty.jpg").write_bytes(b"")
    (odd / "c_folder.jpg").mkdir()
    os.symlink("c_loop.jpg", odd / "c_loop.jpg")
    os.symlink("nowhere.jpg", odd / "d_dangling.jpg")
    os.symlink(".", odd / "e_folder_link.png")
    shutil.copy(photo, odd / "f_unreadable.jpg")
    unreadable = {_UNREADABLE: str(odd / "f_unreadable.jpg")}
    left_out = "left out, named like photos but not photo files: c_folder.jpg (a folder), c_loop.jpg (a link"
    run_out = tdir / "o-odd-run"
    add("photo/odd-folder/run", ["run", odd, *CELL, *CAL, "--out", run_out, "--no-pictures"], "result", 0, left_out,
        env=unreadable, check=_state_says(run_out, {"a_good.jpg": "", "b_empty.jpg": "the file is empty (0 bytes)",
                                                    "f_unreadable.jpg": "cannot be read (Permission denied)"}))
    batch_csv = tdir / "o-odd-batch" / "batch.csv"          # exit 5 has no error line, its rows say why: misc/
    add("misc/odd-folder-batch", ["batch", odd, "-w", "1", *CELL, *CAL, "--out", batch_csv.parent, "--pictures", "none"],
        "error", SOME_FAILED, left_out, env=unreadable,
        check=lambda o: None if all(t in batch_csv.read_text() for t in ("the file is empty", "cannot be read (Permission"))
        else f"{batch_csv} does not say why b_empty.jpg and f_unreadable.jpg failed")
    watch_out = tdir / "o-odd-watch"         # the empty photo holds the later names back for stall_s (10 s), then is refused
    add("photo/odd-folder/watch", ["run", odd, "--watch", "--idle-stop", "1", *CELL, *CAL, "--out", watch_out, "--no-pictures"],
        "result", 0, left_out, env=unreadable, time_limit_s=40, cost=12.0,
        check=_state_says(watch_out, {"a_good.jpg": "", "b_empty.jpg": "the file is empty (0 bytes)",
                                      "f_unreadable.jpg": "cannot be read (Permission denied)"}))
    for name, fragment in {"b_empty.jpg": "the file is empty", "c_folder.jpg": "is a folder, not a photo",
                           "c_loop.jpg": "a link that leads nowhere or to itself", "d_dangling.jpg": "a link that leads nowhere",
                           "e_folder_link.png": "is a folder", "f_unreadable.jpg": "cannot be read"}.items():
        add(f"photo/odd-folder/detect/{name}", ["detect", odd / name, *CELL, *CAL], "error", BAD_INPUT, f"{name}: {fragment}",
            env=unreadable)
    add("photo/odd-folder/calibrate-loop", ["calibrate", odd / "c_loop.jpg", *CELL, "--out", tdir / "o-cal-loop.yaml"],
        "error", BAD_INPUT, "c_loop.jpg: a link")        # Path.resolve's RuntimeError on a loop was an internal error
    loop_out = tdir / "out-loop.yaml"
    os.symlink(loop_out.name, loop_out)
    add("out/calibrate-out-link-loop", ["calibrate", calib_photo, *CELL, "--out", loop_out], "error", FAILED,
        "a link to nowhere")
    add("out/detect-overlay-link-loop", ["detect", photo, *CELL, *CAL, "--overlay", loop_out], "error", FAILED,
        "a link to nowhere")
    add("photo/odd-folder/run-unlistable", ["run", odd, *CELL, *CAL, "--out", tdir / "o-unlistable"], "error", BAD_INPUT,
        "cannot be listed (Permission denied)", env={_UNREADABLE: str(odd)})
    add("photo/odd-folder/batch-unlistable", ["batch", odd, "-w", "1", *CELL, *CAL, "--out", tdir / "o-unlistable-b"],
        "error", BAD_INPUT, "cannot be listed", env={_UNREADABLE: str(odd)})
