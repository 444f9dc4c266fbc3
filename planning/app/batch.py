"""Batch-testing a folder: every photo on its own (arm at home, no state carried), in parallel.

Each photo is one job (:func:`process_photo`, a plain function of plain arguments, so it runs the same
in a local process pool or on a Dask cluster) that writes ``OUT/<photo name>/`` and returns a row.
A photo that cannot be read or fails becomes a row with its error; the batch goes on.

Every photo gets plan.json, joints.csv and a thumbnail in the report. The pictures (overlay.png,
joints.png, path.png) cost several times the photo's pipeline, so by default (:class:`Pictures`
``SOME``) they are drawn for the photos worth a look (a rejected part, a refused or failed photo)
and for every ``SAMPLE_EVERY``-th photo; ``ALL`` draws them for every photo, ``NONE`` for none.
"""

from __future__ import annotations

import contextlib
import json
import os
import signal
from dataclasses import dataclass
from enum import Enum
from pathlib import Path

from gripsight.app.fileio import child_folder, output_dir, remove_leftover_temps, strict_json, write_text_atomic
from gripsight.app.workers import start_workers, stop_pool, worker_start

__all__ = ["BatchJob", "BatchInterrupted", "Pictures", "SAMPLE_EVERY", "process_photo", "run_batch"]

_CACHE: dict = {}
SAMPLE_EVERY = 10           # with Pictures.SOME, photos 1, 11, 21, ... (name order) get pictures too


class Pictures(str, Enum):
    """Which photos of a batch get overlay.png, joints.png and path.png."""

    ALL = "all"
    SOME = "some"           # photos with a rejection or a refusal, and a sample
    NONE = "none"


@dataclass(frozen=True)
class BatchJob:
    photo: str
    cell_path: str
    calibration_path: str | None
    out_dir: str
    thumbnail_px: int = 240
    pictures: Pictures = Pictures.SOME
    index: int = 0                  # the photo's place in name order (for the sample)


def _context(cell_path: str, calibration_path: str | None):
    """Cell, arm, planner and calibration, loaded once per worker process."""
    key = (cell_path, calibration_path)
    if key not in _CACHE:
        from gripsight.planning.arm import Arm
        from gripsight.app.pipeline import load_or_make_calibration
        from gripsight.app.cellfile import load_cell
        from gripsight.planning.picks import Planner

        cell = load_cell(cell_path)
        arm = Arm.from_config(cell.arm)
        stored = load_or_make_calibration(cell, Path(calibration_path) if calibration_path else None)
        _CACHE.clear()
        _CACHE[key] = (cell, arm, Planner(cell, arm), stored)
        import cv2

        cv2.setNumThreads(1)        # one process, one core: workers side by side do not fight over cores
    return _CACHE[key]


def process_photo(job: BatchJob) -> dict:
    """Analyse, plan and write one photo; return its row (``error`` set if it failed). The photo's files
    are written whole (atomic renames) but not flushed to the disk one by one: they are re-made from
    the photo by ``--resume`` (see :func:`gripsight.app.fileio.without_fsync`)."""
    from gripsight.app.fileio import without_fsync

    with without_fsync():
        return _process_photo(job)


def _process_photo(job: BatchJob) -> dict:
    from gripsight.app.errors import EXPECTED_ERRORS

    name = Path(job.photo).name
    row = {"photo": name, "status": "error", "error": "", "registration": "", "drift": "", "parts": 0,
           "found": {}, "planned": 0, "rejected": {}, "cycle_s": 0.0, "truth": None, "thumbnail": "", "warnings": []}
    try:
        from gripsight.app.pipeline import plan_photo
        from gripsight.app.photo_outputs import write_photo_outputs

        cell, arm, planner, stored = _context(job.cell_path, job.calibration_path)
        pp = plan_photo(job.photo, cell, stored, planner)
        out = child_folder(job.out_dir, name)
        reg = pp.analysis.registration
        row.update(registration=reg.action.value, drift="" if reg.drift is None else reg.drift.verdict.value,
                   warnings=list(pp.analysis.warnings or []))
        if pp.plan is None:
            row.update(status="refused", error=pp.message)
        else:
            row["status"] = "ok"
            for p in pp.analysis.detection.parts:
                row["found"][p.class_name] = row["found"].get(p.class_name, 0) + 1
                if p.class_name not in cell.parts and p.status.pickable:     # to the reject bin: why
                    row.setdefault("unknown", []).append(f"{p.id} {p.status.value}: {p.reason}")
            row["parts"] = len(pp.analysis.detection.parts)
            row["planned"] = len(pp.plan.picks)
            for o in pp.plan.parts:
                if o.rejection is not None:
                    row["rejected"][o.rejection.label] = row["rejected"].get(o.rejection.label, 0) + 1
            row["cycle_s"] = round(pp.plan.cycle_s, 3)
            row["truth"] = _truth_stats(job.photo, pp, cell)
        pictures = _wants_pictures(job, row)
        _, overlay = write_photo_outputs(out, pp, cell, arm, stored, pictures=pictures)
        row["overlay"] = overlay is not None
        if overlay is None and pp.analysis.detection is not None:
            from gripsight.vision.overlay import detection_thumbnail

            small = detection_thumbnail(pp.analysis.image, pp.analysis.detection, reg.mapping, reg.camera_centre_mm,
                                        cell, job.thumbnail_px)
            row["thumbnail"] = _jpeg_base64(small)
        else:
            row["thumbnail"] = _thumbnail(overlay if overlay is not None else pp.analysis.image, job)
    except EXPECTED_ERRORS as exc:
        row["error"] = str(exc)
    except Exception as exc:  # noqa: BLE001 - one bad photo must not stop the batch; the row says what failed
        row["error"] = f"internal error ({type(exc).__name__}: {exc})"
    row["photo_sha256"] = _sha256(job.photo)
    with contextlib.suppress(Exception):        # what the row was made with, for --resume
        cell, _, _, stored = _context(job.cell_path, job.calibration_path)
        row["cell_sha256"], row["calibration_sha256"] = cell.sha256, stored.sha256
    try:
        write_text_atomic(child_folder(job.out_dir, name) / "row.json", strict_json(row, indent=None))   # what --resume reads
    except (OSError, ValueError):
        pass
    return row


