"""The ``gripsight`` command line: parse, load the cell, call the library, print.

Heavy modules (numpy, OpenCV, matplotlib, pydantic) are imported inside the commands so that
``gripsight --help`` starts fast. Every expected error is one line on stderr and a non-zero exit code;
``--verbose`` adds the trace.
"""

from __future__ import annotations

import functools
import sys
import traceback
from pathlib import Path
from typing import Optional

import typer

app = typer.Typer(
    name="gripsight",
    help="Calibrate an overhead camera to the table, find parts, and plan checked pick-and-place "
         "joint sequences for a small tabletop arm.",
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
)

_state = {"verbose": False}


@app.callback()
def _global(
    verbose: bool = typer.Option(False, "--verbose", "-v", help="Print the full trace on errors."),
    max_pixels: Optional[int] = typer.Option(None, "--max-pixels", min=1,
                                             help="Refuse photos with more pixels than this (default 50 million)."),
):
    _state["verbose"] = verbose
    if max_pixels is not None:
        import os

        os.environ["GRIPSIGHT_MAX_PIXELS"] = str(max_pixels)      # worker processes inherit it


def _echo_err(text: str) -> None:
    typer.echo(text, err=True)


def _guarded(fn):
    """Turn the library's expected errors into one line on stderr and the error's exit code."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        from planning.errors import CellFileError, GripsightError

        try:
            return fn(*args, **kwargs)
        except GripsightError as exc:
            lines = exc.lines() if isinstance(exc, CellFileError) else [str(exc)]
            for line in lines:
                _echo_err(f"error: {line}")
            if _state["verbose"]:
                traceback.print_exc()
            raise typer.Exit(exc.exit_code) from None
        except KeyboardInterrupt:
            _echo_err("interrupted")
            raise typer.Exit(130) from None
        except (typer.Exit, typer.Abort):
            raise
        except Exception as exc:  # noqa: BLE001 - the last line of defence: one line, never a bare trace
            _echo_err(f"error: internal error ({type(exc).__name__}: {exc}); run with --verbose for the trace "
                      "and report it")
            if _state["verbose"]:
                traceback.print_exc()
            raise typer.Exit(1) from None

    return wrapper


def command(*args, **kwargs):
    """``app.command`` with :func:`_guarded` error handling."""
    return lambda fn: app.command(*args, **kwargs)(_guarded(fn))


# ------------------------------------------------------------------ init / validate
@command()
def init(
    path: Path = typer.Argument(Path("cell.yaml"), help="Where to write the starter cell file."),
    force: bool = typer.Option(False, "--force", help="Overwrite an existing file."),
):
    """Write a commented starter cell file to fill in with your cell's measurements."""
    from planning.config import starter_cell_text
    from planning.errors import GripsightError
    from planning.fileio import write_text_atomic

    if path.is_dir():
        raise GripsightError(f"{path}: is a directory; give a file name such as {path / 'cell.yaml'}")
    if path.exists() and not force:
        raise GripsightError(f"{path}: already exists; pass --force to overwrite it or choose another name")
    write_text_atomic(path, starter_cell_text())
    typer.echo(f"wrote {path}: fill in the keys marked MEASURE, then run: gripsight validate {path}")


@command()
def validate(cell: Path = typer.Argument(..., help="The cell file to check.")):
    """Check a cell file; print a summary, or every problem with its key path (exit 2)."""
    from planning.arm import Arm
    from planning.config import load_cell
    from planning.reach import lowest_grip_z_mm, radial_reach

    cfg = load_cell(cell)
    arm = Arm.from_config(cfg.arm)
    raised = sum(1 for m in cfg.markers.layout.values() if m.z > 0)
    grip = radial_reach(arm, lowest_grip_z_mm(cfg))
    link = cfg.arm.linkage.type + (f" ({arm.grashof()})" if cfg.arm.linkage.type == "four_bar" else "")
    typer.echo(
        f"ok: {cfg.cell}: {link} arm {cfg.arm.upper_arm_mm:g}+{cfg.arm.forearm_mm:g} mm, "
        f"{len(cfg.markers.layout)} markers ({raised} raised), {len(cfg.parts)} part classes, "
        f"{len(cfg.bins)} bins; reach at grip height {grip.describe()}")


