"""One-way analysis of variance of laboratories (groups) for one material.

The classical fixed-effects ANOVA table: between-group and within-group sums of
squares, degrees of freedom, mean squares, F and its p-value. The sums are taken
in steps of the data's decimal resolution counted from a data value (the data of
a ring trial often share many leading digits; see ``_common.to_units``) and added
with ``math.fsum``; with ``exact=True`` every value is read as
the decimal number its shortest ``repr`` shows and the table is computed in exact
rational arithmetic. Verified against the NIST StRD ANOVA datasets.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Sequence
from dataclasses import dataclass
from fractions import Fraction
from typing import TYPE_CHECKING

from planner.stats._common import f_sf, factorize, to_units

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import ArrayLike, NDArray

__all__ = ["SOURCE", "AnovaTable", "evaluate"]

SOURCE = ("one-way ANOVA, fixed-effects table (e.g. D. C. Montgomery, Design and Analysis "
          "of Experiments, ch. 3); numerics checked against NIST/ITL Statistical Reference "
          "Datasets, ANOVA: SiRstv, SmLs01-SmLs06 certified values")


@dataclass(frozen=True, slots=True)
class AnovaTable:
    """The one-way ANOVA table; ``f`` and ``p`` are NaN when there is no within-group df."""

    ss_between: float
    ss_within: float
    df_between: int
    df_within: int
    ms_between: float
    ms_within: float
    f: float
    p: float
    grand_mean: float
    n_groups: int
    n_total: int


def evaluate(values: ArrayLike, groups: Sequence[Hashable] | ArrayLike, *,
             exact: bool = False) -> AnovaTable:
    """Return the one-way ANOVA table of ``values`` grouped by ``groups``.

    Raises ValueError when the lengths differ, a value is not finite or fewer than two
    groups are given.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    codes, labels = factorize(np.asarray(groups).ravel().tolist())
    if x.size != codes.size:
        raise ValueError(f"{x.size} values but {codes.size} group labels")
    if not np.isfinite(x).all():
        raise ValueError("values must be finite numbers")
    k = len(labels)
    if k < 2:
        raise ValueError("one-way ANOVA needs at least two groups")
    df_b, df_w = k - 1, int(x.size) - k
    if exact:
        qb, qw, qmean = _sums_exact(x, codes, k)
        # Mean squares and F from the exact sums, rounded once at the end.
        ssb, ssw, mean = float(qb), float(qw), float(qmean)
        ms_b = float(qb / df_b)
        ms_w = float(qw / df_w) if df_w > 0 else math.nan
        f = float((qb / df_b) / (qw / df_w)) if df_w > 0 and qw != 0 else _f_degenerate(ssb, df_w)
    else:
        ssb, ssw, mean = _sums_float(x, codes, k)
        ms_b = ssb / df_b
        ms_w = ssw / df_w if df_w > 0 else math.nan
        f = ms_b / ms_w if df_w > 0 and ssw != 0.0 else _f_degenerate(ssb, df_w)
    return AnovaTable(ss_between=ssb, ss_within=ssw, df_between=df_b, df_within=df_w,
                      ms_between=ms_b, ms_within=ms_w, f=f, p=_p_value(f, df_b, df_w),
                      grand_mean=mean, n_groups=k, n_total=int(x.size))


def _sums_float(x: NDArray[np.float64], codes: NDArray[np.intp],
                k: int) -> tuple[float, float, float]:
    import numpy as np

    # In steps of the reporting resolution from a data value (``_common.to_units``):
    # whole steps add up exactly, and the constant leading digits cost no precision.
    units = to_units(x)
    d = units.u
    n = np.bincount(codes, minlength=k).astype(np.float64)
    m = np.bincount(codes, weights=d, minlength=k) / n
    e = d - m[codes]
    # Second pass: remove what is left of each group's residual sum (corrected two-pass).
    left = np.bincount(codes, weights=e, minlength=k)
    ssw = math.fsum((e * e).tolist()) - math.fsum((left * left / n).tolist())
    grand = math.fsum(d.tolist()) / x.size
    ssb = math.fsum((n * (m - grand) ** 2).tolist())
    return (units.scale(units.scale(ssb)), units.scale(units.scale(max(ssw, 0.0))),
            units.value(grand))


def _sums_exact(x: NDArray[np.float64], codes: NDArray[np.intp],
                k: int) -> tuple[Fraction, Fraction, Fraction]:
    # repr() gives the shortest decimal that reads back as the same float: the value
    # as it was typed in the data file (up to 15 significant digits).
    q = [Fraction(repr(float(v))) for v in x.tolist()]
    sums = [Fraction(0)] * k
    counts = [0] * k
    for g, v in zip(codes.tolist(), q):
        sums[g] += v
        counts[g] += 1
    means = [s / c for s, c in zip(sums, counts)]
    grand = sum(sums, Fraction(0)) / len(q)
    ssw = sum(((v - means[g]) ** 2 for g, v in zip(codes.tolist(), q)), Fraction(0))
    ssb = sum((c * (m - grand) ** 2 for c, m in zip(counts, means)), Fraction(0))
    return ssb, ssw, grand


def _f_degenerate(ssb: float, df_w: int) -> float:
    # No within-group df, or no within-group scatter at all: F is undefined or infinite.
    if df_w <= 0:
        return math.nan
    return math.inf if ssb > 0.0 else math.nan


def _p_value(f: float, df_b: int, df_w: int) -> float:
    if math.isnan(f):
        return math.nan
    if math.isinf(f):
        return 0.0
    return f_sf(f, df_b, df_w)
