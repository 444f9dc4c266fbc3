"""Typed errors that the command line turns into one line on stderr and an exit code.

Every error the tool can print is listed in DEVELOPERS.md ("Error messages"); a test checks that the
message templates used in the code appear there.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["GripsightError", "CellFileError", "Problem", "ServoRangeError"]


class GripsightError(Exception):
    """An expected failure with a one-line message for the user.

    Attributes
    ----------
    exit_code : int
        The process exit code the command line uses for it.
    """

    exit_code = 1


@dataclass(frozen=True)
class Problem:
    """One thing wrong in an input file: where (a dotted key path or ``line N``) and what."""

    where: str
    message: str

    def __str__(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        return text.replace("\r", "\\r").replace("\n", "\\n")      # always one line


class CellFileError(GripsightError):
    """A cell file (or another YAML input: parts file, calibration) cannot be used.

    Carries every problem found, each with its key path or YAML line.
    """

    exit_code = 2

    def __init__(self, path: str, problems: list[Problem]):
        self.path = str(path)
        self.problems = list(problems)
        first = self.problems[0] if self.problems else Problem("", "invalid")
        more = f" (and {len(self.problems) - 1} more)" if len(self.problems) > 1 else ""
        super().__init__(f"{self.path}: {first}{more}")

    def lines(self) -> list[str]:
        """One line per problem, each prefixed with the file name."""
        return [f"{self.path}: {p}" for p in self.problems]


class ServoRangeError(GripsightError):
    """A joint angle maps to a servo pulse outside the servo's accepted range."""