# ------------------------------------------------------------------ reach
@command()
def reach(
    cell: Path = typer.Argument(..., help="The cell file."),
    out: Path = typer.Option(Path("reach.png"), "--out", "-o", help="Where to write the picture (PNG)."),
    resolution_mm: float = typer.Option(2.0, "--resolution-mm", min=0.5, max=20.0, help="Grid step of the drawing."),
):
    """Draw the reachable region (top and side view) and flag bins or corners the arm cannot reach."""
    from planning.arm import Arm
    from planning.config import load_cell
    from planning.fileio import atomic_output
    from planning.reach import lowest_grip_z_mm, radial_reach, unreachable_places
    from planning.reach_plot import draw_reach

    cfg = load_cell(cell)
    arm = Arm.from_config(cfg.arm)
    with atomic_output(out) as tmp:
        draw_reach(cfg, arm, tmp, resolution_mm=resolution_mm)
    safe = radial_reach(arm, cfg.motion.safe_z_mm)
    grip = radial_reach(arm, lowest_grip_z_mm(cfg))
    table = radial_reach(arm, 0.0)
    typer.echo(f"reach: table {table.describe()}; grip {grip.describe()}; safe {safe.describe()}")
    bad = unreachable_places(cfg, arm)
    for u in bad:
        typer.echo(f"cannot reach: {u.describe()}")
    typer.echo(f"wrote {out}")


# ------------------------------------------------------------------ plan
def _find_cell(cell: Optional[Path], near: Path) -> Path:
    """--cell, or cell.yaml in the input's folder or its parent."""
    from planning.errors import GripsightError

    if cell is not None:
        return cell
    folder = near if near.is_dir() else near.parent
    for candidate in (folder / "cell.yaml", folder.parent / "cell.yaml"):
        if candidate.is_file():
            return candidate
    raise GripsightError(f"{near}: no cell.yaml beside it or in its parent folder; pass --cell CELL")


@command()
def plan(
    photo: Optional[Path] = typer.Argument(None, help="A photo from the calibrated camera (or give --parts)."),
    parts: Optional[Path] = typer.Option(None, "--parts", help="Parts in table coordinates instead of a photo (YAML list of {class, x_mm, y_mm, ...})."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml beside the input or in its parent)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell)."),
    out: Path = typer.Option(Path("out"), "--out", "-o", help="Folder for plan.json, joints.csv and the pictures."),
    order: str = typer.Option("nearest", "--order", help="nearest (nearest-next + 2-opt) or detected (input order)."),
    as_json: bool = typer.Option(False, "--json", help="Print the plan as JSON on stdout and nothing else."),
    plots: bool = typer.Option(True, "--plots/--no-plots", help="Draw joints.png and path.png."),
):
    """Plan checked pick-and-place moves for the parts in a photo (or a parts file); write the joint sequence."""
    import json

    from planning.arm import Arm
    from planning.config import load_cell
    from planning.errors import GripsightError
    from planning.picks import Planner

    if order not in ("nearest", "detected"):
        raise GripsightError(f"--order: expected 'nearest' or 'detected', got '{order}'")
    if (photo is None) == (parts is None):
        raise GripsightError("plan: give either a PHOTO or --parts FILE (one of the two)")
    cfg = load_cell(_find_cell(cell, photo if photo is not None else parts))
    arm = Arm.from_config(cfg.arm)
    planner = Planner(cfg, arm)
    if parts is not None:
        from planning.export import write_plan_outputs
        from planning.targets import load_parts_file

        result = planner.plan(load_parts_file(parts, cfg), order=order)
        data = write_plan_outputs(out, result, cfg, arm, plots=plots)
    else:
        from planning.cell import load_or_make_calibration, plan_photo
        from planning.photo_outputs import write_photo_outputs

        stored = load_or_make_calibration(cfg, calibration)
        photo_plan = plan_photo(photo, cfg, stored, planner, order=order)
        data = write_photo_outputs(out, photo_plan, cfg, arm, stored)
        if photo_plan.plan is None:
            raise GripsightError(photo_plan.message)
    if as_json:
        typer.echo(json.dumps(data, indent=2))
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


