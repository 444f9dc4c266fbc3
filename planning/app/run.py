"""The sorting cell's run: photos in name order, the arm carried from one plan to the next.

Per photo, a folder ``OUT/<photo name>/`` with plan.json, joints.csv, overlay.png and the plots; after
each photo the run's state (photos done, where the arm stopped, the clock, tray counts) is saved
atomically in ``OUT/run_state.json``, so an interrupted run resumes where it stopped (``--resume``).
``OUT/run.csv`` is the whole run's joint sequence on one clock, ending with the move home; it is
rebuilt whenever the run stops from the joints.csv files this run wrote (known by their hashes in the
run state), never from older files in the folder, and checked as a whole before it is written.

A photo the run refused (unreadable, cut short, not registrable) moved nothing; if its file changes
afterwards (another SHA-256 than when it was refused) it is taken again, at the end of the run so far: its
refused entry in the run state is replaced, never doubled (see :func:`_take_again`).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from gripsight.app.errors import EXPECTED_ERRORS, GripsightError, InputError, UsageError
from gripsight.app.export import CSV_COLUMNS, joints_csv_text
from gripsight.app.fileio import child_folder, output_dir, remove_leftover_temps, strict_json, utc_now, write_text_atomic
from gripsight.planning.checks import Check

__all__ = ["RunResult", "run_folder", "photos_in", "not_photo_files", "PHOTO_SUFFIXES"]

PHOTO_SUFFIXES = (".jpg", ".jpeg", ".png", ".bmp", ".tif", ".tiff", ".webp")
_STATE = "run_state.json"


def photos_in(folder) -> list[Path]:
    """Photo files of a folder in name order (case-insensitive suffixes); .truth.yaml etc. ignored."""
    return sorted(p for p in _named_like_photos(folder) if p.is_file())


def not_photo_files(folder) -> list[str]:
    """Entries of a folder named like photos that are no photo file (a folder, a link to nothing or to
    itself, a pipe): left out of a run or batch, and said (``name (what it is)``)."""
    out = []
    for p in _named_like_photos(folder):
        if p.is_file():
            continue
        what = ("a folder" if p.is_dir() else "a link that leads nowhere or to itself" if p.is_symlink()
                else "not a regular file")
        out.append(f"{p.name} ({what})")
    return sorted(out)


def _named_like_photos(folder) -> list[Path]:
    folder = Path(folder)
    if not folder.is_dir():
        raise InputError(f"{folder}: not a folder of photos")
    try:
        entries = list(folder.iterdir())
    except OSError as exc:
        raise InputError(f"{folder}: the photo folder cannot be listed ({exc.strerror}); check its permissions") from None
    return [p for p in entries if p.suffix.lower() in PHOTO_SUFFIXES]


@dataclass
class RunResult:
    photos: list[dict] = field(default_factory=list)      # one summary per finished photo
    picked: dict = field(default_factory=dict)            # class -> count
    rejected: dict = field(default_factory=dict)          # reason -> count
    cycle_s: float = 0.0
    stopped: str = ""                                     # why the run stopped early, if it did
    interrupted: bool = False


def _state_path(out: Path) -> Path:
    return out / _STATE


def _load_state(out: Path, folder: Path, cell, stored=None) -> dict:
    """The interrupted run's state, if it was made of the same folder, the same cell file and the same
    calibration file, and every photo it finished is still byte for byte the one it planned (the run
    carries the arm from photo to photo, so a changed photo changes everything after it)."""
    path = _state_path(out)
    if not path.is_file():
        raise GripsightError(f"{path}: nothing to resume (no run state); run without --resume")
    state = _read_state(path)
    if state.get("folder") != str(folder.resolve()) or state.get("cell_sha256") != cell.sha256:
        raise GripsightError(f"{path}: that run was of another folder or cell file; run without --resume")
    if stored is not None and state.get("calibration_sha256") != getattr(stored, "sha256", None):
        raise GripsightError(f"{path}: that run was made with another calibration file; run without --resume")
    photo_hashes = state.get("photo_sha256", {})
    for name, summary in zip(state.get("done", []), state.get("summaries", [])):
        if summary.get("status") == "error":
            continue                                # moved nothing; changed since, it is taken again
        if photo_hashes.get(name) != _file_sha256(folder / name):
            raise GripsightError(f"{path}: photo {name} changed since that run planned it; run without --resume")
    return state


def _read_state(path: Path) -> dict:
    """The run state, every field checked: a damaged file is said, naming it, never half-used."""
    import math

    def damaged(what: str):
        return InputError(f"{path}: the run state is damaged ({what}); run again without --resume, "
                          "or into another --out")

    try:
        if path.stat().st_size > 64 * 1024 * 1024:
            raise damaged("too large")
        state = json.loads(path.read_text(encoding="utf-8"), parse_constant=lambda c: float("nan"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise damaged(f"not JSON: {exc}") from None
    if not isinstance(state, dict):
        raise damaged("not a JSON object")

    def number(value) -> bool:
        return isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)

    checks = [
        ("folder", lambda v: isinstance(v, str)), ("cell_sha256", lambda v: isinstance(v, str)),
        ("done", lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v)),
        ("summaries", lambda v: isinstance(v, list) and all(isinstance(x, dict) and isinstance(x.get("picked", {}), dict)
                                                            and isinstance(x.get("rejected", {}), dict) for x in v)),
        ("joints_deg", lambda v: isinstance(v, list) and len(v) == 3 and all(number(x) for x in v)),
        ("t_s", lambda v: number(v) and v >= 0),
        ("bins", lambda v: isinstance(v, dict) and all(isinstance(n, int) and not isinstance(n, bool) and n >= 0
                                                       for n in v.values())),
        ("speed_scale", lambda v: number(v) and 0 < v <= 1),
        ("photo_sha256", lambda v: isinstance(v, dict)), ("joints_sha256", lambda v: isinstance(v, dict)),
    ]
    for key, ok in checks:
        if key in ("photo_sha256", "joints_sha256") and key not in state:
            continue                                # written from the first finished photo on
        if key not in state:
            raise damaged(f"'{key}' is missing")
        if not ok(state[key]):
            raise damaged(f"'{key}' has a wrong value")
    if len(state["summaries"]) != len(state["done"]):
        raise damaged("'summaries' and 'done' differ in length")
    return state


def _take_again(state: dict, photo: Path) -> bool:
    """Whether a photo already in the run state is to be taken again: it was refused and its file has changed
    since. If so its refused entry is dropped from the state (it goes again at the end, on the run's clock)."""
    i = state["done"].index(photo.name)
    if state["summaries"][i].get("status") != "error":
        return False
    if state.get("photo_sha256", {}).get(photo.name) == _file_sha256(photo):
        return False
    del state["done"][i], state["summaries"][i]
    return True


def _file_sha256(path: Path) -> str | None:
    try:
        return _sha256(path.read_bytes())
    except OSError:
        return None


def _csv_rows(text: str) -> list[list[str]]:
    lines = [line for line in text.splitlines() if line and not line.startswith("#")]
    return list(csv.reader(lines))[1:]


def _sha256(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _write_run_csv(out: Path, state: dict, home_csv: str | None, cell) -> None:
    """run.csv from this run's checked plans only: the joints.csv each photo of this run wrote, known
    by the hash recorded in the run state when it was written (each photo's first row repeats the last
    one's end); a photo without one (an error, an old file) adds nothing. The whole file is checked
    before it is written (:func:`gripsight.app.jointcheck.check_joint_file_text`)."""
    from gripsight.app.jointcheck import refusal, check_joint_file_text

    buf = io.StringIO()
    header_done = False
    written = state.get("joints_sha256", {})
    for name in state["done"]:
        if name not in written:
            continue
        path = child_folder(out, name) / "joints.csv"
        try:
            raw = path.read_bytes()
        except OSError:
            raw = b""
        if _sha256(raw) != written[name]:
            raise refusal(str(out / "run.csv"), f"{path} changed since this run wrote it")
        text = raw.decode("utf-8")
        comments = [line for line in text.splitlines() if line.startswith("#")]
        rows = _csv_rows(text)
        if not header_done:
            buf.write("\n".join(c for c in comments if not c.startswith("# created")) + "\n")
            buf.write(f"# run: {len(state['done'])} photos, created {utc_now()}\n")
            csv.writer(buf, lineterminator="\n").writerow(["photo", *CSV_COLUMNS])   # part ids repeat per photo
            header_done = True
        else:
            rows = rows[1:]
        csv.writer(buf, lineterminator="\n").writerows([name, *row] for row in rows)
    if home_csv and header_done:
        csv.writer(buf, lineterminator="\n").writerows(["", *row] for row in _csv_rows(home_csv)[1:])
    if header_done:
        text = buf.getvalue()
        check_joint_file_text(text, cell, str(out / "run.csv"))
        write_text_atomic(out / "run.csv", text)


def run_folder(folder, cell, stored, out, resume: bool = False, emptied: tuple = (), order: str = "nearest",
               progress=None, speed_scale: float = 1.0, photos=None, pictures=None) -> RunResult:
    """Plan every photo of ``folder`` in order, carrying the arm and the tray counts (see the module).

    ``photos`` (an iterable of paths, e.g. a :class:`gripsight.app.live.PhotoWatcher`) replaces the
    folder's photos in name order. ``pictures`` None draws each photo's pictures with its outputs; a
    :class:`gripsight.app.live.PictureWriter` draws them in the background after its joint sequence
    and the run state are written (the run waits for them before it returns); False draws none.
    """
    from gripsight.planning.arm import Arm
    from gripsight.app.pipeline import plan_photo
    from gripsight.app.photo_outputs import write_photo_outputs, write_photo_pictures
    from gripsight.planning.picks import Planner

    folder = Path(folder)
    out = output_dir(out)
    if photos is None:
        photos = photos_in(folder)
        if not photos:
            raise GripsightError(f"{folder}: no photos ({', '.join(PHOTO_SUFFIXES)}) in this folder")
    state = _load_state(out, folder, cell, stored) if resume else None      # a damaged state is said before any work
    arm = Arm.from_config(cell.arm)
    planner = Planner(cell, arm, speed_scale=speed_scale)
    if resume:
        recorded = float(state.get("speed_scale", 1.0))
        if abs(recorded - speed_scale) > 1e-9:      # one run.csv, one speed: never mix them
            raise GripsightError(f"{_state_path(out)}: that run was made at speed scale {recorded:g}; "
                                 f"resume with --speed-scale {recorded:g}")
        for name in emptied:
            if name not in cell.bins:
                raise UsageError(f"--emptied: no bin '{name}' in the cell")
            state["bins"][name] = 0
    else:
        state = {"folder": str(folder.resolve()), "cell_sha256": cell.sha256, "done": [], "summaries": [],
                 "joints_deg": np.degrees(planner.home_rad).tolist(), "t_s": 0.0,
                 "bins": {name: 0 for name in cell.bins}, "speed_scale": speed_scale,
                 "calibration_sha256": getattr(stored, "sha256", None), "photo_sha256": {}}
        # the new run's state replaces the old one in one step (never deleted first, never lost)
        write_text_atomic(_state_path(out), strict_json(state, indent=1))
    remove_leftover_temps(out)
    result = RunResult()
    try:
        refused = getattr(photos, "refused", None)      # a PhotoWatcher hands a refused photo again once it changes
        for photo in photos:
            again = photo.name in state["done"]
            if again and not _take_again(state, photo):
                if refused is not None and state["summaries"][state["done"].index(photo.name)].get("status") == "error":
                    refused(photo)                  # the same bytes as refused (a resumed watch): wait for a change
                continue
            state.setdefault("photo_sha256", {})[photo.name] = _file_sha256(photo)
            room = {name: b.capacity - state["bins"].get(name, 0) for name, b in cell.bins.items() if b.capacity}
            try:
                pp = plan_photo(photo, cell, stored, planner, start_joints_rad=np.radians(state["joints_deg"]),
                                t0_s=state["t_s"], end_at_home=False, order=order, bin_room=room if room else None)
            except EXPECTED_ERRORS as exc:      # an unusable photo: said, skipped, the run goes on
                summary = {"photo": photo.name, "status": "error", "registration": "", "message": str(exc),
                           "picked": {}, "rejected": {}, "cycle_s": 0.0, **({"again": True} if again else {})}
                state["done"].append(photo.name)
                state["summaries"].append(summary)
                write_text_atomic(_state_path(out), strict_json(state, indent=1))
                if refused is not None:
                    refused(photo)
                if progress is not None:
                    progress(photo, summary)
                continue
            data, _ = write_photo_outputs(child_folder(out, photo.name), pp, cell, arm, stored,
                                          pictures=pictures is None)     # else in the background, or none
            summary = _summary(photo.name, pp, data)
            if again:
                summary["again"] = True
            joints = child_folder(out, photo.name) / "joints.csv"
            if pp.plan is not None and joints.is_file():       # written (and checked) just now by this run
                state.setdefault("joints_sha256", {})[photo.name] = _sha256(joints.read_bytes())
            if pp.plan is not None:
                for pick in pp.plan.picks:
                    state["bins"][pick.bin_name] = state["bins"].get(pick.bin_name, 0) + 1
                state["joints_deg"] = np.degrees(pp.plan.end_joints_rad).tolist()
                state["t_s"] = pp.plan.cycle_s
            state["done"].append(photo.name)
            state["summaries"].append(summary)
            write_text_atomic(_state_path(out), strict_json(state, indent=1))
            if pictures and pp.plan is not None:
                pictures.submit(write_photo_pictures, child_folder(out, photo.name), pp, cell, arm, label=photo.name)
            if progress is not None:
                progress(photo, summary)
            full = [o for o in (pp.plan.parts if pp.plan else []) if o.rejection and o.rejection.check is Check.BIN_FULL]
            if full:
                name = full[0].bin_name
                result.stopped = (f"bin '{name}' is full (capacity {cell.bins[name].capacity}); empty it, then resume "
                                  f"with: gripsight run {folder} --out {out} --resume --emptied {name}")
                break
    except KeyboardInterrupt:
        result.interrupted = True
    finally:
        if pictures:
            pictures.close()
    home_csv = None
    if not result.interrupted and not result.stopped:
        home = planner.plan([], start_joints_rad=np.radians(state["joints_deg"]), end_at_home=True, t0_s=state["t_s"])
        home_csv = joints_csv_text(home, cell, arm)
        state["t_s"] = home.cycle_s if len(home.samples.t_s) > 1 else state["t_s"]
    _write_run_csv(out, state, home_csv, cell)
    for s in state["summaries"]:
        for cls, n in s["picked"].items():
            result.picked[cls] = result.picked.get(cls, 0) + n
        for reason, n in s["rejected"].items():
            result.rejected[reason] = result.rejected.get(reason, 0) + n
    result.photos = state["summaries"]
    result.cycle_s = state["t_s"]
    return result


def _summary(name: str, pp, data: dict) -> dict:
    picked: dict[str, int] = {}
    rejected: dict[str, int] = {}
    if pp.plan is not None:
        for pick in pp.plan.picks:
            picked[pick.class_name] = picked.get(pick.class_name, 0) + 1
        for o in pp.plan.parts:
            if o.rejection is not None:
                rejected[o.rejection.label] = rejected.get(o.rejection.label, 0) + 1
    return {"photo": name, "status": data.get("status", "planned"), "registration": pp.analysis.registration.action.value,
            "message": pp.message, "picked": picked, "rejected": rejected,
            "cycle_s": 0.0 if pp.plan is None else round(sum(p.duration_s for p in pp.plan.picks), 3),
            "warnings": list(pp.analysis.warnings or [])}
