"""Unblinded results, and a round's statistics as one measurand sees them.

``Unblinded`` is one test result joined to its unit of the decoding key. It sits
below both ``evaluate`` (which makes the rows) and ``render`` (which prints them),
so that neither has to import the other; so does ``measurand_view``, which the
report and the letters use to read statistics.json (format ``ringplan-statistics/3``)
one measurand at a time.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

__all__ = ["Unblinded", "measurand_view", "measurand_ids", "is_shorthand", "SHORTHAND_ID"]

SHORTHAND_ID = "value"
"""The measurand id of a study in the single-measurand form (``spec.SHORTHAND_ID``)."""


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


def measurand_ids(statistics: Mapping[str, Any]) -> list[str]:
    """Return the measurand ids of a round's statistics, in spec order."""
    return list(statistics["measurands"])


def is_shorthand(statistics: Mapping[str, Any]) -> bool:
    """Return whether the statistics are of a study in the single-measurand form: its one
    measurand has the id ``SHORTHAND_ID``, which a study with ``measurands:`` cannot use."""
    return measurand_ids(statistics) == [SHORTHAND_ID]


def measurand_view(statistics: Mapping[str, Any], measurand: str) -> dict[str, Any]:
    """Return the round's statistics as one measurand sees them: the round's facts with the
    measurand's blocks (materials, labs, scores, precision, gauge R&R, settings, drift) on
    top, ``measurand`` its name and ``measurand_id`` its id, and ``results`` counting only
    its results and listing only its missing ones.

    For a study of one measurand this is the layout statistics.json had up to format 2.
    """
    block = statistics["measurands"][measurand]
    view = {k: v for k, v in statistics.items() if k != "measurands"}
    view.update(block)
    view["measurand"] = block.get("name")
    view["measurand_id"] = measurand
    top = statistics.get("results") or {}
    view["results"] = {**top, **(block.get("results") or {}),
                       "missing": [d for d in top.get("missing", ())
                                   if d.get("measurand", SHORTHAND_ID) == measurand]}
    view.setdefault("materials", [])
    view.setdefault("labs", [])
    for key in ("scores", "precision", "anova"):
        view.setdefault(key, {})
    return view
