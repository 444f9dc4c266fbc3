"""What every command shares: the typer ``app``, error handling, shared options and helpers.

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


def _print_version(value: bool) -> None:
    if value:
        from importlib.metadata import PackageNotFoundError, version

        try:
            typer.echo(f"gripsight {version('gripsight')}")
        except PackageNotFoundError:
            typer.echo("gripsight (not installed: version unknown)")
        raise typer.Exit(0)


@app.callback()
def _global(
    verbose: bool = typer.Option(False, "--verbose", "-v", help="Print the full trace on errors."),
    _version: bool = typer.Option(False, "--version", callback=_print_version, is_eager=True,
                                  help="Print the version and exit."),
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
        from gripsight.app.errors import EXPECTED_ERRORS, exit_code_for, message_lines

        try:
            return fn(*args, **kwargs)
        except EXPECTED_ERRORS as exc:
            for line in message_lines(exc):
                _echo_err(f"error: {line}")
            if _state["verbose"]:
                traceback.print_exc()
            raise typer.Exit(exit_code_for(exc)) from None
        except KeyboardInterrupt:
            _echo_err("interrupted")
            raise typer.Exit(130) from None
        except BrokenPipeError:                     # output piped into `head` and the like: stop quietly
            import os

            sys.stdout = open(os.devnull, "w")      # noqa: SIM115 - for the interpreter's final flush
            raise typer.Exit(0) from None
        except (typer.Exit, typer.Abort):
            raise
        except OSError as exc:
            if exc.filename is None or exc.errno is None:
                raise_internal(exc)
            from gripsight.app.fileio import cannot_write

            _echo_err(f"error: {cannot_write(exc.filename, exc)}")   # a file the system refused: said, not a bug
            if _state["verbose"]:
                traceback.print_exc()
            raise typer.Exit(1) from None
        except Exception as exc:  # noqa: BLE001 - the last line of defence: one line, never a bare trace
            raise_internal(exc)

    def raise_internal(exc):
        _echo_err(f"error: internal error ({type(exc).__name__}: {exc}); run with --verbose for the trace "
                  "and report it")
        if _state["verbose"]:
            traceback.print_exc()
        raise typer.Exit(1) from None

    return wrapper


def command(*args, **kwargs):
    """``app.command`` with :func:`_guarded` error handling."""
    return lambda fn: app.command(*args, **kwargs)(_guarded(fn))


# ------------------------------------------------------------------ options shared by the commands
def cell_option(where: str):
    """``--cell``, defaulting to cell.yaml ``where`` (e.g. 'beside the photo or in its parent')."""
    return typer.Option(None, "--cell", help=f"Cell file (default: cell.yaml {where}).")


def calibration_option():
    """``--calibration``, defaulting to calibration.yaml beside the cell."""
    return typer.Option(None, "--calibration", help="Calibration file (default: calibration.yaml beside the cell).")


# ------------------------------------------------------------------ helpers shared by the commands
def _find_cell(cell: Optional[Path], near: Path) -> Path:
    """--cell, or cell.yaml in the input's folder or its parent."""
    from gripsight.app.errors import GripsightError

    if cell is not None:
        return cell
    folder = near if near.is_dir() else near.parent
    for candidate in (folder / "cell.yaml", folder.parent / "cell.yaml"):
        if candidate.is_file():
            return candidate
    raise GripsightError(f"{near}: no cell.yaml beside it or in its parent folder; pass --cell CELL")


def _floats(text: Optional[str], name: str, count: tuple[int, int]) -> Optional[list[float]]:
    from gripsight.app.errors import UsageError

    if text is None:
        return None
    import math

    try:
        values = [float(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise UsageError(f"{name}: expected numbers separated by commas, got '{text}'") from None
    if not all(math.isfinite(v) for v in values):
        raise UsageError(f"{name}: expected finite numbers, got '{text}'")
    if not count[0] <= len(values) <= count[1]:
        raise UsageError(f"{name}: expected {count[0]}-{count[1]} numbers, got {len(values)}")
    return values


def _progress():
    from rich.progress import BarColumn, MofNCompleteColumn, Progress, TextColumn, TimeRemainingColumn

    return Progress(TextColumn("{task.description}"), BarColumn(), MofNCompleteColumn(), TimeRemainingColumn(),
                    transient=False)
