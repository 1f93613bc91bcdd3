"""Gauge R&R: the AIAG MSA 4th ed. worked example, statsmodels for the ANOVA, edge cases."""

from __future__ import annotations

import math

import numpy as np
import pytest

from planner.stats import gauge_rr
from planner.stats._common import Skipped


@pytest.fixture(scope="module")
def published(read_table):
    rows = read_table("aiag_msa4_average_range_results.csv")
    return {(r["method"], r["quantity"]): (float(r["value"]), float(r["tolerance"]))
            for r in rows}


# --- average and range -------------------------------------------------------------

def test_average_and_range_reproduces_the_aiag_worked_example(aiag_cube, published):
    # AIAG MSA 4th ed. ch. III-B worked example; data and results FROM MEMORY (see the
    # headers of tests/data/aiag_msa4_average_range_*.csv). The manual rounds its
    # intermediates, hence the tolerances in the results file.
    res = gauge_rr.evaluate_range(aiag_cube)
    assert not isinstance(res, Skipped)
    got = {"r_bar_bar": res.r_bar_bar, "x_diff": res.x_diff, "r_p": res.r_p, "ev": res.ev,
           "av": res.av, "grr": res.grr, "pv": res.pv, "tv": res.tv, "pct_ev": res.pct_ev,
           "pct_av": res.pct_av, "pct_grr": res.pct_grr, "pct_pv": res.pct_pv,
           "ndc": res.ndc, "ucl_r": res.range_check["ucl"]}
    checked = 0
    for (method, quantity), (value, tol) in published.items():
        if method == "range":
            assert got[quantity] == pytest.approx(value, abs=tol), quantity
            checked += 1
    assert checked == len(got)


def test_range_check_flags_the_cells_above_d4_times_r_bar_bar(aiag_cube):
    # Hand check in plain Python: UCL_R = D4 * R-double-bar, D4 = 2.574 for 3 trials
    # (classical range-chart table; MSA, memory).
    res = gauge_rr.evaluate_range(aiag_cube, materials=range(1, 11), laboratories="ABC")
    ranges = {(i + 1, "ABC"[j]): max(c) - min(c)
              for i, part in enumerate(aiag_cube) for j, c in enumerate(part)}
    r_bar_bar = sum(ranges.values()) / len(ranges)
    ucl = 2.574 * r_bar_bar
    expected = sorted((str(p), a) for (p, a), r in ranges.items() if r > ucl)
    assert expected == [("4", "B")]  # 1.03 - 0.01 = 1.02 > 0.8795
    assert sorted((c["material"], c["laboratory"])
                  for c in res.range_check["flagged"]) == expected
    assert res.range_check["d4"] == 2.574


def test_constants_are_the_published_table_and_agree_with_d2_and_d3():
    # AIAG MSA 4th ed. constants as published (METHODS.md §1). Independent check: K1 = 1/d2
    # and K2/K3 = 1/sqrt(d2^2 + d3^2) from the distribution of the range of m normals,
    # integrated numerically here (grid trapezoid rule).
    from scipy import stats

    assert dict(gauge_rr.K1) == {2: 0.8862, 3: 0.5908}
    assert dict(gauge_rr.K2) == {2: 0.7071, 3: 0.5231}
    x = np.linspace(-8, 8, 1601)
    r = np.linspace(0, 12, 601)
    cdf, pdf = stats.norm.cdf(x), stats.norm.pdf(x)
    # P(R <= r) = m * integral pdf(x) (Phi(x + r) - Phi(x))^(m-1) dx
    inner = stats.norm.cdf(x[None, :] + r[:, None]) - cdf[None, :]
    for m in range(2, 11):
        d2 = np.trapezoid(1 - cdf ** m - (1 - cdf) ** m, x)
        p_le = m * np.trapezoid(pdf[None, :] * inner ** (m - 1), x, axis=1)
        e_r2 = np.trapezoid(2 * r * (1 - p_le), r)
        assert gauge_rr.K3[m] == pytest.approx(1 / math.sqrt(e_r2), abs=6e-5), m
        if m in gauge_rr.K1:
            assert gauge_rr.K1[m] == pytest.approx(1 / d2, abs=6e-5)
            assert gauge_rr.K2[m] == pytest.approx(1 / math.sqrt(e_r2), abs=6e-5)