def _wants_pictures(job: BatchJob, row: dict) -> bool:
    """Whether this photo's pictures are drawn (see :class:`Pictures`)."""
    if job.pictures == Pictures.ALL:
        return True
    if job.pictures == Pictures.NONE:
        return False
    flagged = row["status"] != "ok" or bool(row["rejected"])
    return flagged or job.index % SAMPLE_EVERY == 0


def _sha256(path) -> str:
    import hashlib

    try:
        return hashlib.sha256(Path(path).read_bytes()).hexdigest()
    except OSError:
        return ""


def _finished_row(job: BatchJob, cell_sha256: str | None, calibration_sha256: str | None, warn=None) -> dict | None:
    """The row a previous (interrupted) batch wrote for this photo, if the photo, the cell file and the
    calibration file are byte for byte the ones it was made with (their SHA-256); a damaged row.json is
    said through ``warn`` (a callable) and the photo is done again."""
    path = child_folder(job.out_dir, Path(job.photo).name) / "row.json"
    if not path.is_file():
        return None
    try:
        row = json.loads(path.read_text(encoding="utf-8"), parse_constant=lambda c: float("nan"))
        problem = _row_problem(row)
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        problem = f"not JSON: {exc}"
    if problem:
        if warn is not None:
            warn(f"{path}: damaged ({problem}); {Path(job.photo).name} is done again")
        return None
    if not isinstance(row, dict):
        return None
    same = (row.get("photo_sha256") == _sha256(job.photo) and row.get("cell_sha256") == cell_sha256
            and row.get("calibration_sha256") == calibration_sha256 and cell_sha256 is not None)
    return row if same else None


def _row_problem(row) -> str:
    """What is wrong with a row read back from row.json ('' if nothing)."""
    import math

    def count(v) -> bool:
        return isinstance(v, int) and not isinstance(v, bool) and v >= 0

    if not isinstance(row, dict):
        return "not a JSON object"
    for key, ok in (("photo", lambda v: isinstance(v, str)), ("status", lambda v: v in ("ok", "refused", "error")),
                    ("error", lambda v: isinstance(v, str)), ("registration", lambda v: isinstance(v, str)),
                    ("drift", lambda v: isinstance(v, str)), ("parts", count), ("planned", count),
                    ("found", lambda v: isinstance(v, dict) and all(count(n) for n in v.values())),
                    ("rejected", lambda v: isinstance(v, dict) and all(count(n) for n in v.values())),
                    ("cycle_s", lambda v: isinstance(v, (int, float)) and math.isfinite(v) and v >= 0),
                    ("truth", lambda v: v is None or isinstance(v, dict)), ("thumbnail", lambda v: isinstance(v, str)),
                    ("warnings", lambda v: isinstance(v, list) and all(isinstance(x, str) for x in v))):
        if key not in row or not ok(row[key]):
            return f"'{key}' is missing or wrong"
    return ""


def _truth_stats(photo: str, pp, cell) -> dict | None:
    import yaml

    from gripsight.app.truthcheck import compare_with_truth, truth_path

    truth_file = truth_path(Path(photo))
    if not truth_file.is_file():
        return None
    try:
        loader = getattr(yaml, "CSafeLoader", yaml.SafeLoader)     # libyaml: ten times faster
        truth = yaml.load(truth_file.read_text(), Loader=loader)  # noqa: S506 - a safe loader
        return compare_with_truth(pp.analysis.detection.parts, truth, cell.work_area).as_dict()
    except (OSError, yaml.YAMLError, KeyError, TypeError, ValueError):
        return None