# ------------------------------------------------------------------ render
def _floats(text: Optional[str], name: str, count: tuple[int, int]) -> Optional[list[float]]:
    from planning.errors import GripsightError

    if text is None:
        return None
    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise GripsightError(f"{name}: expected numbers separated by commas, got '{text}'") from None
    if not count[0] <= len(values) <= count[1]:
        raise GripsightError(f"{name}: expected {count[0]}-{count[1]} numbers, got {len(values)}")
    return values


def _progress():
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                    transient=False)


@command()
def render(
    cell: Path = typer.Argument(..., help="The cell file (markers, work area and part classes are used)."),
    out: Path = typer.Option(Path("renders"), "--out", "-o", help="Folder for the photos and their .truth.yaml files."),
    scene: Optional[Path] = typer.Option(None, "--scene", help="Render one given scene (YAML), or again from a .truth.yaml."),
    scenes: int = typer.Option(1, "--scenes", min=1, max=10000, help="How many random scenes."),
    seed: int = typer.Option(0, "--seed", help="Seed: the same seed gives the same photos."),
    sample_set: bool = typer.Option(False, "--sample-set", help="Render the whole demo set (calibration, bumped, demo, batch)."),
    camera_shift_mm: float = typer.Option(0.0, "--camera-shift-mm", help="Move the camera sideways by this much (random direction)."),
    camera_tilt_deg: float = typer.Option(0.0, "--camera-tilt-deg", min=0, max=30, help="Tilt the camera (random direction)."),
    distortion: Optional[str] = typer.Option(None, "--distortion", help="Lens distortion K1[,K2] (OpenCV model), e.g. -0.15,0.03."),
    noise: float = typer.Option(1.5, "--noise", min=0, max=30, help="Sensor noise, sigma in 8-bit levels."),
    brightness: float = typer.Option(1.0, "--brightness", min=0.05, max=3, help="Light level (1 = normal)."),
    white_balance: Optional[str] = typer.Option(None, "--white-balance", help="R,G,B gains, e.g. 1.15,1,0.75 for warm light."),
    jpeg_quality: int = typer.Option(92, "--jpeg-quality", min=30, max=100),
    vary: bool = typer.Option(False, "--vary", help="Random light, white balance, noise and lens per scene."),
    touching: bool = typer.Option(False, "--touching", help="Put two touching tokens in every scene."),
    unknown: bool = typer.Option(False, "--unknown", help="Put one token of an unknown colour in every scene."),
    fmt: str = typer.Option("jpg", "--format", help="jpg or png."),
):
    """Render synthetic overhead photos of a cell, each with a .truth.yaml of where everything is."""
    import numpy as np

    from planning.config import load_cell, read_yaml
    from planning.errors import GripsightError
    from vision.photoset import UNKNOWN_LAB, _varied_conditions, write_photo, write_sample_set
    from vision.render import render_scene
    from vision.scene import CameraSpec, LightingSpec, Scene, SensorSpec, make_camera, random_scene

    if fmt not in ("jpg", "png"):
        raise GripsightError(f"--format: expected jpg or png, got '{fmt}'")
    cfg = load_cell(cell)
    if sample_set:
        total = 53
        with _progress() as bar:
            task = bar.add_task("rendering the sample set", total=total)
            paths = write_sample_set(cfg, out, seed=seed, progress=lambda p: bar.advance(task))
        typer.echo(f"wrote {len(paths)} photos with truth files under {out}")
        return
    if scene is not None:
        from pydantic import ValidationError

        from planning.config import _pydantic_problems
        from planning.errors import CellFileError

        data, _ = read_yaml(scene, "scene file")
        if isinstance(data, dict) and data.get("gripsight") == "render-truth":
            data = data.get("scene")          # a truth file: render its photo again
        try:
            sc = Scene.model_validate(data or {})
        except ValidationError as exc:
            raise CellFileError(str(scene), _pydantic_problems(exc)) from None
        try:
            rendered = render_scene(cfg, sc)
        except ValueError as exc:
            raise GripsightError(f"{scene}: {exc}") from None
        path = write_photo(out / f"{scene.stem}.{fmt}", rendered, sc.sensor.jpeg_quality)
        typer.echo(f"wrote {path} and {path.stem}.truth.yaml")
        return
    k = _floats(distortion, "--distortion", (1, 2)) or [0.0]
    wb = _floats(white_balance, "--white-balance", (3, 3)) or [1.0, 1.0, 1.0]
    rng = np.random.default_rng(seed)
    base = make_camera(CameraSpec(), cfg)
    with _progress() as bar:
        task = bar.add_task("rendering", total=scenes)
        for i in range(scenes):
            az = float(rng.uniform(0, 360))
            centre = base.centre_mm + camera_shift_mm * np.array([np.cos(np.radians(az)), np.sin(np.radians(az)), 0.0])
            cam = dict(centre_mm=centre.tolist(), focal_px=float(base.K[0, 0]), tilt_deg=camera_tilt_deg,
                       tilt_azimuth_deg=float(rng.uniform(0, 360)), k1=k[0], k2=k[1] if len(k) > 1 else 0.0)
            lighting = LightingSpec(brightness=brightness, white_balance=wb)
            sensor = SensorSpec(noise=noise, jpeg_quality=jpeg_quality)
            if vary:
                lighting, sensor, lens = _varied_conditions(rng)
                cam.update(lens)
            sc = random_scene(cfg, rng, touching=touching, unknown_lab=UNKNOWN_LAB if unknown else None,
                              camera=CameraSpec(**cam), lighting=lighting, sensor=sensor)
            write_photo(out / f"render_{seed}_{i:03d}.{fmt}", render_scene(cfg, sc), sc.sensor.jpeg_quality)
            bar.advance(task)
    typer.echo(f"wrote {scenes} photos with truth files under {out}")