@pytest.mark.parametrize("shape, word", [((10, 3, 4), "trials"), ((10, 4, 3), "laboratories"),
                                         ((11, 3, 3), "materials")], ids=["4-trials", "4-labs",
                                                                       "11-materials"])
def test_outside_the_constants_table_is_a_one_line_skip_pointing_to_anova(shape, word):
    y = np.random.default_rng(1).normal(size=shape)
    res = gauge_rr.evaluate_range(y)
    assert isinstance(res, Skipped)
    assert word in res.reason and "ANOVA" in res.reason and "\n" not in res.reason
    assert not isinstance(gauge_rr.evaluate_anova(y), Skipped)


def test_av_is_clamped_at_zero_when_appraisers_agree():
    # Identical appraiser means -> X_DIFF = 0 -> radicand negative -> AV = 0 (MSA, memory).
    base = np.random.default_rng(3).normal(size=(5, 1, 2))
    y = np.concatenate([base, base[:, :, ::-1]], axis=1)
    res = gauge_rr.evaluate_range(y)
    assert res.x_diff == pytest.approx(0.0, abs=1e-15) and res.av == 0.0
    assert res.grr == pytest.approx(res.ev)


def test_percent_of_tolerance_uses_six_sd_over_the_tolerance(aiag_cube):
    # %tolerance = 100 * 6 * GRR / (USL - LSL) (MSA convention, memory).
    res = gauge_rr.evaluate_range(aiag_cube, tolerance=4.0)
    assert res.pct_tolerance["grr"] == pytest.approx(100 * 6 * res.grr / 4.0)


# --- ANOVA method --------------------------------------------------------------------

def _frame(y):
    pd = pytest.importorskip("pandas")
    p, o, r = y.shape
    ip, io, _ = np.meshgrid(range(p), range(o), range(r), indexing="ij")
    return pd.DataFrame({"y": y.ravel(), "part": ip.ravel(), "op": io.ravel()})


def _anova_lm(y, formula):
    smf = pytest.importorskip("statsmodels.formula.api")
    sm = pytest.importorskip("statsmodels.api")
    return sm.stats.anova_lm(smf.ols(formula, _frame(y)).fit())


def test_full_model_table_matches_statsmodels(aiag_cube):
    # Independent library: statsmodels ols("y ~ C(part)*C(op)") + anova_lm. statsmodels
    # tests every term against the residual MS (fixed effects); the random-effects F of
    # materials and laboratories uses the material x laboratory MS, rebuilt here from
    # statsmodels' MS.
    y = np.asarray(aiag_cube)
    ref = _anova_lm(y, "y ~ C(part) * C(op)")
    res = gauge_rr.evaluate_anova(y, pool_alpha=1.0)  # never pool: keep the full model
    assert res.model == "full" and res.pooled_table is None
    t = res.table
    for ours, theirs in (("material", "C(part)"), ("laboratory", "C(op)"),
                         ("material_x_laboratory", "C(part):C(op)"),
                         ("repeatability", "Residual")):
        assert t[ours]["ss"] == pytest.approx(ref.loc[theirs, "sum_sq"], rel=1e-10)
        assert t[ours]["df"] == ref.loc[theirs, "df"]
        assert t[ours]["ms"] == pytest.approx(ref.loc[theirs, "mean_sq"], rel=1e-10)
    ms_inter = ref.loc["C(part):C(op)", "mean_sq"]
    mxl = t["material_x_laboratory"]
    assert mxl["f"] == pytest.approx(ref.loc["C(part):C(op)", "F"], rel=1e-10)
    assert mxl["p"] == pytest.approx(ref.loc["C(part):C(op)", "PR(>F)"], rel=1e-8)
    assert t["material"]["f"] == pytest.approx(ref.loc["C(part)", "mean_sq"] / ms_inter,
                                               rel=1e-10)
    assert t["laboratory"]["f"] == pytest.approx(ref.loc["C(op)", "mean_sq"] / ms_inter,
                                                 rel=1e-10)
    assert t["total"]["ss"] == pytest.approx(ref["sum_sq"].sum(), rel=1e-10)


