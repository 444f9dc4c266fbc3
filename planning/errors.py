"""The planning library's typed errors: one base, each with a one-line message for the user.

The library never picks an exit code; the application layer (:mod:`gripsight.app.errors`) does.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["PlanningError", "Problem", "CellProblems", "ServoRangeError"]


class PlanningError(Exception):
    """An expected failure of the planning library, with a one-line message."""


@dataclass(frozen=True)
class Problem:
    """One thing wrong in an input (a cell, a parts list): where (a dotted key path or ``line N``) and what."""

    where: str
    message: str

    def __str__(self) -> str:
        text = f"{self.where}: {self.message}" if self.where else self.message
        return text.replace("\r", "\\r").replace("\n", "\\n")      # always one line


class CellProblems(PlanningError):
    """The cell's settings cannot be planned with (a bin or the home pose out of reach, ...).

    Carries every problem found, each with its key path in the cell file; ``source`` names the file.
    """

    def __init__(self, source: str, problems: list[Problem]):
        self.source = str(source)
        self.problems = list(problems)
        first = self.problems[0] if self.problems else Problem("", "invalid")
        more = f" (and {len(self.problems) - 1} more)" if len(self.problems) > 1 else ""
        super().__init__(f"{self.source}: {first}{more}")

    def lines(self) -> list[str]:
        """One line per problem, each prefixed with the file name."""
        return [f"{self.source}: {p}" for p in self.problems]


class ServoRangeError(PlanningError):
    """A joint angle maps to a servo pulse outside the servo's accepted range."""
