"""The application's errors and the one place that maps every expected error to an exit code.

The libraries raise their own typed errors (:class:`~gripsight.vision.errors.VisionError`,
:class:`~gripsight.planning.errors.PlanningError`); the app raises :class:`GripsightError` for what
only it sees (files, folders, options). :func:`exit_code_for` and :func:`message_lines` are what the
command line prints. Every message is listed in DEVELOPERS.md ("Error messages").
"""

from __future__ import annotations

from gripsight.planning.errors import CellProblems, PlanningError, Problem
from gripsight.vision.errors import VisionError

__all__ = ["GripsightError", "CellFileError", "InputError", "UsageError", "Problem", "EXPECTED_ERRORS", "exit_code_for", "message_lines"]


class GripsightError(Exception):
    """An expected failure of the application (files, folders, options) with a one-line message.

    Attributes
    ----------
    exit_code : int
        The process exit code (see DEVELOPERS.md, "Exit codes").
    """

    exit_code = 1


class CellFileError(CellProblems):
    """A cell file (or another YAML input: parts file, calibration) cannot be used.

    The planner's :class:`~gripsight.planning.errors.CellProblems` for what only the app reads: every
    problem found, each with its key path or YAML line; ``path`` is the file.
    """

    exit_code = 2

    @property
    def path(self) -> str:
        return self.source


class InputError(GripsightError):
    """An input file (photo, state file, calibration) that exists but cannot be used: exit code 2, as for
    a bad cell file."""

    exit_code = 2


class UsageError(GripsightError):
    """A command given the wrong arguments or option values: exit code 2, as typer's own usage errors."""

    exit_code = 2


#: every error a command expects and reports in one line (anything else is an internal error)
EXPECTED_ERRORS = (GripsightError, VisionError, PlanningError)


def exit_code_for(exc: BaseException) -> int:
    """The exit code for an expected error (DEVELOPERS.md, "Exit codes"): 2 for an input file that is
    missing or unusable (cell, parts, calibration, photo, lens, state file), else the error's own (1)."""
    from gripsight.vision.errors import LensFileError, PhotoError

    if isinstance(exc, (CellProblems, PhotoError, LensFileError)):                   # CellFileError included
        return 2
    return int(getattr(exc, "exit_code", 1))


def message_lines(exc: BaseException) -> list[str]:
    """The lines to print for an expected error (one per problem for a file with several)."""
    if isinstance(exc, CellProblems):
        return exc.lines()
    return [str(exc).replace("\r", "\\r").replace("\n", "\\n")]