def test_pooled_model_matches_the_additive_statsmodels_fit(aiag_cube):
    # Interaction p = 0.97 > 0.25: pooled (Bancroft "sometimes pooling", METHODS.md §2).
    # Independent library: statsmodels ols("y ~ C(part) + C(op)") for the pooled table.
    y = np.asarray(aiag_cube)
    ref = _anova_lm(y, "y ~ C(part) + C(op)")
    res = gauge_rr.evaluate_anova(y)
    assert res.model == "pooled"
    t = res.pooled_table
    for ours, theirs in (("material", "C(part)"), ("laboratory", "C(op)")):
        assert t[ours]["f"] == pytest.approx(ref.loc[theirs, "F"], rel=1e-10)
        assert t[ours]["p"] == pytest.approx(ref.loc[theirs, "PR(>F)"], rel=1e-7)
    ms_pool = ref.loc["Residual", "mean_sq"]
    assert t["repeatability"]["ms"] == pytest.approx(ms_pool, rel=1e-10)
    # Variance components of the additive model (METHODS.md §2) from statsmodels' MS.
    p, o, r = y.shape
    assert res.repeatability_sd == pytest.approx(math.sqrt(ms_pool), rel=1e-10)
    v_o = (ref.loc["C(op)", "mean_sq"] - ms_pool) / (p * r)
    v_p = (ref.loc["C(part)", "mean_sq"] - ms_pool) / (o * r)
    assert res.reproducibility_sd == pytest.approx(math.sqrt(v_o), rel=1e-10)
    assert res.material_sd == pytest.approx(math.sqrt(v_p), rel=1e-10)
    assert res.material_x_laboratory_sd == 0.0
    assert res.grr_sd == pytest.approx(math.sqrt(ms_pool + v_o), rel=1e-10)


def test_anova_table_matches_the_remembered_msa_appendix_table(aiag_cube, published):
    # AIAG MSA 4th ed. appendix A ANOVA table for the same example, FROM MEMORY.
    res = gauge_rr.evaluate_anova(np.asarray(aiag_cube))
    t = res.table
    # The results file keeps the manual's names: its parts are our materials, its
    # operators our laboratories.
    mxl = t["material_x_laboratory"]
    got = {"ss_part": t["material"]["ss"], "ss_operator": t["laboratory"]["ss"],
           "ss_interaction": mxl["ss"], "ss_repeatability": t["repeatability"]["ss"],
           "ss_total": t["total"]["ss"], "f_part": t["material"]["f"],
           "f_operator": t["laboratory"]["f"], "f_interaction": mxl["f"]}
    for (method, quantity), (value, tol) in published.items():
        if method == "anova":
            assert got[quantity] == pytest.approx(value, abs=tol), quantity


