"""The application's errors and the one place that maps every expected error to an exit code.

The libraries raise their own typed errors (:class:`~gripsight.vision.errors.VisionError`,
:class:`~gripsight.planning.errors.PlanningError`); the app raises :class:`GripsightError` for what
only it sees (files, folders, options). :func:`exit_code_for` and :func:`message_lines` are what the
command line prints. Every message is listed in DEVELOPERS.md ("Error messages").
"""

from __future__ import annotations

from gripsight.planning.errors import CellProblems, PlanningError, Problem
from gripsight.vision.errors import VisionError

__all__ = ["GripsightError", "CellFileError", "Problem", "EXPECTED_ERRORS", "exit_code_for", "message_lines"]


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


#: every error a command expects and reports in one line (anything else is an internal error)
EXPECTED_ERRORS = (GripsightError, VisionError, PlanningError)


def exit_code_for(exc: BaseException) -> int:
    """The exit code for an expected error: 2 for a bad input file or cell, else the error's own (1)."""
    if isinstance(exc, CellProblems):                   # CellFileError included
        return 2
    return int(getattr(exc, "exit_code", 1))


def message_lines(exc: BaseException) -> list[str]:
    """The lines to print for an expected error (one per problem for a file with several)."""
    if isinstance(exc, CellProblems):
        return exc.lines()
    return [str(exc).replace("\r", "\\r").replace("\n", "\\n")]
