"""Commands that do the job: detect, plan, run, batch."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from gripsight.app.commands.common import _find_cell, _floats, _progress, calibration_option, cell_option, command  # noqa: F401

#: the longest --idle-stop: a week (inf or 1e308 watched for ever without saying so; leave the option out for that)
_IDLE_STOP_MAX_S = 7 * 24 * 3600.0


def _note(text: str) -> None:
    """A note on stderr (stdout may be JSON)."""
    typer.echo(f"note: {text}", err=True)


def _note_not_photos(folder) -> None:
    """Say the entries named like photos that a run or batch leaves out (a folder, a broken link)."""
    from gripsight.app.run import not_photo_files

    odd = not_photo_files(folder)
    if odd:
        more = f" and {len(odd) - 10} more" if len(odd) > 10 else ""
        _note(f"{folder}: left out, named like photos but not photo files: {', '.join(odd[:10])}{more}")


@command()
def detect(
    photo: Path = typer.Argument(..., help="A photo from the calibrated camera."),
    cell: Optional[Path] = cell_option("beside the photo or in its parent"),
    calibration: Optional[Path] = calibration_option(),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Write a PNG with outlines, classes, pick points and reasons."),
    as_json: bool = typer.Option(False, "--json", help="Print the parts as JSON and nothing else."),
    sample: Optional[str] = typer.Option(None, "--sample", help="U,V: print the white-balanced CIELAB colour around that pixel."),
):
    """Find the parts in a photo: class, table position (mm, parallax corrected), size, status."""
    from gripsight.app.fileio import strict_json
    from gripsight.app.pipeline import analyse_photo, load_or_make_calibration
    from gripsight.app.cellfile import load_cell
    from gripsight.app.errors import GripsightError

    from gripsight.app.outpaths import check_output_paths

    cell_path = _find_cell(cell, photo)
    cfg = load_cell(cell_path)
    check_output_paths(files={"--overlay": overlay}, inputs={"the photo": photo, "the cell file": cell_path,
                                                              "--calibration": calibration})
    if sample is not None:
        _sample_colour(photo, cfg, sample)
        return
    stored = load_or_make_calibration(cfg, calibration, say=_note)
    result = analyse_photo(photo, cfg, stored)
    if result.refused:
        raise GripsightError(result.registration.message)
    det = result.detection
    if overlay is not None:
        import cv2

        from gripsight.app.fileio import write_bytes_atomic
        from gripsight.vision.overlay import detection_overlay

        image = detection_overlay(result.image, det, result.registration.mapping,
                                  result.registration.camera_centre_mm, cfg)
        write_bytes_atomic(overlay, cv2.imencode(".png", image)[1].tobytes())
    data = {"gripsight": "detect", "photo": str(photo), "registration": result.registration.action.value,
            "registration_note": result.registration.message,
            "drift": None if result.registration.drift is None else result.registration.drift.as_dict(),
            "white_balance": None if det.illumination is None else det.illumination.as_dict(),
            "parts": [p.as_dict() for p in det.parts], "notes": det.notes, "warnings": result.warnings}
    for text in result.warnings:
        typer.echo(f"warning: {text}", err=True)      # on stderr: stdout may be JSON
    if as_json:
        typer.echo(strict_json(data))
        return
    from rich.console import Console
    from rich.table import Table

    from gripsight.vision.parts import PartStatus

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    if result.registration.message and result.registration.message not in result.warnings:
        console.print(f"note: {result.registration.message}")
    table = Table(title=f"{photo}: parts", title_justify="left")
    for col in ("id", "class", "x mm", "y mm", "yaw", "size mm", "ΔE", "status"):
        table.add_column(col, justify="right" if col not in ("id", "class", "status") else "left")
    for p in det.parts:
        status = p.status.value if p.status is PartStatus.OK else f"{p.status.value}: {p.reason}"
        table.add_row(p.id, p.class_name, f"{p.xy_mm[0]:.1f}", f"{p.xy_mm[1]:.1f}", f"{p.yaw_deg:.0f}",
                      f"{p.length_mm:.0f}x{p.width_mm:.0f}", "" if p.delta_e != p.delta_e else f"{p.delta_e:.1f}", status)
    console.print(table)
    for note in det.notes:
        console.print(f"note: {note}")
    if overlay is not None:
        console.print(f"wrote {overlay}")


def _sample_colour(photo: Path, cfg, text: str) -> None:
    """Print the white-balanced CIELAB (median of a 7x7 window) at a pixel and the nearest class."""
    import numpy as np

    from gripsight.vision.pixelclass import class_distance
    from gripsight.vision.markers import detect_markers
    from gripsight.vision.photo import read_photo
    from gripsight.vision.whitebalance import fit_illumination, lab_image

    uv = _floats(text, "--sample", (2, 2))
    image = read_photo(photo)
    u, v = int(round(uv[0])), int(round(uv[1]))
    h, w = image.shape[:2]
    if not (3 <= u < w - 3 and 3 <= v < h - 3):
        from gripsight.app.errors import UsageError

        raise UsageError(f"--sample: pixel ({u}, {v}) is outside the {w}x{h} photo (or too near its edge)")
    ill = fit_illumination(image, detect_markers(image, cfg.markers.dictionary, search_ids=cfg.markers.layout), cfg)
    patch = lab_image(image[v - 3:v + 4, u - 3:u + 4], ill, (u - 3, v - 3)).reshape(-1, 3)
    lab = np.median(patch, axis=0)
    typer.echo(f"CIELAB at ({u}, {v}): [{lab[0]:.1f}, {lab[1]:.1f}, {lab[2]:.1f}]"
               + ("" if ill is not None else " (no marker paper seen: not white-balanced)"))
    for name, cls in sorted(cfg.parts.items(), key=lambda kv: float(class_distance(lab, kv[1].lab))):
        d = float(class_distance(lab, cls.lab))
        typer.echo(f"  {name}: dE2000 {d:.1f} (lightness weighed half; tolerance {cls.tolerance:g})"
                   f"{'  <- match' if d < cls.tolerance else ''}")


@command()
def plan(
    photo: Optional[Path] = typer.Argument(None, help="A photo from the calibrated camera (or give --parts)."),
    parts: Optional[Path] = typer.Option(None, "--parts", help="Parts in table coordinates instead of a photo (YAML list of {class, x_mm, y_mm, ...})."),
    cell: Optional[Path] = cell_option("beside the input or in its parent"),
    calibration: Optional[Path] = calibration_option(),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Folder for plan.json, joints.csv and the pictures "
                                                                  "(default: <photo or parts file name>_plan)."),
    order: str = typer.Option("nearest", "--order", help="nearest (nearest-next + 2-opt) or detected (input order)."),
    as_json: bool = typer.Option(False, "--json", help="Print the plan as JSON on stdout and nothing else."),
    plots: bool = typer.Option(True, "--plots/--no-plots", help="Draw joints.png and path.png (overlay.png is always drawn for a photo)."),
    speed_scale: float = typer.Option(1.0, "--speed-scale", min=0.05, max=1.0,
                                      help="Move at this fraction of the cell's speeds (e.g. 0.25 for a first, careful run)."),
):
    """Plan checked pick-and-place moves for the parts in a photo (or a parts file); write the joint sequence."""
    from gripsight.app.fileio import strict_json
    from gripsight.planning.arm import Arm
    from gripsight.app.cellfile import load_cell
    from gripsight.app.errors import GripsightError
    from gripsight.planning.picks import Planner

    from gripsight.app.errors import UsageError

    if order not in ("nearest", "detected"):
        raise UsageError(f"--order: expected 'nearest' or 'detected', got '{order}'")
    if (photo is None) == (parts is None):
        raise UsageError("plan: give either a PHOTO or --parts FILE (one of the two)")
    from gripsight.app.outpaths import check_output_paths

    cell_path = _find_cell(cell, photo if photo is not None else parts)
    cfg = load_cell(cell_path)
    if out is None:             # never one shared ./out that each plan overwrites: a folder per input
        out = Path(f"{Path(photo if photo is not None else parts).stem}_plan")
    check_output_paths(folders={"--out": out}, inputs={"the photo": photo, "--parts": parts, "the cell file": cell_path,
                                                       "--calibration": calibration})
    arm = Arm.from_config(cfg.arm)
    planner = Planner(cfg, arm, speed_scale=speed_scale)
    if parts is not None:
        from gripsight.app.export import write_plan_outputs
        from gripsight.app.partsfile import load_parts_file

        from gripsight.app.cellchecks import check_plan_size

        targets = load_parts_file(parts, cfg)
        check_plan_size(len(targets), cfg, str(parts))
        result = planner.plan(targets, order=order)
        data = write_plan_outputs(out, result, cfg, arm, plots=plots)
    else:
        from gripsight.app.pipeline import load_or_make_calibration, plan_photo
        from gripsight.app.photo_outputs import write_photo_outputs

        stored = load_or_make_calibration(cfg, calibration, say=_note)
        photo_plan = plan_photo(photo, cfg, stored, planner, order=order)
        data, _ = write_photo_outputs(out, photo_plan, cfg, arm, stored, plots=plots)
        if photo_plan.plan is None:
            raise GripsightError(photo_plan.message)
    if as_json:
        typer.echo(strict_json(data))
        return
    _print_plan_summary(data, out)


def _print_plan_summary(data: dict, out: Path) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    table = Table(title=f"{data['cell']}: picks in order", title_justify="left")
    for col in ("#", "part", "class", "bin", "duration s"):
        table.add_column(col, justify="right" if col in ("#", "duration s") else "left")
    for i, pick in enumerate(data["picks"], 1):
        table.add_row(str(i), pick["part"], pick["class"], pick["bin"], f"{pick['duration_s']:.2f}")
    console.print(table)
    rejected = [p for p in data["parts"] if p["status"] != "planned"]
    if rejected:
        rt = Table(title="rejected", title_justify="left")
        for col in ("part", "class", "reason", "detail"):
            rt.add_column(col)
        for p in rejected:
            rej = p["rejection"]
            where = f" ({rej['segment']})" if rej.get("segment") else ""
            rt.add_row(p["id"], p["class"], rej["check"], rej["detail"] + where)
        console.print(rt)
    tot = data["totals"]
    console.print(f"{tot['planned']} planned, {tot['rejected']} rejected; cycle time {tot['cycle_s']:.2f} s "
                  f"({tot['samples']} samples at {tot['sample_hz']:g} Hz)")
    for w in data["warnings"]:
        console.print(f"warning: {w}")
    pictures = [name for name in ("joints.png", "path.png", "overlay.png") if (out / name).exists()]
    console.print(f"wrote {out / 'plan.json'}, {out / 'joints.csv'}" + "".join(f", {out / n}" for n in pictures))


@command()
def run(
    folder: Path = typer.Argument(..., help="Folder of photos, taken in name order by the cell."),
    cell: Optional[Path] = cell_option("in the folder or its parent"),
    calibration: Optional[Path] = calibration_option(),
    out: Path = typer.Option(Path("out/run"), "--out", "-o", help="Folder for run.csv and one folder per photo."),
    resume: bool = typer.Option(False, "--resume", help="Continue an interrupted or stopped run in --out."),
    emptied: list[str] = typer.Option([], "--emptied", help="With --resume: this bin was emptied (repeatable)."),
    order: str = typer.Option("nearest", "--order", help="nearest or detected."),
    speed_scale: float = typer.Option(1.0, "--speed-scale", min=0.05, max=1.0,
                                      help="Move at this fraction of the cell's speeds (a first, careful run)."),
    watch: bool = typer.Option(False, "--watch", help="Live cell: keep watching the folder and take each photo as "
                                                      "soon as it is completely written, until Ctrl-C."),
    idle_stop: Optional[float] = typer.Option(None, "--idle-stop", min=0.1, max=_IDLE_STOP_MAX_S, metavar="SECONDS",
                                              help="With --watch: end the run (arm home) when no photo came for this long."),
    pictures: bool = typer.Option(True, "--pictures/--no-pictures",
                                  help="Draw each photo's overlay.png, joints.png and path.png (in the background, "
                                       "after its joints.csv)."),
):
    """The sorting cell: plan photo after photo, the arm carried from one to the next; one run.csv."""
    from rich.console import Console
    from rich.table import Table


    from gripsight.app.pipeline import load_or_make_calibration
    from gripsight.app.cellfile import load_cell
    from gripsight.app.run import photos_in, run_folder

    from gripsight.app.errors import InputError, UsageError
    from gripsight.app.live import PhotoWatcher, PictureWriter
    from gripsight.app.outpaths import check_output_paths
    from gripsight.app.run import PHOTO_SUFFIXES

    if idle_stop is not None and not watch:
        raise UsageError("--idle-stop: only with --watch")
    cell_path = _find_cell(cell, folder)
    cfg = load_cell(cell_path)
    check_output_paths(folders={"--out": out}, inputs={"the photo folder": folder, "the cell file": cell_path,
                                                       "--calibration": calibration})
    stored = load_or_make_calibration(cfg, calibration, say=_note)
    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    total = len(photos_in(folder))
    _note_not_photos(folder)
    source = None
    if watch:
        import signal

        from gripsight.app.live import warm_up

        def _stop(signum, frame):                   # a service manager's stop: like Ctrl-C
            raise KeyboardInterrupt

        signal.signal(signal.SIGTERM, _stop)
        warm_up()
        source = PhotoWatcher(folder, PHOTO_SUFFIXES, idle_stop_s=idle_stop)
        how = "file events" if source.use_watchdog else "polling"
        _note(f"watching {folder} for photos ({how}); Ctrl-C stops, and --resume goes on from there")

    def report(photo, summary):
        picked = sum(summary["picked"].values())
        rejected = ", ".join(f"{k} {v}" for k, v in summary["rejected"].items()) or "none"
        again = " (again: written since it was refused)" if summary.get("again") else ""
        line = f"[{len(result_rows) + 1}{'' if watch else f'/{total}'}] {photo.name}{again}: "
        line += (f"{picked} picked, rejected: {rejected}" if summary["status"] == "planned"
                 else f"{summary['status']}: {summary['message']}")
        result_rows.append(summary)
        console.print(line)
        for text in summary.get("warnings", []):
            console.print(f"  warning: {text}")

    result_rows: list = []
    from gripsight.app.fileio import output_dir
    from gripsight.app.lock import output_lock

    writer = PictureWriter() if pictures else False
    with output_lock(output_dir(out), "run"):
        result = run_folder(folder, cfg, stored, out, resume=resume, emptied=tuple(emptied), order=order,
                            progress=report, speed_scale=speed_scale, photos=source, pictures=writer)
    for problem in writer.errors if writer else []:
        console.print(f"warning: {problem}")
    if source is not None and source.out_of_order:
        console.print(f"note: taken after photos with later names (they came late): {', '.join(source.out_of_order)}")
    table = Table(title=f"run of {folder}", title_justify="left")
    for col in ("photos", "picked", "by class", "rejected", "by reason", "cycle s"):
        table.add_column(col)
    table.add_row(str(len(result.photos)), str(sum(result.picked.values())),
                  ", ".join(f"{k} {v}" for k, v in sorted(result.picked.items())) or "-",
                  str(sum(result.rejected.values())),
                  ", ".join(f"{k} {v}" for k, v in sorted(result.rejected.items())) or "-", f"{result.cycle_s:.1f}")
    console.print(table)
    if result.interrupted:
        of = "" if watch else f" of {total}"
        again = " --watch" if watch else ""
        console.print(f"interrupted after {len(result.photos)}{of} photos; every finished photo's outputs "
                      f"are complete; resume with: gripsight run {folder} --out {out} --resume{again}")
        raise typer.Exit(130)
    if result.stopped:
        console.print(f"stopped: {result.stopped}")
        raise typer.Exit(4)
    console.print(f"wrote {out / 'run.csv'} and one folder per photo under {out}")
    if source is not None and source.gone:
        raise InputError(f"{folder}: the watched folder is gone (removed, renamed or replaced) after "
                         f"{len(result.photos)} photos; the arm went home and run.csv is written; when the "
                         f"folder is back, go on with: gripsight run {folder} --out {out} --resume --watch")


@command()
def batch(
    folder: Path = typer.Argument(..., help="Folder of photos to test, each on its own."),
    cell: Optional[Path] = cell_option("in the folder or its parent"),
    calibration: Optional[Path] = calibration_option(),
    out: Path = typer.Option(Path("out/batch"), "--out", "-o", help="Folder for batch.csv, batch.json, report.html."),
    workers: int = typer.Option(2, "--workers", "-w", min=1, max=64, help="Parallel worker processes."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", help="Dask scheduler address (tcp://host:port) instead of local workers."),
    resume: bool = typer.Option(False, "--resume", help="Keep the photos an interrupted batch in --out finished."),
    pictures: str = typer.Option("some", "--pictures",
                                 help="Which photos get overlay.png, joints.png and path.png: some (rejections, "
                                      "refusals and every 10th photo), all, or none."),
):
    """Test a folder of photos: which parts would be picked, which rejected and why; report.html."""
    from gripsight.app.batch import Pictures
    from gripsight.app.errors import UsageError
    from gripsight.app.workers import start_workers, stop_workers

    try:
        chosen = Pictures(pictures)
    except ValueError:
        raise UsageError(f"--pictures: expected some, all or none, got '{pictures}'") from None
    cell_path = _find_cell(cell, folder)
    start_workers(workers, scheduler)       # their start-up overlaps reading the cell and the photo folder
    try:
        _batch(folder, cell_path, calibration, out, workers, scheduler, resume, chosen)
    finally:
        stop_workers()


def _batch(folder, cell_path, calibration, out, workers, scheduler, resume, chosen) -> None:
    import signal
    import threading

    from gripsight.app.batch import BatchInterrupted, run_batch
    from gripsight.app.batchtables import write_batch_tables
    from gripsight.app.cellfile import load_cell
    from gripsight.app.fileio import output_dir
    from gripsight.app.lock import output_lock
    from gripsight.app.outpaths import check_output_paths
    from gripsight.app.run import photos_in

    cfg = load_cell(cell_path)
    check_output_paths(folders={"--out": out}, inputs={"the photo folder": folder, "the cell file": cell_path,
                                                       "--calibration": calibration})
    n = len(photos_in(folder))
    _note_not_photos(folder)
    stop = threading.Event()

    def _on_ctrl_c(signum, frame):
        # only a flag: the batch polls it (a KeyboardInterrupt raised here could land inside an import's
        # callback, where Python swallows it); the first Ctrl-C in a plain step still interrupts it
        if not stop.is_set() and threading.current_thread() is threading.main_thread():
            stop.set()
            if scheduler:
                raise KeyboardInterrupt

    previous = signal.signal(signal.SIGINT, _on_ctrl_c)
    try:
        with output_lock(output_dir(out), "batch"), _progress() as bar:
            task = bar.add_task("batch", total=n)
            rows = run_batch(folder, cell_path, calibration, out, workers=workers, scheduler=scheduler,
                             progress=lambda row: bar.advance(task), resume=resume, pictures=chosen,
                             warn=lambda text: bar.console.print(f"warning: {text}", soft_wrap=True), stop=stop)
            totals = write_batch_tables(out, rows, cfg)
            if stop.is_set():
                raise KeyboardInterrupt
    except KeyboardInterrupt as exc:
        done = f" after {exc.done} of {exc.total} photos" if isinstance(exc, BatchInterrupted) else ""
        typer.echo(f"interrupted{done}; every finished photo's row and outputs are kept in {out}; resume with: "
                   f"gripsight batch {folder} --out {out} --resume", err=True)
        raise typer.Exit(130) from None
    finally:
        signal.signal(signal.SIGINT, previous)
    _print_batch(rows, totals, out)
    if totals["errors"]:
        raise typer.Exit(5)


#: a batch of up to this many photos lists every photo in the terminal; a larger one lists the photos that
#: failed, were refused or had a part rejected (at most _LIST_AT_MOST): a table of hundreds of rows cannot
#: be read there (batch.csv and the report have them), and drawing it took 0.3 s for 400 photos
_LIST_EVERY_PHOTO_UP_TO = 40
_LIST_AT_MOST = 100


def _print_batch(rows, totals, out) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    shown = rows if len(rows) <= _LIST_EVERY_PHOTO_UP_TO else [r for r in rows if r["status"] != "ok" or r["rejected"]]
    if shown:
        title = "batch" if shown is rows else "batch: photos that failed, were refused or had a part rejected"
        table = Table(title=title, title_justify="left")
        for col in ("photo", "status", "found", "planned", "rejected", "cycle s"):
            table.add_column(col, justify="right" if col in ("found", "planned", "cycle s") else "left")
        for r in shown[:_LIST_AT_MOST]:
            status = r["status"] if not r["error"] else f"{r['status']}: {r['error']}"
            table.add_row(r["photo"], status, str(r["parts"]), str(r["planned"]),
                          ", ".join(f"{k} {v}" for k, v in sorted(r["rejected"].items())), f"{r['cycle_s']:.1f}")
        console.print(table)
    if len(shown) < len(rows):
        more = len(shown) - _LIST_AT_MOST if len(shown) > _LIST_AT_MOST else 0
        console.print((f"{more} more such photos and " if more else "")
                      + f"{len(rows) - len(shown)} photos planned with nothing rejected are not listed here: "
                      f"batch.csv and report.html list every photo")
    line = (f"{totals['photos']} photos: {totals['ok']} planned, {totals['refused']} refused, {totals['errors']} failed; "
            f"{totals['planned']} picks, rejected {sum(totals['rejected'].values())}")
    if "truth" in totals:
        t = totals["truth"]
        line += (f"; against truth: recall {t['recall']:.1%}, precision {t['precision']:.1%}, "
                 f"pick error {t['pick_error_rms_mm']:.2f} mm RMS ({t['pick_error_max_mm']:.2f} max)")
    console.print(line)
    if totals.get("warned"):
        console.print(f"warning: {totals['warned']} photos with warnings: camera moved (refitted) in "
                      f"{totals['camera_moved']}, markers not seen in {totals['markers_unseen']}, poor calibration in "
                      f"{totals['poor_calibration']}; see the warnings column of batch.csv")
    console.print(f"wrote {out / 'batch.csv'}, {out / 'batch.json'}, {out / 'report.html'}")