def _thumbnail(image, job: BatchJob) -> str:
    """A small JPEG of the overlay (or the photo), base64, for the self-contained report."""
    from gripsight.vision.overlay import shrink

    return _jpeg_base64(shrink(image, job.thumbnail_px))


def _jpeg_base64(small) -> str:
    import base64

    import cv2

    return base64.b64encode(cv2.imencode(".jpg", small, [cv2.IMWRITE_JPEG_QUALITY, 70])[1].tobytes()).decode()


def run_batch(folder, cell_path, calibration_path, out, workers: int = 1, scheduler: str | None = None,
              progress=None, resume: bool = False, pictures: Pictures = Pictures.SOME, warn=None,
              stop=None) -> list[dict]:
    """Process every photo of ``folder``; rows come back in photo-name order whatever the worker order.
    With ``resume``, photos whose row a previous batch finished (and that did not change) are not redone.
    ``stop`` (a ``threading.Event``), once set, ends the batch as a Ctrl-C does (:class:`BatchInterrupted`)."""
    from gripsight.app.run import photos_in

    out = output_dir(out)
    photos = photos_in(folder)
    pool_context = start_workers(workers, scheduler)
    cell, _, _, stored = _context(str(cell_path), str(calibration_path) if calibration_path else None)   # fail early
    remove_leftover_temps(out)
    jobs = [BatchJob(str(p), str(cell_path), str(calibration_path) if calibration_path else None, str(out),
                     pictures=Pictures(pictures), index=i) for i, p in enumerate(photos)]
    rows: dict[str, dict] = {}
    if resume:
        for job in list(jobs):
            row = _finished_row(job, cell.sha256, stored.sha256, warn)
            if row is not None:
                rows[row["photo"]] = row
                jobs.remove(job)
                if progress:
                    progress(row)
    if not jobs:
        pass
    elif scheduler:
        rows.update(_run_dask(jobs, scheduler, progress))
    elif workers <= 1:
        for job in jobs:
            if stop is not None and stop.is_set():
                raise BatchInterrupted(len(rows), len(photos))
            row = process_photo(job)
            rows[row["photo"]] = row
            if progress:
                progress(row)
    else:
        pool = pool_context.Pool(workers, initializer=worker_start, initargs=(os.getpid(),))
        try:
            results = pool.imap_unordered(process_photo, jobs)
            for _ in range(len(jobs)):
                row = _next_row(results, stop)
                rows[row["photo"]] = row
                if progress:
                    progress(row)
        except KeyboardInterrupt:
            # Ctrl-C: the workers (which ignore SIGINT) are stopped at once; a second Ctrl-C while they
            # go must not leave them behind or print a trace
            previous = signal.signal(signal.SIGINT, signal.SIG_IGN)
            try:
                stop_pool(pool)
            finally:
                signal.signal(signal.SIGINT, previous)
            raise BatchInterrupted(len(rows), len(photos)) from None
        else:
            pool.close()
            pool.join()
    return [rows[p.name] for p in photos]


def _next_row(results, stop) -> dict:
    """The next finished row; polls ``stop`` (set by the command's Ctrl-C handler) while it waits, so a
    Ctrl-C is seen within 0.1 s wherever it lands (a KeyboardInterrupt raised inside an import's or a
    weakref's callback is swallowed by Python and would let the batch run on)."""
    import multiprocessing

    while True:
        if stop is not None and stop.is_set():
            raise KeyboardInterrupt
        try:
            return results.next(timeout=0.1)
        except multiprocessing.TimeoutError:
            continue


class BatchInterrupted(KeyboardInterrupt):
    """Ctrl-C during a batch: the workers are gone, every finished photo's row.json is kept."""

    def __init__(self, done: int, total: int):
        super().__init__(f"{done} of {total}")
        self.done, self.total = done, total


def _run_dask(jobs, scheduler: str, progress) -> dict:
    from gripsight.app.errors import GripsightError

    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise GripsightError("--scheduler needs Dask: pip install 'gripsight[cluster]'") from None
    try:
        client = Client(scheduler, timeout=20)
    except (OSError, TimeoutError) as exc:
        raise GripsightError(f"--scheduler {scheduler}: cannot reach the Dask scheduler ({exc})") from None
    except (ValueError, TypeError) as exc:        # not an address at all (Dask's own parser says why)
        from gripsight.app.errors import UsageError

        raise UsageError(f"--scheduler: expected an address such as tcp://host:8786, got '{scheduler}' ({exc})") from None
    rows = {}
    try:
        futures = client.map(process_photo, jobs, pure=False)
        for fut in as_completed(futures):
            row = fut.result()
            rows[row["photo"]] = row
            if progress:
                progress(row)
    finally:
        client.close()
    return rows
