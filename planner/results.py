"""Unblinded results: one test result joined to its unit of the decoding key.

This type sits below both ``evaluate`` (which makes the rows) and ``render`` (which
prints them), so that neither has to import the other.
"""

from __future__ import annotations

from dataclasses import dataclass

__all__ = ["Unblinded"]


@dataclass(frozen=True, slots=True)
class Unblinded:
    """One unblinded result of one measurand; ``value`` is None when the test failed and no
    value was given. ``measurand`` is the measurand's id (``spec.SHORTHAND_ID`` for a study
    in the single-measurand form)."""

    material: str
    lab: str
    trial: int
    code: str
    value: float | None
    uncertainty: float | None
    flags: tuple[str, ...]
    measurand: str = "value"
