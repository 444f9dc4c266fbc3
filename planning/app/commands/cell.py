"""Commands that set a cell up: init, validate, reach, markers."""

from __future__ import annotations

from pathlib import Path

import typer

from gripsight.app.commands.common import _find_cell, _floats, _progress, command  # noqa: F401  (shared helpers)


# ------------------------------------------------------------------ init / validate
@command()
def init(
    path: Path = typer.Argument(Path("cell.yaml"), help="Where to write the starter cell file."),
    force: bool = typer.Option(False, "--force", help="Overwrite an existing file."),
):
    """Write a commented starter cell file to fill in with your cell's measurements."""
    from gripsight.app.cellfile import starter_cell_text
    from gripsight.app.errors import GripsightError
    from gripsight.app.fileio import write_text_atomic

    if path.is_dir():
        raise GripsightError(f"{path}: is a directory; give a file name such as {path / 'cell.yaml'}")
    if path.exists() and not force:
        raise GripsightError(f"{path}: already exists; pass --force to overwrite it or choose another name")
    write_text_atomic(path, starter_cell_text())
    typer.echo(f"wrote {path}: fill in the keys marked MEASURE, then run: gripsight validate {path}")


@command()
def validate(cell: Path = typer.Argument(..., help="The cell file to check.")):
    """Check a cell file; print a summary, or every problem with its key path (exit 2).

    The same check the planner makes (bins and home pose reachable, ...), so a cell that passes here is
    never refused by ``plan``, ``run`` or ``batch`` for the cell's sake.
    """
    from gripsight.app.cellfile import load_cell
    from gripsight.app.errors import CellFileError
    from gripsight.planning.arm import Arm
    from gripsight.planning.cellcheck import cell_problems
    from gripsight.planning.reach import lowest_grip_z_mm, radial_reach

    from gripsight.app.commands.camera import _lens_for

    cfg = load_cell(cell)
    arm = Arm.from_config(cfg.arm)
    problems = cell_problems(cfg, arm)
    if problems:
        raise CellFileError(str(cell), problems)
    _lens_for(cfg)          # camera.lens_file read as calibrate reads it: a missing or bad lens file is said here
    raised = sum(1 for m in cfg.markers.layout.values() if m.z > 0)
    grip = radial_reach(arm, lowest_grip_z_mm(cfg))
    link = cfg.arm.linkage.type + (f" ({arm.grashof()})" if cfg.arm.linkage.type == "four_bar" else "")
    typer.echo(
        f"ok: {cfg.cell}: {link} arm {cfg.arm.upper_arm_mm:g}+{cfg.arm.forearm_mm:g} mm, "
        f"{len(cfg.markers.layout)} markers ({raised} raised), {len(cfg.parts)} part classes, "
        f"{len(cfg.bins)} bins; reach at grip height {grip.describe()}")
    _say_shared_colours(cfg)
    _say_stands_in_front(cfg)


def _say_stands_in_front(cfg) -> None:
    """A warning for each table marker a raised marker's stand will hide from the camera (its image on
    the table covers the marker's square or quiet zone; :func:`gripsight.vision.markergeom.stands_in_front`),
    from the cell file alone: the camera at ``camera.centre_mm``, or ``camera.height_mm`` above the middle
    of the markers. With neither, nothing is assumed here (calibrate names such a marker from the photo)."""
    from gripsight.vision.markergeom import stands_in_front

    layout = cfg.markers.layout
    if not any(m.z > 0 for m in layout.values()):
        return
    if cfg.camera.centre_mm is not None:
        centre = list(cfg.camera.centre_mm)
        where = "camera.centre_mm"
    elif cfg.camera.height_mm is not None:
        xs, ys = [m.x for m in layout.values()], [m.y for m in layout.values()]
        centre = [0.5 * (min(xs) + max(xs)), 0.5 * (min(ys) + max(ys)), float(cfg.camera.height_mm)]
        where = f"a camera {cfg.camera.height_mm:g} mm (camera.height_mm) above the markers' middle"
    else:
        return
    for o in stands_in_front(layout, cfg.markers.size_mm, cfg.markers.margin_mm, centre):
        typer.echo(f"warning: markers.layout.{o.marker_id}: raised marker {o.stand_id}'s stand will stand in front of "
                   f"it as seen from {where} ({o.describe()}); calibration will set it aside if its corners are off: "
                   f"move one of them apart", err=True)


