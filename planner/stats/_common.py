"""Small pieces shared by the statistics modules: the skip marker, grouping, classes.

Nothing here imports numpy at module level, so ``planner.stats`` stays cheap to import.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Iterable
from dataclasses import dataclass
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import NDArray

__all__ = ["Skipped", "factorize", "classify_large", "classify_small", "majority"]


@dataclass(frozen=True, slots=True)
class Skipped:
    """A method that could not be applied to the data, with a one-line reason."""

    reason: str


def factorize(labels: Iterable[Hashable]) -> tuple[NDArray[np.intp], list[Hashable]]:
    """Return integer codes for the labels and the distinct labels in order of first appearance."""
    import numpy as np

    index: dict[Hashable, int] = {}
    codes = [index.setdefault(label, len(index)) for label in labels]
    return np.asarray(codes, dtype=np.intp), list(index)


def classify_large(statistic: float, critical_5: float | None,
                   critical_1: float | None) -> str | None:
    """Return 'correct', 'straggler' or 'outlier' for a test where large values are significant.

    ISO 5725-2 convention: at most the 5 % value -> correct; above the 5 % value and at
    most the 1 % value -> straggler; above the 1 % value -> outlier. None when the
    statistic or a critical value is not available.
    """
    if critical_5 is None or critical_1 is None or not math.isfinite(statistic):
        return None
    if statistic > critical_1:
        return "outlier"
    if statistic > critical_5:
        return "straggler"
    return "correct"


def classify_small(statistic: float, critical_5: float | None,
                   critical_1: float | None) -> str | None:
    """Return the class for a test where small values are significant (Grubbs double)."""
    if critical_5 is None or critical_1 is None or not math.isfinite(statistic):
        return None
    if statistic < critical_1:
        return "outlier"
    if statistic < critical_5:
        return "straggler"
    return "correct"


def majority(counts: Iterable[int]) -> int:
    """Return the count that occurs most often (the larger one on a tie)."""
    tally: dict[int, int] = {}
    for c in counts:
        tally[c] = tally.get(c, 0) + 1
    return max(tally, key=lambda c: (tally[c], c))
