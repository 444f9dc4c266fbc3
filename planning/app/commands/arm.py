"""Commands that measure the arm with the camera: arm-poses (stops to photograph), arm-fit (the fit)."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from gripsight.app.commands.common import calibration_option, command


@command("arm-poses")
def arm_poses(
    cell: Path = typer.Argument(..., help="The cell file (its markers.on_gripper names the gripper marker)."),
    out: Path = typer.Option(..., "--out", "-o", help="Folder for joints.csv (the sequence) and stops.csv."),
    stops: int = typer.Option(16, "--stops", min=8, max=60, help="How many stops to photograph."),
    hold_s: float = typer.Option(2.0, "--hold-s", min=0.5, max=60.0, help="How long the arm holds still at each stop."),
    speed_scale: float = typer.Option(1.0, "--speed-scale", min=0.01, max=1.0,
                                      help="Slow every move to this fraction of the cell's speeds (first runs: 0.25)."),
    fit_lengths: bool = typer.Option(False, "--with-lengths", help="Choose stops that also determine the link lengths."),
):
    """Write a checked joint sequence that holds the arm at stops spread over the work area and heights,
    for photos of the gripper marker (then: gripsight arm-fit)."""
    import numpy as np

    from gripsight.app.armcal import mount_of, stops_csv_text
    from gripsight.app.cellfile import load_cell
    from gripsight.app.export import joints_csv_text, utc_now
    from gripsight.app.fileio import output_dir, write_text_atomic
    from gripsight.planning.armfit import MarkerMount
    from gripsight.planning.armposes import plan_stops
    from gripsight.planning.picks import Planner

    cfg = load_cell(cell)
    mount = mount_of(cfg)
    if mount is None:
        typer.echo("note: the cell names no gripper marker (markers.on_gripper); stops chosen for a marker at the "
                   "tool point", err=True)
        mount = MarkerMount()
    planner = Planner(cfg, speed_scale=speed_scale)
    seq = plan_stops(planner, cfg.work_area, mount, stops, hold_s, fit_lengths=fit_lengths)
    folder = output_dir(out)
    created = utc_now()
    text = joints_csv_text(seq.plan, cfg, planner.arm, created)
    first, rest = text.split("\n", 1)
    text = (f"{first}\n# arm stops: {len(seq.stops)} holds of {hold_s:g} s for photos of the gripper marker "
            f"(list in stops.csv)\n{rest}")
    write_text_atomic(folder / "joints.csv", text)
    write_text_atomic(folder / "stops.csv", stops_csv_text(seq.stops, cfg, created, hold_s, speed_scale))
    tool = np.array([s.tool_mm for s in seq.stops])
    typer.echo(f"wrote {folder / 'joints.csv'} ({seq.plan.cycle_s:.1f} s) and {folder / 'stops.csv'}: "
               f"{len(seq.stops)} stops, tool z {tool[:, 2].min():.0f}-{tool[:, 2].max():.0f} mm, each held "
               f"{hold_s:g} s")
    for why in seq.dropped:
        typer.echo(f"note: a stop was left out: {why}")
    typer.echo("take one photo during each hold (name them by stop number, e.g. stop01.jpg), then: "
               f"gripsight arm-fit PHOTOS... --cell {cell} --stops {folder / 'stops.csv'}")


@command("arm-fit")
def arm_fit(
    photos: list[Path] = typer.Argument(..., help="One photo per stop, in order or named by stop number."),
    cell: Path = typer.Option(..., "--cell", help="The cell file the stops were made with."),
    stops_file: Optional[Path] = typer.Option(None, "--stops", help="stops.csv from arm-poses (default: beside the photos)."),
    calibration: Optional[Path] = calibration_option(),
    out: Optional[Path] = typer.Option(None, "--out", "-o", help="The new cell file (default: CELL-fitted-TIME.yaml; never overwritten)."),
    picture: Optional[Path] = typer.Option(None, "--picture", help="PNG of the tool-point error before and after (default: beside --out)."),
    fit_lengths: bool = typer.Option(False, "--with-lengths", help="Also fit the upper-arm and forearm lengths."),
    leave_out_missing: bool = typer.Option(False, "--leave-out-missing", help="Fit without the photos where the marker is not found."),
    keep_camera_centre: bool = typer.Option(False, "--keep-camera-centre",
                                            help="Take the calibration's camera centre as exact instead of refining it."),
):
    """Fit the servo maps (offset and gain per joint) and the base position from photos of the gripper
    marker at the stops; write a new cell file and a picture of the tool-point error before and after."""
    import numpy as np

    from gripsight.app import armcal
    from gripsight.app.cellfile import load_cell
    from gripsight.app.errors import GripsightError
    from gripsight.app.export import utc_now
    from gripsight.app.fileio import write_text_atomic
    from gripsight.app.pipeline import load_or_make_calibration
    from gripsight.planning.arm import Arm
    from gripsight.planning.armfit import fit_arm, grid_in_polygon, tool_errors_mm, tool_sigma_mm
    from gripsight.planning.reach import lowest_grip_z_mm
    from gripsight.vision.markers import detect_markers
    from gripsight.vision.photo import read_photo

    from gripsight.app.outpaths import check_picture_name

    check_picture_name("--picture", picture)
    cfg = load_cell(cell)
    mount = armcal.mount_of(cfg)
    if mount is None:
        raise GripsightError(f"{cell}: markers.on_gripper: the cell names no gripper marker; add one "
                             "(id, size_mm, offset_mm) and print it with: gripsight markers")
    created = utc_now()
    out = out or armcal.default_fitted_path(cell, created)
    if out.exists():
        raise GripsightError(f"{out}: already exists; a fitted cell is never written over, choose another --out")
    stops_path = stops_file or photos[0].parent / "stops.csv"
    pairs = armcal.match_photos(photos, armcal.read_stops(stops_path))
    stored = load_or_make_calibration(cfg, calibration, say=lambda t: typer.echo(f"note: {t}", err=True))
    arm = Arm.from_config(cfg.arm)
    obs = armcal.observations(pairs, cfg, stored, arm, read_photo, detect_markers)
    fit = fit_arm(arm, obs, mount, armcal.pixel_model(stored), fit_lengths=fit_lengths,
                  allow_missing=leave_out_missing, fit_camera_centre=not keep_camera_centre,
                  mapping_px=float(stored.data.residual.get("rms_px", 0.0)))
    text, notes = armcal.fitted_cell_text(cfg, fit, arm, fit.names, str(stored.path), created)
    write_text_atomic(out, text)

    grid = grid_in_polygon(cfg.work_area, 10.0, [lowest_grip_z_mm(cfg), cfg.motion.safe_z_mm])
    before = tool_errors_mm(arm, arm, fit.errors, grid)
    after = tool_sigma_mm(fit, arm, grid)
    ok = ~np.isnan(before) & ~np.isnan(after)
    picture = picture or out.with_suffix(".png")
    armcal.draw_tool_errors(picture, cfg, grid[ok], before[ok], after[ok])

    typer.echo(f"fitted from {len(fit.names)} photos: residual {fit.rms_px:.3f} px RMS")
    for p in fit.parameters:
        typer.echo(f"  {p.name:<20} {p.value:+9.3f} +- {p.sigma:.3f} {p.unit}")
    typer.echo("  (base_offset_deg holds the base servo's zero and the base's yaw against the markers together)")
    if fit.with_camera:
        c = fit.errors.camera_centre_mm
        typer.echo(f"  the camera centre, refined with the arm, is ({c[0]:.1f}, {c[1]:.1f}, {c[2]:.1f}) mm (the "
                   f"calibration had ({stored.camera_centre_mm[0]:.1f}, {stored.camera_centre_mm[1]:.1f}, "
                   f"{stored.camera_centre_mm[2]:.1f})); to use it for parts too, set camera.centre_mm in the cell")
    typer.echo("per photo, marker seen vs predicted (mm): before -> after")
    for name, b, a in zip(fit.names, fit.residual_before_mm, fit.residual_after_mm):
        typer.echo(f"  {name:<24} {b:8.2f} -> {a:6.2f}")
    typer.echo(f"tool-point error over the work area: before max {before[ok].max():.2f} mm, RMS "
               f"{np.sqrt(np.mean(before[ok] ** 2)):.2f} mm; after (predicted, 1 sigma) max {after[ok].max():.2f} mm, "
               f"RMS {np.sqrt(np.mean(after[ok] ** 2)):.2f} mm")
    for n in notes:
        typer.echo(f"note: limit narrowed to the servo's range: {n}")
    typer.echo(f"wrote {out} and {picture}; check it with: gripsight validate {out}")
