"""Errors a user can fix, each carrying where the problem is.

The tree::

    PlannerError            anything the user can fix; the CLI prints it and exits 2
      SpecError             study.yaml is not a valid study
      CodeError             a blind code is malformed or fails its check character
      SealError             the sealed key cannot be opened or does not match
      LedgerError           the ledger refuses an operation (re-planning, order of steps)
      IntakeError           a returned result form is not acceptable
      DataError             a data file for analysis is unusable

Messages start in lower case, say what was found and then what would be right.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = [
    "Where",
    "PlannerError",
    "SpecError",
    "CodeError",
    "SealError",
    "LedgerError",
    "IntakeError",
    "DataError",
]


@dataclass(frozen=True, slots=True)
class Where:
    """A place in a user's file: path, 1-based line, and a field path like ``labs[2].id``."""

    file: str | None = None
    line: int | None = None
    field: str | None = None

    def __str__(self) -> str:
        parts = []
        if self.file:
            parts.append(self.file if self.line is None else f"{self.file}:{self.line}")
        elif self.line is not None:
            parts.append(f"line {self.line}")
        if self.field:
            parts.append(self.field)
        return ": ".join(parts)


class PlannerError(Exception):
    """A mistake the user can fix; ``str()`` gives the one line the CLI prints."""

    def __init__(self, message: str, where: Where | None = None) -> None:
        super().__init__(message)
        self.message = message
        self.where = where or Where()

    def __str__(self) -> str:
        place = str(self.where)
        return f"{place}: {self.message}" if place else self.message


class SpecError(PlannerError):
    """The study spec is not valid; may carry several problems, one per line."""

    def __init__(self, message: str, where: Where | None = None,
                 problems: list[PlannerError] | None = None) -> None:
        super().__init__(message, where)
        self.problems = problems or [self]

    def __str__(self) -> str:
        if len(self.problems) > 1 or self.problems[0] is not self:
            return "\n".join(PlannerError.__str__(p) for p in self.problems)
        return PlannerError.__str__(self)


class CodeError(PlannerError):
    """A blind code is malformed or its check character is wrong."""


class SealError(PlannerError):
    """The key cannot be sealed, opened or matched to its fingerprint."""


class LedgerError(PlannerError):
    """The ledger refuses the step (already planned, printed, unsealed, ...)."""


class IntakeError(PlannerError):
    """A returned result form cannot be accepted."""


class DataError(PlannerError):
    """A data file given for analysis cannot be used."""
