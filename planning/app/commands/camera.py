"""Commands about the camera: render (synthetic photos), calibrate, check."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from gripsight.app.commands.common import _find_cell, _floats, _progress, calibration_option, cell_option, command  # noqa: F401
from gripsight.app.errors import GripsightError
from gripsight.vision.errors import CalibrationError


@command()
def render(
    cell: Path = typer.Argument(..., help="The cell file (markers, work area and part classes are used)."),
    out: Path = typer.Option(Path("renders"), "--out", "-o", help="Folder for the photos and their .truth.yaml files."),
    scene: Optional[Path] = typer.Option(None, "--scene", help="Render one given scene (YAML), or again from a .truth.yaml."),
    scenes: int = typer.Option(1, "--scenes", min=1, max=10000, help="How many random scenes."),
    seed: int = typer.Option(0, "--seed", min=0, help="Seed: the same seed gives the same photos."),
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
    hard: bool = typer.Option(False, "--hard", help="Unkind scenes: spot light with hard shadows, warm dim light from one side, wood grain or a busy table, orange/purple/white-card distractors, a token next to a marker, a class colour in the other shape."),
    surface: Optional[str] = typer.Option(None, "--surface", help="Table: plywood, wood_grain, cutting_mat, printed_text or checker_cloth."),
    fmt: str = typer.Option("jpg", "--format", help="jpg or png."),
):
    """Render synthetic overhead photos of a cell, each with a .truth.yaml of where everything is."""
    from pydantic import ValidationError

    from gripsight.app.cellfile import load_cell, read_yaml
    from gripsight.app.errors import GripsightError, UsageError
    from gripsight.app.photoset import write_photo, write_sample_set
    from gripsight.vision.synth.render import render_scene
    from gripsight.vision.synth.scene import Scene
    from gripsight.vision.synth.surfaces import Surface

    if fmt not in ("jpg", "png"):
        raise UsageError(f"--format: expected jpg or png, got '{fmt}'")
    if surface is not None and surface not in {s.value for s in Surface}:
        raise UsageError(f"--surface: expected one of {', '.join(s.value for s in Surface)}, got '{surface}'")
    cfg = load_cell(cell)
    if sample_set:
        total = 53
        with _progress() as bar:
            task = bar.add_task("rendering the sample set", total=total)
            paths = write_sample_set(cfg, out, seed=seed, progress=lambda p: bar.advance(task))
        typer.echo(f"wrote {len(paths)} photos with truth files under {out}")
        return
    if scene is not None:
        from gripsight.app.cellfile import _pydantic_problems
        from gripsight.app.errors import CellFileError

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
    try:
        _render_random(cfg, out, scenes, seed, camera_shift_mm, camera_tilt_deg, distortion, noise, brightness,
                       white_balance, jpeg_quality, vary, touching, unknown, hard, surface, fmt)
    except ValidationError as exc:      # an option the scene refuses: named, as typer names its own
        raise UsageError(_option_problem(exc)) from None
    typer.echo(f"wrote {scenes} photos with truth files under {out}")


#: the render option behind each field of a scene's camera and lighting
_RENDER_OPTIONS = {"centre_mm": "--camera-shift-mm", "k1": "--distortion", "k2": "--distortion",
                   "white_balance": "--white-balance", "brightness": "--brightness", "noise": "--noise",
                   "tilt_deg": "--camera-tilt-deg"}


def _option_problem(exc) -> str:
    item = exc.errors(include_url=False)[0]
    field = next((str(k) for k in item["loc"] if str(k) in _RENDER_OPTIONS), None)
    option = _RENDER_OPTIONS.get(field, "render options")
    return f"{option}: out of range ({item['msg'][0].lower()}{item['msg'][1:]})"


def _render_random(cfg, out, scenes, seed, camera_shift_mm, camera_tilt_deg, distortion, noise, brightness,
                   white_balance, jpeg_quality, vary, touching, unknown, hard, surface, fmt) -> None:
    import numpy as np

    from gripsight.app.photoset import UNKNOWN_LAB, _varied_conditions, write_photo
    from gripsight.vision.synth.hard import add_hard_parts, hard_conditions
    from gripsight.vision.synth.render import render_scene
    from gripsight.vision.synth.scene import CameraSpec, LightingSpec, SensorSpec, make_camera, random_scene
    from gripsight.vision.synth.surfaces import Surface

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
            table = Surface(surface) if surface else Surface.PLYWOOD
            if hard:
                conditions = hard_conditions(rng, Surface(surface) if surface else None, cfg)
                lighting, sensor, table = conditions["lighting"], conditions["sensor"], conditions["surface"]
                # a camera mounted by hand (its place, tilt and principal point); the lens stays as asked
                cam.update(conditions["camera"].model_dump(
                    include={"centre_mm", "tilt_deg", "tilt_azimuth_deg", "principal_offset_px"}), focal_px=None)
            sc = random_scene(cfg, rng, touching=touching, unknown_lab=UNKNOWN_LAB if unknown else None,
                              camera=CameraSpec(**cam), lighting=lighting, sensor=sensor, surface=table)
            if hard:
                sc = add_hard_parts(sc, cfg, rng)
            write_photo(out / f"render_{seed}_{i:03d}.{fmt}", render_scene(cfg, sc), sc.sensor.jpeg_quality)
            bar.advance(task)


def _lens_for(cfg, image_size=None):
    from gripsight.vision.settings import LensMode

    if cfg.camera.lens != LensMode.FILE:
        return None
    from gripsight.vision.lens import load_opencv_lens

    path = Path(cfg.camera.lens_file)
    if not path.is_absolute() and cfg.source_path:
        path = Path(cfg.source_path).parent / path
    return load_opencv_lens(path, image_size)


@command()
def calibrate(
    photo: Path = typer.Argument(..., help="A photo of the table with the markers in view."),
    cell: Optional[Path] = cell_option("beside the photo or in its parent"),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="Calibration file (default: calibration.yaml beside the cell file)."),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Overlay PNG (default: <calibration>_overlay.png)."),
    as_json: bool = typer.Option(False, "--json", help="Print the calibration record as JSON and nothing else."),
    force: bool = typer.Option(False, "--force", help="Write a poor calibration even over a good or fair one."),
):
    """Fit the camera-to-table mapping (and lens, camera centre) from the markers in one photo."""
    import cv2

    from gripsight.app.cellfile import load_cell
    from gripsight.app.fileio import strict_json, write_bytes_atomic
    from gripsight.app.calfile import calibration_record, default_calibration_path, write_calibration
    from gripsight.vision.overlay import calibration_overlay
    from gripsight.vision.photo import read_photo
    from gripsight.vision.tonecurve import calibrate_photo

    from gripsight.app.outpaths import check_output_paths

    cell_path = _find_cell(cell, photo)
    cfg = load_cell(cell_path)
    out = out or default_calibration_path(cfg)
    overlay = overlay or out.with_name(out.stem + "_overlay.png")
    check_output_paths(files={"--out": out, "--overlay": overlay}, inputs={"the photo": photo, "the cell file": cell_path})
    image = read_photo(photo)
    try:
        cal, _ = calibrate_photo(image, cfg, str(photo), lens=_lens_for(cfg, (image.shape[1], image.shape[0])))
    except CalibrationError as exc:
        raise CalibrationError(f"{exc} (wrong cell file, or a photo of another cell?)") from None
    previous = _previous(out)
    _keep_previous_centre(cal, previous, (image.shape[1], image.shape[0]))
    _refuse_poor(cal, out, previous, force, photo, cell_path)
    # the picture first: an overlay that cannot be written then leaves the previous calibration as it was
    ok, buf = cv2.imencode(".png", calibration_overlay(image, cal, cfg))
    write_bytes_atomic(overlay, buf.tobytes())
    moved = write_calibration(out, cal, cfg, photo)
    if as_json:
        typer.echo(strict_json(calibration_record(cal, cfg, photo)))
        return
    _print_calibration(cal, out, overlay, moved, layout_ids=sorted(cfg.markers.layout))


#: a calibration this far off (RMS mm) is not a bad photo of the right cell but markers that are not where
#: the cell file says: the wrong cell file, or a photo of another cell
WRONG_SETUP_RMS_MM = 5.0


def _previous(out: Path):
    """The calibration ``out`` would replace, if it is a readable one."""
    from gripsight.app.calfile import read_calibration

    if not out.is_file():
        return None
    try:
        return read_calibration(out)
    except GripsightError:
        return None


def _keep_previous_centre(cal, previous, image_size) -> None:
    """With the raised marker out of view the new centre would be a guess (nadir under the image centre);
    the previous calibration's measured centre, moved with the fitted change of the mapping, is better."""
    import numpy as np

    if (cal.centre_source != "assumed" or previous is None or previous.centre_source == "assumed"
            or tuple(previous.image_size) != tuple(image_size)):
        return
    old = np.asarray(previous.camera_centre_mm, float)
    # the table point under the old centre, seen in the old photo's pixels, and where the new mapping puts it
    uv = previous.mapping.inverse(old[None, :2])
    xy = cal.mapping(uv)[0]
    cal.camera_centre_mm = np.array([xy[0], xy[1], old[2]])
    cal.centre_source = previous.centre_source
    cal.notes[:] = [n for n in cal.notes if not n.startswith("camera centre assumed")]
    cal.notes.append(f"camera centre: the raised markers are not in view; kept the previous calibration's centre "
                     f"moved with the fitted change ({xy[0]:.1f}, {xy[1]:.1f}, {old[2]:.1f}) mm")


