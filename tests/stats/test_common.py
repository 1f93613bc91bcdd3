"""Shared helpers: distribution functions against scipy.stats, classes, grouping."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from planner.stats import _common


@pytest.mark.parametrize("q", [0.5, 0.05, 0.005, 1e-4, 1e-7])
@pytest.mark.parametrize("df", [1, 2, 5, 17, 200, 10_000])
def test_t_quantile_matches_scipy_stats(q, df):
    from scipy import stats

    assert _common.t_isf(q, df) == pytest.approx(stats.t.isf(q, df), rel=1e-10)


@pytest.mark.parametrize("q", [0.5, 0.05, 0.01 / 8, 1e-6])
@pytest.mark.parametrize("dfn, dfd", [(1, 1), (1, 7), (2, 14), (4, 36), (8, 180), (499, 1000)])
def test_f_quantile_and_tail_match_scipy_stats(q, dfn, dfd):
    from scipy import stats

    x = _common.f_isf(q, dfn, dfd)
    assert x == pytest.approx(stats.f.isf(q, dfn, dfd), rel=1e-9)
    assert _common.f_sf(x, dfn, dfd) == pytest.approx(q, rel=1e-9)


def test_classes():
    assert _common.classify_large(1.0, 2.0, 3.0) == "correct"
    assert _common.classify_large(2.5, 2.0, 3.0) == "straggler"
    assert _common.classify_large(3.5, 2.0, 3.0) == "outlier"
    assert _common.classify_small(0.2, 0.1, 0.05) == "correct"
    assert _common.classify_small(0.07, 0.1, 0.05) == "straggler"
    assert _common.classify_small(0.01, 0.1, 0.05) == "outlier"
    assert _common.classify_large(1.0, None, None) is None


def test_factorize_and_majority():
    codes, labels = _common.factorize(["b", "a", "b", "c"])
    assert codes.tolist() == [0, 1, 0, 2] and labels == ["b", "a", "c"]
    assert _common.majority([2, 2, 3]) == 2 and _common.majority([2, 3]) == 3


def _units_by_repr(values):
    """to_units as its docstring defines it, value by value with Decimal (the reference for
    the whole-array shortcut ``_common._decimals``)."""
    from decimal import Decimal

    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    origin = float(np.sort(x)[(x.size - 1) // 2])
    exponent = min((int(Decimal(repr(float(v))).normalize().as_tuple().exponent)
                    for v in np.unique(x) if v != 0.0), default=0)
    if -300 < exponent < 300:
        d = -exponent
        scale = 10.0 ** abs(d)
        k = np.rint(x * scale) if d > 0 else np.rint(x / scale)
        back = k / scale if d > 0 else k * scale
        if np.abs(k).max() < 2.0 ** 52 and np.array_equal(back, x):
            k0 = float(np.rint(origin * scale) if d > 0 else np.rint(origin / scale))
            return (True, d, (k - k0).tolist(), k0)
    return (False, 0, (x - origin).tolist(), 0.0)


# Magnitudes as results have them (read_long_csv refuses beyond 1e-100 to 1e100).
@given(st.lists(st.one_of(
    st.floats(allow_nan=False, allow_infinity=False, min_value=-1e12, max_value=1e12)
    .filter(lambda v: v == 0 or abs(v) >= 1e-12),
    st.builds(lambda m, d: round(m, d), st.floats(-1e6, 1e6), st.integers(0, 9)),
    st.builds(lambda k, e: k * 10.0 ** e, st.integers(-999, 999), st.integers(-25, 25))),
    min_size=1, max_size=12))
def test_to_units_reads_the_step_as_repr_does_value_by_value(values):
    got = _common.to_units(values)
    exact, d, u, k0 = _units_by_repr(values)
    assert got.exact is exact
    if exact:
        assert (got.decimals, got.u.tolist(), got.origin_steps) == (d, u, k0)
    else:
        assert got.u.tolist() == u
