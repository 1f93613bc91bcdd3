"""ISO 13528: Algorithm A against the published 12-lab steps; assigned value and scores."""

from __future__ import annotations

import math

import numpy as np
import pytest

from planner.errors import DataError
from planner.stats import iso13528
from planner.stats._common import Skipped


@pytest.fixture(scope="module")
def twelve(read_table):
    return [float(r["value"]) for r in read_table("iso13528_algorithm_a_12labs.csv")]


def test_algorithm_a_reproduces_the_published_steps(twelve, read_table):
    # S. Subramanian, "The Algorithm A in Detail" (2025): start and iterations 1-2 as
    # printed (tests/data/iso13528_algorithm_a_12labs_steps.csv); delta and the clip limits
    # of iteration i come from the (x*, s*) of iteration i-1.
    est = iso13528.algorithm_a(twelve)
    hist = est.history
    x0 = float(np.median(twelve))
    got = {(0, "x_star"): hist[0][0], (0, "s_star"): hist[0][1],
           (0, "mad"): float(np.median(np.abs(np.asarray(twelve) - x0)))}
    for i in (1, 2, 3):
        xs, ss = hist[i - 1]
        got[(i, "delta")] = 1.5 * ss
        got[(i, "lower_limit")] = xs - 1.5 * ss
        got[(i, "upper_limit")] = xs + 1.5 * ss
        if i < 3:
            got[(i, "x_star")], got[(i, "s_star")] = hist[i]
    rows = read_table("iso13528_algorithm_a_12labs_steps.csv")
    for r in rows:
        key = (int(r["iteration"]), r["quantity"])
        assert got[key] == pytest.approx(float(r["value"]), abs=float(r["tolerance"])), key
    assert len(rows) == len(got)


def test_converged_values_are_a_fixed_point(twelve):
    # Definition of Algorithm A (ISO 13528 Annex C.3.1): one more winsorize-and-average step
    # from the converged (x*, s*) returns the same values.
    est = iso13528.algorithm_a(twelve)
    assert est.converged and est.start == "mad"
    x = np.asarray(twelve)
    w = np.clip(x, est.x - 1.5 * est.s, est.x + 1.5 * est.s)
    assert w.mean() == pytest.approx(est.x, rel=1e-12)
    assert 1.134 * w.std(ddof=1) == pytest.approx(est.s, rel=1e-12)


def test_without_clipping_at_convergence_it_is_the_mean_and_1_134_sd(twelve):
    # The claim (shared reference SOURCES.md §3) holds only if no value is clipped at the
    # converged limits: check that first, then the plain mean and 1.134 x SD.
    est = iso13528.algorithm_a(twelve)
    x = np.asarray(twelve)
    assert ((x > est.x - 1.5 * est.s) & (x < est.x + 1.5 * est.s)).all()
    assert est.x == pytest.approx(x.mean(), rel=1e-12)
    assert est.s == pytest.approx(1.134 * x.std(ddof=1), rel=1e-12)
    # The shared-reference researcher's own computation: 1.45333, 0.49615.
    assert (round(est.x, 5), round(est.s, 5)) == (1.45333, 0.49615)


def test_an_outlier_is_winsorized_and_the_fixed_point_holds():
    x = np.array([10.1, 9.9, 10.0, 10.2, 9.8, 10.05, 9.95, 14.0])
    est = iso13528.algorithm_a(x)
    assert est.x < x.mean() - 0.3  # the robust mean ignores most of the 14.0
    w = np.clip(x, est.x - 1.5 * est.s, est.x + 1.5 * est.s)
    assert w.max() < 14.0  # the outlier is clipped at convergence
    assert w.mean() == pytest.approx(est.x, rel=1e-11)
    assert 1.134 * w.std(ddof=1) == pytest.approx(est.s, rel=1e-11)


def test_zero_mad_falls_back_to_the_sample_sd_and_says_so():
    x = [5.0, 5.0, 5.0, 5.0, 5.0, 6.0, 7.0]
    est = iso13528.algorithm_a(x)
    assert est.start == "sd" and est.history[0] == (5.0, pytest.approx(np.std(x, ddof=1)))
    same = iso13528.algorithm_a([3.0, 3.0, 3.0])
    assert (same.x, same.s, same.iterations) == (3.0, 0.0, 0)
    res = iso13528.evaluate(x, list("abcdefg"))
    assert any("MAD was 0" in n for n in res.notes)


