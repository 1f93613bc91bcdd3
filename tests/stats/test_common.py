"""Shared helpers: distribution functions against scipy.stats, classes, grouping."""

from __future__ import annotations

import pytest

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