def _shape_words(cls) -> str:
    fp = "x".join(f"{v:g}" for v in cls.footprint_mm)
    return f"{cls.shape} {fp} mm, {cls.height_mm:g} mm high"


def _say_shared_colours(cfg) -> None:
    """The classes that share a colour (told apart by shape and size), and a warning for two of one colour
    whose shapes and sizes are too close to tell apart (:func:`gripsight.vision.shapes.shape_clashes`)."""
    from gripsight.vision.colour import delta_e_2000
    from gripsight.vision.shapes import SHAPE_TOO_CLOSE, colour_groups, shape_clashes

    import numpy as np

    groups = colour_groups(cfg.parts)
    for group in groups.values():
        if len(group.members) < 2:
            continue
        labs = np.array([cfg.parts[n].lab for n in group.members], float)
        apart = max(float(delta_e_2000(a, b)) for i, a in enumerate(labs) for b in labs[i + 1:])
        typer.echo(f"shared colour: {', '.join(group.members)} (CIEDE2000 up to {apart:.1f} apart, under half the "
                   f"tolerance): told apart by shape and size ("
                   + "; ".join(f"{n} {_shape_words(cfg.parts[n])}" for n in group.members) + ")")
    for a, b in shape_clashes(cfg.parts, groups):
        typer.echo(f"warning: parts.{a} and parts.{b}: one colour, and shapes and sizes too close to tell apart "
                   f"({_shape_words(cfg.parts[a])}; {_shape_words(cfg.parts[b])}: the same shape, footprints within "
                   f"{SHAPE_TOO_CLOSE:.0%}); a part of either may be sorted as the other: change a colour or a size",
                   err=True)


# ------------------------------------------------------------------ reach
@command()
def reach(
    cell: Path = typer.Argument(..., help="The cell file."),
    out: Path = typer.Option(Path("reach.png"), "--out", "-o", help="Where to write the picture (PNG)."),
    resolution_mm: float = typer.Option(2.0, "--resolution-mm", min=0.5, max=20.0, help="Grid step of the drawing."),
):
    """Draw the reachable region (top and side view) and flag bins or corners the arm cannot reach."""
    from gripsight.planning.arm import Arm
    from gripsight.app.cellfile import load_cell
    from gripsight.app.fileio import atomic_output
    from gripsight.planning.reach import lowest_grip_z_mm, radial_reach, unreachable_places
    from gripsight.app.reach_plot import draw_reach

    from gripsight.app.outpaths import check_output_paths, check_picture_name

    check_picture_name("--out", out)
    check_output_paths(files={"--out": out}, inputs={"the cell file": cell})
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


@command()
def markers(
    cell: Path = typer.Argument(..., help="The cell file."),
    out: Path = typer.Option(Path("markers.pdf"), "--out", "-o", help="sheet.pdf (all pages) or sheet.png (one file per page)."),
    paper: str = typer.Option("a4", "--paper", help="a4 or letter."),
    dpi: int = typer.Option(300, "--dpi", min=72, max=1200, help="Resolution of PNG pages."),
):
    """Write a printable sheet of the layout's markers at true size, with a 100 mm scale bar."""
    from gripsight.app.cellfile import load_cell
    from gripsight.app.errors import UsageError
    from gripsight.app.sheet import PAPER_MM, write_marker_sheet

    if paper not in PAPER_MM:
        raise UsageError(f"--paper: expected a4 or letter, got '{paper}'")
    if out.suffix.lower() not in (".pdf", ".png"):
        raise UsageError(f"--out: give a .pdf or .png file name, got '{out}'")
    cfg = load_cell(cell)
    paths = write_marker_sheet(cfg, out, paper, dpi)
    grip = cfg.markers.on_gripper
    extra = "" if grip is None else f" and gripper marker {grip.id} ({grip.size_mm:g} mm)"
    typer.echo(f"wrote {', '.join(map(str, paths))}: {len(cfg.markers.layout)} markers, "
               f"{cfg.markers.size_mm:g} mm{extra}; print at 100 % and check the 100 mm scale bar")