# ------------------------------------------------------------------ markers, calibrate, check
@command()
def markers(
    cell: Path = typer.Argument(..., help="The cell file."),
    out: Path = typer.Option(Path("markers.pdf"), "--out", "-o", help="sheet.pdf (all pages) or sheet.png (one file per page)."),
    paper: str = typer.Option("a4", "--paper", help="a4 or letter."),
    dpi: int = typer.Option(300, "--dpi", min=72, max=1200, help="Resolution of PNG pages."),
):
    """Write a printable sheet of the layout's markers at true size, with a 100 mm scale bar."""
    from planning.config import load_cell
    from planning.errors import GripsightError
    from vision.sheet import PAPER_MM, write_marker_sheet

    if paper not in PAPER_MM:
        raise GripsightError(f"--paper: expected a4 or letter, got '{paper}'")
    if out.suffix.lower() not in (".pdf", ".png"):
        raise GripsightError(f"--out: give a .pdf or .png file name, got '{out}'")
    cfg = load_cell(cell)
    paths = write_marker_sheet(cfg, out, paper, dpi)
    typer.echo(f"wrote {', '.join(map(str, paths))}: {len(cfg.markers.layout)} markers, "
               f"{cfg.markers.size_mm:g} mm; print at 100 % and check the 100 mm scale bar")


def _lens_for(cfg):
    if cfg.camera.lens != "file":
        return None
    from vision.lens import load_opencv_lens

    path = Path(cfg.camera.lens_file)
    if not path.is_absolute() and cfg.source_path:
        path = Path(cfg.source_path).parent / path
    return load_opencv_lens(path)


