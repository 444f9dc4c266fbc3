"""The ``gripsight`` command line: parse, load the cell, call the library, print.

The commands live in :mod:`gripsight.app.commands` and register on the one typer ``app`` of
:mod:`gripsight.app.commands.common`; this module adds them in ``--help`` order and is the entry point.
"""

from __future__ import annotations

import sys
from typing import Optional

import typer

from gripsight.app.commands import arm, camera, cell, jobs  # noqa: F401 - the commands register on `app`
from gripsight.app.commands.common import _echo_err, app

__all__ = ["app", "main", "entry"]


# ------------------------------------------------------------------ entry point
def main(argv: Optional[list[str]] = None) -> int:
    """Run the command line with ``argv`` (default: sys.argv) and return the exit code."""
    _escape_undecodable_names()
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


def _escape_undecodable_names() -> None:
    """A file name that is not UTF-8 reaches the terminal as lone surrogates, which a UTF-8 stdout refuses
    (strict, outside the C locale): printed as an escape (``\\udcff``), as the files write it
    (:func:`gripsight.app.fileio.utf8`), instead of an internal error after the work was done."""
    for stream in (sys.stdout, sys.stderr):
        try:
            stream.reconfigure(errors="backslashreplace")
        except (AttributeError, ValueError, OSError):      # not a text stream we may reconfigure: leave it
            pass


def entry() -> None:
    """The ``gripsight`` console script. After an interrupt (exit 130) it leaves at once: every output is
    already whole (atomic writes) and the workers are stopped, and the interpreter's teardown of the
    loaded modules (a second or more on a busy machine) would only delay the prompt, and a second Ctrl-C
    during it would print a trace."""
    code = main()
    if code == 130:
        import os

        if "multiprocessing.util" in sys.modules:       # release the pool's semaphores (no leak warnings)
            try:
                sys.modules["multiprocessing.util"]._exit_function()
            except Exception:  # noqa: BLE001 - leaving anyway
                pass
        for stream in (sys.stdout, sys.stderr):
            try:
                stream.flush()
            except (OSError, ValueError):
                pass
        os._exit(130)
    sys.exit(code)


if __name__ == "__main__":
    entry()