def test_consensus_uncertainty_and_z_prime_switch(twelve):
    # u(x_pt) = 1.25 s*/sqrt(p) (ISO 13528:2015 §7.7.3, from memory, METHODS.md §4); z' is
    # used when u(x_pt) > 0.3 sigma_pt (§9.2.1, from memory).
    labs = [f"L{i}" for i in range(12)]
    res = iso13528.evaluate(twelve, labs)
    est = iso13528.algorithm_a(twelve)
    assert res.assigned_value == est.x and res.robust_sd == est.s
    assert res.u_assigned_value == pytest.approx(1.25 * est.s / math.sqrt(12))
    assert res.sigma_pt == est.s and res.use_z_prime  # 0.361 s* > 0.3 s*
    lab = res.labs["L1"]
    assert lab["z"] == pytest.approx((0.74 - est.x) / est.s)
    assert lab["z_prime"] == pytest.approx(
        (0.74 - est.x) / math.sqrt(est.s ** 2 + res.u_assigned_value ** 2))
    wide = iso13528.evaluate(twelve, labs, sigma_pt=1.0)  # u = 0.179 <= 0.3
    assert not wide.use_z_prime and wide.labs["L1"]["z_prime"] is None
    assert wide.labs["L1"]["z"] == pytest.approx(0.74 - est.x)


def test_scores_and_bands_on_a_hand_example():
    # Reference lab R: x_pt = 10.0, U(x_pt) = 0.2 (u = 0.1); sigma_pt = 0.5.
    # z = (x - 10)/0.5; z' with u = 0.1 > 0.3 * 0.5? no (0.1 <= 0.15) -> z used;
    # En = (x - 10)/sqrt(U^2 + 0.2^2).  (Scores: NIST Dataplot ISO 13528 pages; bands
    # ISO/IEC 17043 B.4.1.1 from memory.)
    values = [10.0, 11.0, 11.25, 8.5, 10.3]
    labs = ["R", "A", "B", "C", "D"]
    unc = [0.2, 0.3, np.nan, 0.4, 0.1]
    res = iso13528.evaluate(values, labs, uncertainties=unc, sigma_pt=0.5,
                            assigned="reference", reference_lab="R")
    assert res.assigned_value == 10.0 and res.u_assigned_value == pytest.approx(0.1)
    assert not res.use_z_prime
    s = res.labs
    assert (s["A"]["z"], s["A"]["band"]) == (pytest.approx(2.0), "satisfactory")
    assert (s["B"]["z"], s["B"]["band"]) == (pytest.approx(2.5), "questionable")
    assert (s["C"]["z"], s["C"]["band"]) == (pytest.approx(-3.0), "unsatisfactory")
    assert s["A"]["En"] == pytest.approx(1.0 / math.sqrt(0.3 ** 2 + 0.2 ** 2))
    assert s["A"]["en_band"] == "unsatisfactory"  # 2.77 > 1
    assert s["D"]["En"] == pytest.approx(0.3 / math.sqrt(0.1 ** 2 + 0.2 ** 2))
    assert s["D"]["en_band"] == "unsatisfactory"  # 1.34
    assert s["B"]["En"] is None  # no U reported
    # The reference laboratory is not scored against its own result.
    assert s["R"]["reference"] is True
    assert (s["R"]["z"], s["R"]["En"], s["R"]["band"], s["R"]["en_band"]) == (None,) * 4


@pytest.mark.parametrize("score, band", [(2.0, "satisfactory"), (-2.0, "satisfactory"),
                                         (2.0001, "questionable"), (2.9999, "questionable"),
                                         (3.0, "unsatisfactory"), (-3.5, "unsatisfactory")])
def test_z_band_edges(score, band):
    # |z| <= 2 satisfactory, 2 < |z| < 3 questionable, |z| >= 3 unsatisfactory (17043).
    assert iso13528.band_z(score) == band


def test_en_band_edges():
    assert iso13528.band_en(1.0) == "satisfactory"
    assert iso13528.band_en(-1.0001) == "unsatisfactory"
    assert iso13528.band_en(None) is None


def test_reference_lab_without_uncertainty_uses_the_sd_of_its_mean():
    values = [10.0, 10.2, 10.4, 11.0, 9.0]
    labs = ["R", "R", "R", "A", "B"]
    res = iso13528.evaluate(values, labs, sigma_pt=1.0, assigned="reference", reference_lab="R")
    assert res.assigned_value == pytest.approx(10.2)
    assert res.u_assigned_value == pytest.approx(np.std([10.0, 10.2, 10.4], ddof=1) / math.sqrt(3))
    assert res.labs["A"]["z"] == pytest.approx(0.8)
    assert any("SD of the mean" in n for n in res.notes)


def test_excluded_labs_are_scored_but_not_in_the_consensus(twelve):
    labs = [f"L{i}" for i in range(12)]
    res = iso13528.evaluate(twelve, labs, exclude_labs=["L1"])  # 0.74
    est = iso13528.algorithm_a([v for v, lab in zip(twelve, labs) if lab != "L1"])
    assert res.assigned_value == pytest.approx(est.x) and res.p == 11
    assert "L1" in res.labs and "excluding L1" in res.method


def test_bad_arguments():
    with pytest.raises(DataError, match="'median' is unknown"):
        iso13528.evaluate([1.0, 2.0], ["a", "b"], assigned="median")
    res = iso13528.evaluate([1.0, 2.0], ["a", "b"], assigned="reference", reference_lab="z")
    assert isinstance(res, Skipped) and "'z'" in res.reason
    assert isinstance(iso13528.evaluate([1.0], ["a"]), Skipped)