def _refuse_poor(cal, out: Path, previous, force: bool, photo, cell_path) -> None:
    if not cal.camera_centre_mm[2] > 0:
        raise CalibrationError(f"{photo}: the fitted camera centre is at z = {cal.camera_centre_mm[2]:.0f} mm, not above "
                               "the table: check the raised markers' heights (markers.layout.N.z) or camera.centre_mm")
    if cal.rms_mm > WRONG_SETUP_RMS_MM and not force:
        raise CalibrationError(f"{photo}: the markers do not fit the cell file's layout (RMS {cal.rms_mm:.1f} mm): "
                               f"wrong cell file ({cell_path}), or a photo of another cell? Nothing written; "
                               "--force writes it anyway")
    if cal.verdict == "poor" and previous is not None and previous.verdict != "poor" and not force:
        raise CalibrationError(f"{photo}: this calibration is poor (RMS {cal.rms_mm:.2f} mm, max {cal.max_mm:.2f} mm) "
                               f"and would replace the {previous.verdict} one in {out}; nothing written. Take a "
                               "sharper photo with every marker in view, or pass --force")


def _print_calibration(cal, out, overlay, moved, layout_ids=()) -> None:
    from gripsight.vision.calibration import MarkerRole

    from rich.console import Console
    from rich.table import Table

    console = Console(soft_wrap=True)  # long lines (commands to copy) stay whole
    table = Table(title="markers", title_justify="left")
    for col in ("id", "residual mm", "residual px", "status"):
        table.add_column(col, justify="right" if col != "status" else "left")
    rows = {m.id: ("" if m.residual_mm is None else f"{m.residual_mm:.3f}",
                   "" if m.residual_px is None else f"{m.residual_px:.2f}", "used" if m.used else m.reason)
            for m in cal.markers}
    for marker_id in layout_ids:
        rows.setdefault(marker_id, ("", "", "not seen: covered, out of view or badly lit"))
    for marker_id in sorted(rows):
        table.add_row(str(marker_id), *rows[marker_id])
    console.print(table)
    for note in cal.notes:
        console.print(f"note: {note}")
    c = cal.camera_centre_mm
    console.print(f"camera centre ({c[0]:.1f}, {c[1]:.1f}, {c[2]:.1f}) mm from {cal.centre_source.value.replace('_', ' ')}")
    console.print(f"verdict: {cal.verdict}: RMS {cal.rms_mm:.3f} mm ({cal.rms_px:.2f} px), max {cal.max_mm:.3f} mm "
                  f"over {len(cal.used)} markers")
    if cal.verdict == "poor":
        console.print("warning: this calibration is poor: part positions will be off; take a sharper photo with "
                      "every marker in view and calibrate again")
    for m in cal.markers:
        if m.role is MarkerRole.MOVED:
            console.print(f"warning: marker {m.id} seems to have moved on the table and was left out; put it back "
                          "where the cell file says, or update its position")
        elif m.role is MarkerRole.HIDDEN:
            console.print(f"warning: marker {m.id} is partly hidden and was left out ({m.reason}); clear what is in "
                          "front of it, or move it where the camera sees all of it")
    if moved is not None:
        console.print(f"the previous calibration was moved to {moved}")
    console.print(f"wrote {out} and {overlay}")


