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

__all__ = ["Skipped", "factorize", "classify_large", "classify_small", "majority",
           "t_isf", "f_isf", "f_sf"]


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


# Distribution functions from scipy.special rather than scipy.stats: the same numbers
# (checked in tests/stats/test_common.py), but scipy.stats costs about 0.5 s to import.

def t_isf(q: float, df: float) -> float:
    """Return the upper q quantile of Student's t with df degrees of freedom."""
    from scipy import special

    return -float(special.stdtrit(df, q))


def f_isf(q: float, dfn: float, dfd: float) -> float:
    """Return the upper q quantile of F(dfn, dfd)."""
    from scipy import special

    # P(F > x) = I_y(dfd/2, dfn/2) with y = dfd/(dfd + dfn x); invert for y, then x.
    y = float(special.betaincinv(dfd / 2.0, dfn / 2.0, q))
    return dfd * (1.0 - y) / (dfn * y)


def f_sf(x: float, dfn: float, dfd: float) -> float:
    """Return P(F > x) for F(dfn, dfd)."""
    from scipy import special

    return float(special.fdtrc(dfn, dfd, x))