def _default_calibration(cell_path: Path) -> Path:
    return cell_path.parent / "calibration.yaml"


@command()
def calibrate(
    photo: Path = typer.Argument(..., help="A photo of the table with the markers in view."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml beside the photo or in its parent)."),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Calibration file (default: calibration.yaml beside the cell file)."),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Overlay PNG (default: <calibration>_overlay.png)."),
    as_json: bool = typer.Option(False, "--json", help="Print the calibration record as JSON and nothing else."),
):
    """Fit the camera-to-table mapping (and lens, camera centre) from the markers in one photo."""
    import json

    import cv2

    from planning.config import load_cell
    from planning.fileio import write_bytes_atomic
    from vision.calfile import calibration_record, write_calibration
    from vision.calibration import calibrate as fit
    from vision.markers import detect_markers
    from vision.overlay import calibration_overlay
    from vision.photo import read_photo

    cell_path = _find_cell(cell, photo)
    cfg = load_cell(cell_path)
    image = read_photo(photo)
    detections = detect_markers(image, cfg.markers.dictionary)
    cal = fit(detections, cfg, (image.shape[1], image.shape[0]), str(photo), lens=_lens_for(cfg))
    out = out or _default_calibration(cell_path)
    moved = write_calibration(out, cal, cfg, photo)
    overlay = overlay or out.with_name(out.stem + "_overlay.png")
    ok, buf = cv2.imencode(".png", calibration_overlay(image, cal, cfg))
    write_bytes_atomic(overlay, buf.tobytes())
    if as_json:
        typer.echo(json.dumps(calibration_record(cal, cfg, photo), indent=2))
        return
    _print_calibration(cal, out, overlay, moved)


def _print_calibration(cal, out, overlay, moved) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    table = Table(title="markers", title_justify="left")
    for col in ("id", "residual mm", "residual px", "status"):
        table.add_column(col, justify="right" if col != "status" else "left")
    for m in sorted(cal.markers, key=lambda m: m.id):
        status = "used" if m.used else m.reason
        mm = "" if m.residual_mm is None else f"{m.residual_mm:.3f}"
        px = "" if m.residual_px is None else f"{m.residual_px:.2f}"
        table.add_row(str(m.id), mm, px, status)
    console.print(table)
    for note in cal.notes:
        console.print(f"note: {note}")
    c = cal.camera_centre_mm
    console.print(f"camera centre ({c[0]:.1f}, {c[1]:.1f}, {c[2]:.1f}) mm from {cal.centre_source.replace('_', ' ')}")
    console.print(f"verdict: {cal.verdict}: RMS {cal.rms_mm:.3f} mm ({cal.rms_px:.2f} px), max {cal.max_mm:.3f} mm "
                  f"over {len(cal.used)} markers")
    moved_markers = [m for m in cal.markers if m.reason.startswith("moved")]
    for m in moved_markers:
        console.print(f"warning: marker {m.id} seems to have moved on the table and was left out; put it back "
                      "where the cell file says, or update its position")
    if moved is not None:
        console.print(f"the previous calibration was moved to {moved}")
    console.print(f"wrote {out} and {overlay}")


