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
    from numpy.typing import ArrayLike, NDArray

__all__ = ["Skipped", "Units", "to_units", "factorize", "classify_large", "classify_small",
           "majority", "t_isf", "f_isf", "f_sf"]


@dataclass(frozen=True, slots=True)
class Skipped:
    """A method that could not be applied to the data, with a one-line reason."""

    reason: str


@dataclass(frozen=True, slots=True)
class Units:
    """Results written as steps of their reporting resolution, counted from one of them.

    ``u`` holds (x - origin) / step. When ``exact`` is True every result was a whole
    number of steps, so ``u`` holds exact integers: sums of them are exact, means of
    equal decimal results are equal floats, and a shift of all results by a multiple
    of the step (or a scaling by a power of ten) leaves ``u`` bit for bit the same.
    When it is False (more digits than a float holds exactly), ``u`` is x - origin,
    the values centred on a data value, with step 1.
    """

    u: NDArray[np.float64]
    origin: float
    exact: bool
    decimals: int = 0  # step = 10**-decimals when exact
    origin_steps: float = 0.0  # origin / step, a whole number when exact

    @property
    def step(self) -> float:
        """Return the reporting step (1.0 when the values are not on a decimal grid)."""
        if not self.exact:
            return 1.0
        return 1.0 / 10.0 ** self.decimals if self.decimals > 0 else 10.0 ** -self.decimals

    def value(self, u: float) -> float:
        """Return the result value of a location ``u`` given in steps."""
        if not self.exact:
            return self.origin + u
        return self.scale(self.origin_steps + u)

    def scale(self, s: float) -> float:
        """Return a spread (an SD, a difference) given in steps in the results' unit."""
        if not self.exact:
            return s
        # Dividing by 10^d is correctly rounded; multiplying by 0.1 would not be.
        return s / 10.0 ** self.decimals if self.decimals > 0 else s * 10.0 ** -self.decimals

    def steps(self, v: float) -> float:
        """Return a spread given in the results' unit as steps (the inverse of ``scale``)."""
        if not self.exact:
            return v
        return v * 10.0 ** self.decimals if self.decimals > 0 else v / 10.0 ** -self.decimals

    def location(self, v: float) -> float:
        """Return a result value ``v`` as a location in steps (the inverse of ``value``).

        For a value from outside the data (a known assigned value), which need not lie on
        the results' grid: the steps it gives need not be whole.
        """
        if not self.exact:
            return v - self.origin
        return self.steps(v) - self.origin_steps

    @property
    def band_floor(self) -> float:
        """Return the smallest sigma_pt, in steps, a band can rest on: half a step (0 if unknown).

        Below it a difference of one reported digit is more than 2 sigma_pt, so the
        last digit a laboratory rounded to, not its measurement, would decide the band.
        """
        return 0.5 if self.exact else 0.0


_MAX_EXACT = 2.0 ** 52  # |x| / step below this: steps are whole numbers a float holds exactly


def to_units(values: ArrayLike) -> Units:
    """Return ``values`` as steps of their reporting resolution (see ``Units``).

    The step is the finest decimal digit any value shows in its shortest decimal form
    (``repr``): 12.3 and 12.35 give 0.01, 120 and 130 give 10. A trailing zero a
    laboratory typed (12.30) does not survive the float, so its step reads as 0.1.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    if x.size == 0:
        return Units(u=x.copy(), origin=0.0, exact=False)
    # The methods of one material (and a second consensus) read the same values: the
    # steps are worked out once. The arrays handed out are read-only, so a cached one
    # cannot be changed behind the next reader's back.
    memo = x.tobytes()
    got = _RECENT.get(memo)
    if got is None:
        got = _to_units(x)
        got.u.flags.writeable = False
        if len(_RECENT) >= _KEEP:
            del _RECENT[next(iter(_RECENT))]
        _RECENT[memo] = got
    return got


_RECENT: dict[bytes, Units] = {}
_KEEP = 16


def _to_units(x: NDArray[np.float64]) -> Units:
    from decimal import Decimal

    import numpy as np

    origin = float(np.sort(x)[(x.size - 1) // 2])
    found = _decimals(x)
    if found is not None:
        exponent = -found
    else:
        nonzero = [float(v) for v in np.unique(x) if v != 0.0]
        exponent = min((int(Decimal(repr(v)).normalize().as_tuple().exponent)
                        for v in nonzero), default=0)
    if -300 < exponent < 300:
        d = -exponent
        k, back, scale = _steps(x, d)
        if np.abs(k).max() < _MAX_EXACT and np.array_equal(back, x):
            k0 = float(np.rint(origin * scale) if d > 0 else np.rint(origin / scale))
            return Units(u=k - k0, origin=origin, exact=True, decimals=d, origin_steps=k0)
    return Units(u=x - origin, origin=origin, exact=False)


def _steps(x: NDArray[np.float64], d: int) -> tuple[NDArray[np.float64], NDArray[np.float64], float]:
    """Return (k, k as values, scale): ``x`` rounded to whole steps of 10^-d."""
    import numpy as np

    if d >= 0:
        scale = 10.0 ** d
        k = np.rint(x * scale)
        return k, k / scale, scale
    scale = 10.0 ** -d
    k = np.rint(x / scale)
    return k, k * scale, scale


_SAFE = 2.0 ** 50  # steps below this: x * 10^d lands within 0.25 of its whole number


def _decimals(x: NDArray[np.float64]) -> int | None:
    """Return the decimals d of the step ``to_units`` reads from ``repr``, found with whole
    arrays instead of one ``Decimal`` per value; None when this shortcut cannot tell.

    d passes when every value is k / 10^d for a whole k below ``_SAFE`` (k * 10^-d for
    d < 0): the decimal with d places then rounds to the value, so its shortest form
    (``repr``) has at most d places, and the smallest passing d is the one ``repr``
    gives. Below ``_SAFE``, x * 10^d is within 0.25 of k, so ``rint`` finds it, and 10^d
    is exact for |d| <= 22. Outside these bounds the caller reads ``repr`` value by value.
    """
    import numpy as np

    if not np.any(x):
        return 0

    def passes(d: int) -> bool:
        k, back, _ = _steps(x, d)
        return bool(np.abs(k).max() < _SAFE) and bool(np.array_equal(back, x))

    if passes(0):
        d = 0
        while d > -22 and passes(d - 1):
            d -= 1
        return d if d > -22 else None
    for d in range(1, 23):
        if passes(d):
            return d
    return None


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