@command()
def check(
    photo: Path = typer.Argument(..., help="A new photo from the calibrated camera."),
    cell: Optional[Path] = cell_option("beside the photo or in its parent"),
    calibration: Optional[Path] = calibration_option(),
    overlay: Optional[Path] = typer.Option(None, "--overlay", help="Write an overlay PNG of old and new work area."),
    as_json: bool = typer.Option(False, "--json", help="Print the drift report as JSON and nothing else."),
):
    """Has the camera moved since calibration? Exit 0 if ok, 3 if moved."""
    from gripsight.app.cellfile import load_cell
    from gripsight.app.calfile import default_calibration_path, read_calibration
    from gripsight.app.fileio import strict_json
    from gripsight.vision.drift import DriftVerdict, check_drift
    from gripsight.vision.markers import detect_markers
    from gripsight.vision.photo import read_photo

    from gripsight.app.outpaths import check_output_paths

    cell_path = _find_cell(cell, photo)
    cfg = load_cell(cell_path)
    check_output_paths(files={"--overlay": overlay}, inputs={"the photo": photo, "the cell file": cell_path,
                                                              "the calibration file": calibration or default_calibration_path(cfg)})
    stored = read_calibration(calibration or default_calibration_path(cfg))
    from gripsight.app.pipeline import check_calibration_fits_cell, check_photo_fits_calibration

    check_calibration_fits_cell(stored, cfg)
    image = read_photo(photo)
    check_photo_fits_calibration(photo, image, stored)
    expected = stored.marker_corners_px if tuple(image.shape[1::-1]) == tuple(stored.image_size) else None
    detections = detect_markers(image, cfg.markers.dictionary, expected=expected, search_ids=cfg.markers.layout,
                                tone_power=stored.tone_power)
    if not detections:       # nothing to compare: not "moved", and not a photo to calibrate from
        raise CalibrationError(f"{photo}: no {cfg.markers.dictionary} markers seen, so the camera cannot be checked; "
                               "check the light and that the markers are in view")
    report = check_drift(stored, detections, cfg, (image.shape[1], image.shape[0]), str(photo))
    if overlay is not None:
        import cv2

        from gripsight.app.fileio import write_bytes_atomic
        from gripsight.vision.overlay import drift_overlay

        write_bytes_atomic(overlay, cv2.imencode(".png", drift_overlay(image, report, stored, cfg))[1].tobytes())
    if as_json:
        typer.echo(strict_json(dict(report.as_dict(), photo=str(photo), calibration=stored.path)))
    else:
        _print_drift(report, photo, cell_path)
    if report.verdict is DriftVerdict.MOVED:
        raise typer.Exit(3)


def _print_drift(report, photo, cell_path) -> None:
    from gripsight.vision.drift import DriftVerdict

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
    if report.verdict is DriftVerdict.MOVED:
        console.print(f"recalibrate with: gripsight calibrate {photo} --cell {cell_path}")