@command()
def check(
    photo: Path = typer.Argument(..., help="A new photo from the calibrated camera."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml beside the photo or in its parent)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell)."),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Write an overlay PNG of old and new work area."),
    as_json: bool = typer.Option(False, "--json", help="Print the drift report as JSON and nothing else."),
):
    """Has the camera moved since calibration? Exit 0 if ok, 3 if moved."""
    import json

    from planning.config import load_cell
    from vision.calfile import read_calibration
    from vision.drift import check_drift
    from vision.markers import detect_markers
    from vision.photo import read_photo

    cell_path = _find_cell(cell, photo)
    cfg = load_cell(cell_path)
    stored = read_calibration(calibration or _default_calibration(cell_path))
    image = read_photo(photo)
    report = check_drift(stored, detect_markers(image, cfg.markers.dictionary), cfg,
                         (image.shape[1], image.shape[0]), str(photo))
    if overlay is not None:
        import cv2

        from planning.fileio import write_bytes_atomic
        from vision.overlay import drift_overlay

        write_bytes_atomic(overlay, cv2.imencode(".png", drift_overlay(image, report, stored, cfg))[1].tobytes())
    if as_json:
        typer.echo(json.dumps(dict(report.as_dict(), photo=str(photo), calibration=stored.path), indent=2))
    else:
        _print_drift(report, photo, cell_path)
    if report.verdict == "moved":
        raise typer.Exit(3)


def _print_drift(report, photo, cell_path) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    table = Table(title="marker shifts", title_justify="left")
    for col in ("id", "shift px", "shift mm"):
        table.add_column(col, justify="right")
    for m in report.markers:
        table.add_row(str(m.id), f"{m.shift_px:.2f}", f"{m.shift_mm:.2f}")
    console.print(table)
    for note in report.notes:
        console.print(f"note: {note}")
    if report.grid_max_mm is not None:
        console.print(f"work-area mapping moved by max {report.grid_max_mm:.2f} mm, mean {report.grid_mean_mm:.2f} mm "
                      f"(tolerance {report.tolerance_mm:g} mm)")
    console.print(f"verdict: {report.verdict}")
    if report.verdict == "moved":
        console.print(f"recalibrate with: gripsight calibrate {photo} --cell {cell_path}")


# ------------------------------------------------------------------ run and batch
@command()
def run(
    folder: Path = typer.Argument(..., help="Folder of photos, taken in name order by the cell."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml in the folder or its parent)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell)."),
    out: Path = typer.Option(Path("out/run"), "--out", "-o", help="Folder for run.csv and one folder per photo."),
    resume: bool = typer.Option(False, "--resume", help="Continue an interrupted or stopped run in --out."),
    emptied: list[str] = typer.Option([], "--emptied", help="With --resume: this bin was emptied (repeatable)."),
    order: str = typer.Option("nearest", "--order", help="nearest or detected."),
):
    """The sorting cell: plan photo after photo, the arm carried from one to the next; one run.csv."""
    from rich.console import Console
    from rich.table import Table

    from planning.cell import load_or_make_calibration
    from planning.config import load_cell
    from planning.run import photos_in, run_folder

    cfg = load_cell(_find_cell(cell, folder))
    stored = load_or_make_calibration(cfg, calibration)
    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    total = len(photos_in(folder))

    def report(photo, summary):
        picked = sum(summary["picked"].values())
        rejected = ", ".join(f"{k} {v}" for k, v in summary["rejected"].items()) or "none"
        line = f"[{len(result_rows) + 1}/{total}] {photo.name}: "
        line += (f"{picked} picked, rejected: {rejected}" if summary["status"] == "planned"
                 else f"{summary['status']}: {summary['message']}")
        if summary["registration"] == "refit":
            line += f" (camera moved: {summary['message']})"
        result_rows.append(summary)
        console.print(line)

    result_rows: list = []
    from planning.fileio import output_dir
    from planning.lock import output_lock

    with output_lock(output_dir(out), "run"):
        result = run_folder(folder, cfg, stored, out, resume=resume, emptied=tuple(emptied), order=order,
                            progress=report)
    table = Table(title=f"run of {folder}", title_justify="left")
    for col in ("photos", "picked", "by class", "rejected", "by reason", "cycle s"):
        table.add_column(col)
    table.add_row(str(len(result.photos)), str(sum(result.picked.values())),
                  ", ".join(f"{k} {v}" for k, v in sorted(result.picked.items())) or "-",
                  str(sum(result.rejected.values())),
                  ", ".join(f"{k} {v}" for k, v in sorted(result.rejected.items())) or "-", f"{result.cycle_s:.1f}")
    console.print(table)
    if result.interrupted:
        console.print(f"interrupted after {len(result.photos)} of {total} photos; every finished photo's outputs "
                      f"are complete; resume with: gripsight run {folder} --out {out} --resume")
        raise typer.Exit(130)
    if result.stopped:
        console.print(f"stopped: {result.stopped}")
        raise typer.Exit(4)
    console.print(f"wrote {out / 'run.csv'} and one folder per photo under {out}")