def test_significant_interaction_keeps_the_full_model_and_its_components():
    # Simulated crossed data with a strong material x laboratory effect; expected components
    # rebuilt from statsmodels' mean squares with the EMS formulas of METHODS.md §2.
    rng = np.random.default_rng(11)
    p, o, r = 6, 4, 3
    y = (rng.normal(0, 2, (p, 1, 1)) + rng.normal(0, 0.5, (1, o, 1))
         + rng.normal(0, 0.8, (p, o, 1)) + rng.normal(0, 0.2, (p, o, r)) + 100.0)
    ref = _anova_lm(y, "y ~ C(part) * C(op)")
    res = gauge_rr.evaluate_anova(y)
    assert res.model == "full"
    ms = ref["mean_sq"]
    ms_e, ms_po = ms["Residual"], ms["C(part):C(op)"]
    assert res.repeatability_sd ** 2 == pytest.approx(ms_e, rel=1e-9)
    assert res.material_x_laboratory_sd ** 2 == pytest.approx((ms_po - ms_e) / r, rel=1e-9)
    assert res.laboratory_sd ** 2 == pytest.approx(max(0, (ms["C(op)"] - ms_po) / (p * r)),
                                                   rel=1e-9)
    assert res.material_sd ** 2 == pytest.approx((ms["C(part)"] - ms_po) / (o * r), rel=1e-9)
    assert res.reproducibility_sd ** 2 == pytest.approx(
        res.laboratory_sd ** 2 + res.material_x_laboratory_sd ** 2, rel=1e-12)


def test_percentages_follow_their_definitions(aiag_cube):
    # METHODS.md §2: shares of the variance add to 100; SD ratios to TV (%GRR) do not
    # depend on the multiplier k; only %tolerance does.
    y = np.asarray(aiag_cube)
    six = gauge_rr.evaluate_anova(y, tolerance=5.0)
    old = gauge_rr.evaluate_anova(y, tolerance=5.0, multiplier=5.15)
    c = six.pct_variance
    assert c["grr"] + c["material"] == pytest.approx(100.0)
    assert c["repeatability"] + c["reproducibility"] == pytest.approx(c["grr"])
    assert six.pct_tv == old.pct_tv
    assert six.pct_tv["grr"] == pytest.approx(100 * six.grr_sd / six.total_sd)
    assert six.pct_tolerance["grr"] == pytest.approx(100 * 6 * six.grr_sd / 5.0)
    assert old.pct_tolerance["grr"] == pytest.approx(100 * 5.15 * six.grr_sd / 5.0)
    assert gauge_rr.evaluate_anova(y).pct_tolerance is None
    assert six.ndc == math.trunc(1.41 * six.material_sd / six.grr_sd)


def test_ndc_is_never_below_one():
    rng = np.random.default_rng(5)
    y = rng.normal(0, 1, (5, 3, 2))  # no material effect at all
    res = gauge_rr.evaluate_anova(y)
    assert res.ndc >= 1


def test_too_few_trials_is_skipped():
    res = gauge_rr.evaluate_anova(np.zeros((3, 2, 1)))
    assert isinstance(res, Skipped) and "2 trials" in res.reason


# --- arranging long data -------------------------------------------------------------

def test_arrange_cells_builds_the_cube_in_order_of_first_appearance():
    values = [1, 2, 3, 4, 5, 6, 7, 8]
    materials = ["p1", "p1", "p2", "p2", "p1", "p1", "p2", "p2"]
    labs = ["a", "a", "a", "a", "b", "b", "b", "b"]
    y, pl, ol = gauge_rr.arrange_cells(values, materials, labs)
    assert pl == ["p1", "p2"] and ol == ["a", "b"]
    assert y.tolist() == [[[1, 2], [5, 6]], [[3, 4], [7, 8]]]


def test_unbalanced_or_missing_cells_are_skipped_with_a_reason():
    res = gauge_rr.arrange_cells([1, 2, 3, 4, 5], ["p1", "p1", "p2", "p2", "p2"],
                                 ["a", "a", "a", "a", "a"])
    res2 = gauge_rr.arrange_cells([1, 2, 3], ["p1", "p1", "p2"], ["a", "b", "b"])
    assert isinstance(res, Skipped) and "same number of trials" in res.reason
    assert isinstance(res2, Skipped) and "'a' has no result for 'p2'" in res2.reason