@command()
def batch(
    folder: Path = typer.Argument(..., help="Folder of photos to test, each on its own."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml in the folder or its parent)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell)."),
    out: Path = typer.Option(Path("out/batch"), "--out", "-o", help="Folder for batch.csv, batch.json, report.html."),
    workers: int = typer.Option(2, "--workers", "-w", min=1, max=64, help="Parallel worker processes."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", help="Dask scheduler address (tcp://host:port) instead of local workers."),
    resume: bool = typer.Option(False, "--resume", help="Keep the photos an interrupted batch in --out finished."),
):
    """Test a folder of photos: which parts would be picked, which rejected and why; report.html."""
    from planning.batch import run_batch, write_batch_tables
    from planning.config import load_cell
    from planning.run import photos_in

    from planning.fileio import output_dir
    from planning.lock import output_lock

    cell_path = _find_cell(cell, folder)
    cfg = load_cell(cell_path)
    n = len(photos_in(folder))
    with output_lock(output_dir(out), "batch"), _progress() as bar:
        task = bar.add_task("batch", total=n)
        rows = run_batch(folder, cell_path, calibration, out, workers=workers, scheduler=scheduler,
                         progress=lambda row: bar.advance(task), resume=resume)
        totals = write_batch_tables(out, rows, cfg)
    _print_batch(rows, totals, out)
    if totals["errors"]:
        raise typer.Exit(5)


def _print_batch(rows, totals, out) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    table = Table(title="batch", title_justify="left")
    for col in ("photo", "status", "found", "planned", "rejected", "cycle s"):
        table.add_column(col, justify="right" if col in ("found", "planned", "cycle s") else "left")
    for r in rows:
        status = r["status"] if not r["error"] else f"{r['status']}: {r['error']}"
        table.add_row(r["photo"], status, str(r["parts"]), str(r["planned"]),
                      ", ".join(f"{k} {v}" for k, v in sorted(r["rejected"].items())), f"{r['cycle_s']:.1f}")
    console.print(table)
    line = (f"{totals['photos']} photos: {totals['ok']} planned, {totals['refused']} refused, {totals['errors']} failed; "
            f"{totals['planned']} picks, rejected {sum(totals['rejected'].values())}")
    if "truth" in totals:
        t = totals["truth"]
        line += (f"; against truth: recall {t['recall']:.1%}, precision {t['precision']:.1%}, "
                 f"pick error {t['pick_error_rms_mm']:.2f} mm RMS ({t['pick_error_max_mm']:.2f} max)")
    console.print(line)
    console.print(f"wrote {out / 'batch.csv'}, {out / 'batch.json'}, {out / 'report.html'}")


# ------------------------------------------------------------------ detect
@command()
def detect(
    photo: Path = typer.Argument(..., help="A photo from the calibrated camera."),
    cell: Optional[Path] = typer.Option(None, "--cell", help="Cell file (default: cell.yaml beside the photo or in its parent)."),
    calibration: Optional[Path] = typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell)."),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Write a PNG with outlines, classes, pick points and reasons."),
    as_json: bool = typer.Option(False, "--json", help="Print the parts as JSON and nothing else."),
    sample: Optional[str] = typer.Option(None, "--sample", help="U,V: print the white-balanced CIELAB colour around that pixel."),
):
    """Find the parts in a photo: class, table position (mm, parallax corrected), size, status."""
    import json

    from planning.cell import analyse_photo, load_or_make_calibration
    from planning.config import load_cell
    from planning.errors import GripsightError

    cfg = load_cell(_find_cell(cell, photo))
    if sample is not None:
        _sample_colour(photo, cfg, sample)
        return
    stored = load_or_make_calibration(cfg, calibration)
    result = analyse_photo(photo, cfg, stored)
    if result.refused:
        raise GripsightError(result.registration.message)
    det = result.detection
    if overlay is not None:
        import cv2

        from planning.fileio import write_bytes_atomic
        from vision.overlay import detection_overlay

        image = detection_overlay(result.image, det, result.registration.mapping,
                                  result.registration.camera_centre_mm, cfg)
        write_bytes_atomic(overlay, cv2.imencode(".png", image)[1].tobytes())
    data = {"gripsight": "detect", "photo": str(photo), "registration": result.registration.action,
            "registration_note": result.registration.message,
            "drift": None if result.registration.drift is None else result.registration.drift.as_dict(),
            "white_balance": None if det.illumination is None else det.illumination.as_dict(),
            "parts": [p.as_dict() for p in det.parts], "notes": det.notes}
    if as_json:
        typer.echo(json.dumps(data, indent=2))
        return
    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    if result.registration.message:
        console.print(f"note: {result.registration.message}")
    table = Table(title=f"{photo}: parts", title_justify="left")
    for col in ("id", "class", "x mm", "y mm", "yaw", "size mm", "ΔE", "status"):
        table.add_column(col, justify="right" if col not in ("id", "class", "status") else "left")
    for p in det.parts:
        status = p.status if p.status == "ok" else f"{p.status}: {p.reason}"
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

    from vision.colour import delta_e_2000
    from vision.markers import detect_markers
    from vision.photo import read_photo
    from vision.whitebalance import fit_illumination, lab_image

    uv = _floats(text, "--sample", (2, 2))
    image = read_photo(photo)
    u, v = int(round(uv[0])), int(round(uv[1]))
    h, w = image.shape[:2]
    if not (3 <= u < w - 3 and 3 <= v < h - 3):
        from planning.errors import GripsightError

        raise GripsightError(f"--sample: pixel ({u}, {v}) is outside the {w}x{h} photo (or too near its edge)")
    ill = fit_illumination(image, detect_markers(image, cfg.markers.dictionary), cfg)
    patch = lab_image(image[v - 3:v + 4, u - 3:u + 4], ill, (u - 3, v - 3)).reshape(-1, 3)
    lab = np.median(patch, axis=0)
    typer.echo(f"CIELAB at ({u}, {v}): [{lab[0]:.1f}, {lab[1]:.1f}, {lab[2]:.1f}]"
               + ("" if ill is not None else " (no marker paper seen: not white-balanced)"))
    for name, cls in sorted(cfg.parts.items(), key=lambda kv: float(delta_e_2000(lab, kv[1].lab))):
        d = float(delta_e_2000(lab, cls.lab))
        typer.echo(f"  {name}: dE2000 {d:.1f} (tolerance {cls.tolerance:g}){'  <- match' if d < cls.tolerance else ''}")


# ------------------------------------------------------------------ entry point
def main(argv: Optional[list[str]] = None) -> int:
    """Run the command line with ``argv`` (default: sys.argv) and return the exit code."""
    try:
        result = app(args=argv, prog_name="gripsight", standalone_mode=False)
    except typer.Exit as exc:
        return exc.exit_code
    except typer.Abort:
        _echo_err("interrupted")
        return 130
    except typer.exceptions.TyperException as exc:  # usage errors: bad option, missing argument
        show = getattr(exc, "show", None)
        _echo_err(f"error: {exc}") if show is None else show()
        return int(getattr(exc, "exit_code", 2))
    return result if isinstance(result, int) else 0


def entry() -> None:
    """The ``gripsight`` console script."""
    sys.exit(main())


if __name__ == "__main__":
    entry()
