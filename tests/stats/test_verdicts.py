"""Verdicts that must not depend on binary rounding, offsets or too few laboratories.

Every expected value is computed here: Algorithm A and Mandel's h in exact Decimal /
Fraction arithmetic from the decimal text a laboratory types, quantiles with scipy.
"""

from __future__ import annotations

import math
import random
import re
from decimal import Decimal, localcontext
from fractions import Fraction

import numpy as np
import pytest
from hypothesis import given, settings, strategies as st

from conftest import run_cli
from planner import stats
from planner.errors import DataError
from planner.stats import iso5725_2, iso13528
from planner.stats.iso13528 import SigmaPt


def _table(pairs, material="A"):
    """Rows, values and labs for results given as decimal text, one tuple per laboratory."""
    rows = [{"material": material, "lab": f"L{i + 1}", "trial": str(t + 1), "value": float(v)}
            for i, pr in enumerate(pairs) for t, v in enumerate(pr)]
    return rows, [r["value"] for r in rows], [r["lab"] for r in rows]


def _exact_means(pairs):
    return [sum(Decimal(v) for v in pr) / len(pr) for pr in pairs]


def reference_algorithm_a(means):
    """Return (x*, s*, start, collapsed) in 50-digit Decimal arithmetic.

    ISO 13528:2022 Annex C.3.1 (Algorithm A), rules as in the standard: x* = median,
    s* = 1.483 median|x - x*|, from the sample SD when that MAD is 0; then delta = 1.5 s*,
    winsorize, x* = mean, s* = 1.134 SD (n - 1) until stable. s* below 1e-30 of the data's
    spread is taken as 0 (exactly, s* only tends to 0 geometrically).
    """
    with localcontext() as ctx:
        ctx.prec = 50
        x = sorted(Decimal(m) for m in means)
        p = len(x)

        def median(v):
            v = sorted(v)
            return v[p // 2] if p % 2 else (v[p // 2 - 1] + v[p // 2]) / 2

        def sd(v):
            m = sum(v) / p
            return (sum((a - m) ** 2 for a in v) / (p - 1)).sqrt()

        xs, start = median(x), "mad"
        s = Decimal("1.483") * median([abs(a - xs) for a in x])
        if s == 0:
            s, start = sd(x), "sd"
        tiny = Decimal("1e-30") * (x[-1] - x[0])
        while s > tiny:
            w = [min(max(a, xs - Decimal("1.5") * s), xs + Decimal("1.5") * s) for a in x]
            nx, ns = sum(w) / p, Decimal("1.134") * sd(w)
            done = abs(nx - xs) <= Decimal("1e-25") * ns and abs(ns - s) <= Decimal("1e-25") * ns
            xs, s = nx, ns
            if done:
                return xs, s, start, False
        return xs, Decimal(0), start, True


# --- 1, 2: Algorithm A on results reported to one decimal ------------------------------

PAIRS_11 = [("1.1", "1.3"), ("1.2", "1.2"), ("1.1", "1.2"), ("1.2", "1.3"), ("1.1", "1.1"),
            ("1.3", "1.3"), ("1.1", "1.3"), ("1.2", "1.3"), ("1.1", "1.2"), ("1.3", "1.2"),
            ("1.3", "1.2")]


def _random_pairs(seed):
    rng = random.Random(seed)
    return [(rng.choice("123"), rng.choice("123")) for _ in range(11)]


@pytest.mark.parametrize("pairs", [PAIRS_11] + [
    [(f"1.{a}", f"1.{b}") for a, b in _random_pairs(seed)] for seed in range(40)])
def test_algorithm_a_and_z_equal_exact_arithmetic_on_one_decimal_results(pairs):
    # ISO 13528:2022 Annex C.3.1 (Algorithm A), reference above; z = (mean - x*)/s* (§9.4,
    # from memory). Lab means of 1.1 and 1.3 are 1.2 exactly, as for 1.2 and 1.2.
    _, values, labs = _table(pairs)
    means = _exact_means(pairs)
    rx, rs, start, collapsed = reference_algorithm_a(means)
    res = iso13528.evaluate(values, labs)  # participants' robust SD; 11 labs >= 8
    assert res.robust.start == start and res.robust.collapsed == collapsed
    assert res.assigned_value == pytest.approx(float(rx), rel=1e-9)
    assert res.robust_sd == pytest.approx(float(rs), rel=1e-9, abs=1e-15)
    # Bands need s* of at least half the reporting step, 0.1/2 (module doc).
    if collapsed or rs < Decimal("0.05"):
        assert not res.banded and all(e["z"] is None for e in res.labs.values())
        return
    assert res.banded
    for (lab, entry), m in zip(res.labs.items(), means):
        assert entry["z"] == pytest.approx(float((m - rx) / rs), rel=1e-9, abs=1e-12), lab


def _naive_algorithm_a(means):
    """Algorithm A on float lab means with no guard: what rounding noise does to it."""
    x = np.asarray(means)
    xs = float(np.median(x))
    s = 1.483 * float(np.median(np.abs(x - xs))) or float(np.std(x, ddof=1))
    for _ in range(1000):
        w = np.clip(x, xs - 1.5 * s, xs + 1.5 * s)
        xs, s = float(w.mean()), 1.134 * float(w.std(ddof=1))
    return xs, s


def test_rounding_noise_gives_no_huge_z_where_naive_floats_would():
    # Nine laboratory means are 1.2 in decimal; in binary (1.1 + 1.3)/2 = 1.2000000000000002.
    pairs = [("1.2", "1.2")] * 5 + [("1.1", "1.3")] * 4 + [("1.1", "1.1"), ("1.3", "1.3")]
    _, values, labs = _table(pairs)
    float_means = [np.mean([float(v) for v in pr]) for pr in pairs]
    xs, s = _naive_algorithm_a(float_means)
    assert 0 < s < 1e-12 and abs((1.3 - xs) / s) > 1e10  # the trap is real
    rx, rs, _, collapsed = reference_algorithm_a(_exact_means(pairs))
    assert collapsed and rs == 0 and rx == Decimal("1.2")
    res = iso13528.evaluate(values, labs)
    assert res.robust.collapsed and res.robust_sd == 0.0 and not res.banded
    assert all(e["z"] is None and e["z_prime"] is None for e in res.labs.values())


def test_most_means_equal_collapses_the_robust_sd_and_gives_no_band():
    pairs = [("1.2", "1.2")] * 9 + [("1.1", "1.1"), ("1.3", "1.3")]
    _, values, labs = _table(pairs)
    assert reference_algorithm_a(_exact_means(pairs))[3]  # exact s* tends to 0 as well
    assert iso13528.algorithm_a([float(m) for m in _exact_means(pairs)]).collapsed
    res = iso13528.evaluate(values, labs)
    assert res.robust.collapsed and res.banded is False
    assert all(e["z"] is None and e["band"] is None for e in res.labs.values())
    assert "robust SD of the participants is 0" in res.no_band
    fixed = iso13528.evaluate(values, labs, sigma_pt=0.05)  # z = (mean - 1.2)/0.05
    assert fixed.banded and fixed.assigned_value == pytest.approx(1.2, rel=1e-12)
    z = [e["z"] for e in fixed.labs.values()]
    assert z == pytest.approx([0.0] * 9 + [-2.0, 2.0], rel=1e-9, abs=1e-12)
    assert [e["band"] for e in fixed.labs.values()] == ["satisfactory"] * 11


# --- 3: no verdict depends on where the results lie ------------------------------------

def test_offset_of_1e9_leaves_the_robust_sd_and_z_unchanged():
    steps = [(0, 2), (1, 1), (3, 4), (2, 2), (5, 3), (1, 0), (2, 3), (4, 4), (9, 8), (2, 1),
             (3, 3)]  # results k * 0.001, then 1e9 + k * 0.001

    def pairs(offset):
        return [tuple(str(Decimal(offset) + Decimal(k) / 1000) for k in pr) for pr in steps]

    plain = iso13528.evaluate(*_table(pairs(0))[1:])
    far = iso13528.evaluate(*_table(pairs(10 ** 9))[1:])
    rs = reference_algorithm_a(_exact_means(pairs(0)))[1]  # Annex C.3.1, exact
    assert plain.robust_sd == pytest.approx(float(rs), rel=1e-9)
    assert far.robust_sd == pytest.approx(float(rs), rel=1e-9)
    assert [e["z"] for e in far.labs.values()] == pytest.approx(
        [e["z"] for e in plain.labs.values()], rel=1e-9, abs=1e-12)
    # The trap is real: on the binary values near 1e9, plain floats miss s* by far more.
    far_means = [np.mean([float(v) for v in pr]) for pr in pairs(10 ** 9)]
    assert abs(_naive_algorithm_a(far_means)[1] / float(rs) - 1) > 1e-7


@st.composite
def grid_tables(draw):
    denom = draw(st.sampled_from([10, 100]))
    n_mat, n_lab, n_tr = draw(st.integers(2, 4)), draw(st.integers(3, 12)), draw(st.integers(2, 3))
    per = n_lab * n_tr
    ks = draw(st.lists(st.integers(-999, 999), min_size=n_mat * per, max_size=n_mat * per))
    for m in range(n_mat):  # the grid is the reporting step: a last digit shows somewhere
        if all(k % 10 == 0 for k in ks[m * per:(m + 1) * per]):
            ks[m * per] += 1
    sigma_steps = draw(st.none() | st.integers(1, 300))  # None: participants' robust SD
    return denom, n_mat, n_lab, n_tr, ks, sigma_steps


def _grid_rows(table, shift=0, power=0):
    denom, n_mat, n_lab, n_tr, ks, sigma_steps = table
    text = [(Decimal(shift) + Decimal(k) / denom).scaleb(power) for k in ks]
    it = iter(text)
    rows = [{"material": f"M{m}", "lab": f"L{i}", "trial": t + 1, "value": float(next(it))}
            for m in range(n_mat) for i in range(n_lab) for t in range(n_tr)]
    sig = None if sigma_steps is None else float((Decimal(sigma_steps) / denom).scaleb(power))
    return rows, sig


def _verdicts(result):
    out = {}
    for m in result["materials"]:
        sc, pr = result["scores"][m], result["precision"][m]
        out[m, "banded"] = sc["banded"]
        for lab, e in sc["labs"].items():
            out.update({(m, lab, k): e[k] for k in ("z", "z_prime", "band")})
        out.update({(m, lab, "h"): v for lab, v in pr["mandel_h"].items()})
        out.update({(m, lab, "k"): v for lab, v in pr["mandel_k"].items()})
        out.update({(m, "C", k): pr["cochran"][k] for k in ("statistic", "result", "lab")})
        for end in ("high", "low"):
            g = pr["grubbs"][end] or {}
            out.update({(m, "G", end, k): g.get(k) for k in ("statistic", "result", "lab")})
    ga, gr = result["grr_anova"], result["grr_range"]
    out["anova"] = ga.get("skipped") or (ga["pct_tv"]["grr"], ga["ndc"])
    out["range"] = gr.get("skipped") or (gr["pct_grr"], gr["ndc"])
    return out


def _assert_same(got, want):
    assert got.keys() == want.keys()
    for key, w in want.items():
        g = got[key]
        if isinstance(w, float) and g is not None:
            assert g == pytest.approx(w, rel=1e-9, abs=1e-12), key
        elif isinstance(w, tuple):
            assert g[0] == pytest.approx(w[0], rel=1e-9) and g[1] == w[1], key
        else:
            assert g == w, key


# Integers up to 1e9 in size, spread over every order of magnitude (plain integers() would
# rarely draw the large shifts that binary rounding makes dangerous).
SHIFTS = st.builds(lambda m, e, sign: sign * m * 10 ** e, st.integers(1, 999),
                   st.integers(0, 6), st.sampled_from([1, -1]))


@settings(max_examples=60)
@given(table=grid_tables(),
       move=st.one_of(st.tuples(st.just("shift"), SHIFTS),
                      st.tuples(st.just("scale"), st.integers(-3, 3))))
def test_shift_or_power_of_ten_scaling_changes_no_verdict(table, move):
    rows, sig = _grid_rows(table)
    kind, amount = move
    moved, sig_moved = (_grid_rows(table, shift=amount) if kind == "shift"
                        else _grid_rows(table, power=amount))
    want = _verdicts(stats.evaluate_table(rows, sigma_pt=sig))
    _assert_same(_verdicts(stats.evaluate_table(moved, sigma_pt=sig_moved)), want)


def test_the_step_is_read_from_the_data_so_results_all_in_tens_read_as_reported_to_10():
    # The reporting step is the finest digit any result shows (``_common.to_units``), so
    # invariance holds for shifts by multiples of that step. Results that are all
    # multiples of 10 read as reported to 10: a fixed sigma_pt of 1 is then below half
    # that step (5) and gets no band, with the reason.
    # Shifted by 3 they show the units digit, and the same sigma_pt gets bands.
    pairs = [("10", "20"), ("20", "30"), ("10", "10"), ("30", "40"), ("20", "20"),
             ("30", "20"), ("10", "30"), ("40", "30")]
    shifted = [tuple(str(int(v) + 3) for v in pr) for pr in pairs]
    base = iso13528.evaluate(*_table(pairs)[1:], sigma_pt=1.0)
    moved = iso13528.evaluate(*_table(shifted)[1:], sigma_pt=1.0)
    assert base.resolution == 10.0 and moved.resolution == 1.0
    assert not base.banded and "less than half the step the results are reported to (10)" \
        in base.no_band
    assert moved.banded


# --- 4: Grubbs with three laboratories --------------------------------------------------

def test_grubbs_with_three_labs_calls_two_tied_means_correct(read_table):
    from scipy import stats as sps

    pairs = [("9.9", "10.1"), ("10.0", "10.0"), ("11.9", "12.1")]  # means 10, 10, 12
    res = iso5725_2.evaluate(*_table(pairs)[1:])
    # G = (max mean - mean of means)/SD of means (ISO 5725-2 §7.3.4, from memory), exact:
    means = [Fraction(10), Fraction(10), Fraction(12)]
    m = sum(means) / 3
    g2 = (means[2] - m) ** 2 / (sum((y - m) ** 2 for y in means) / 2)
    assert g2 == Fraction(4, 3)  # G = 2/sqrt(3), the largest G three values can give
    high = res.grubbs["high"]
    assert high["lab"] == "L3" and high["statistic"] == pytest.approx(math.sqrt(4 / 3), rel=1e-12)
    assert high["result"] == "correct" and res.grubbs["low"]["result"] == "correct"
    # D. Harvey, Analytical Chemistry 2.0, App. 7, as copied to tests/data.
    printed = {float(r["alpha"]): float(r["tabled_value"])
               for r in read_table("iso5725_2_critical_values/grubbs_single.csv") if r["p"] == "3"}
    assert printed == {0.05: 1.155, 0.01: 1.155}
    assert (res.grubbs["critical_single_5"], res.grubbs["critical_single_1"]) == (1.155, 1.155)
    for alpha, value in printed.items():
        assert iso5725_2.grubbs_single_critical(3, alpha) == value
        # Exact value (NIST e-Handbook Grubbs formula): below 2/sqrt(3), so it would call the
        # tie an outlier at both levels; the printed 1.155 does not.
        t = sps.t.isf(alpha / (2 * 3), 3 - 2)
        exact = (3 - 1) / math.sqrt(3) * math.sqrt(t * t / (3 - 2 + t * t))
        assert exact < 2 / math.sqrt(3) < value


# --- 5: too few laboratories for a participants' sigma_pt -------------------------------

def _small_round(p):
    """p laboratories, the last 15 % above 10.0 (the first laboratory)."""
    others = ["10.0", "10.1", "9.9", "10.0", "10.2", "9.8", "10.1"][:p - 1]
    return _table([(v, v) for v in others] + [("11.5", "11.5")])


@pytest.mark.parametrize("p", [2, 3, 4, 5, 6, 7, 8])
def test_participants_sigma_pt_gives_bands_from_eight_labs_on(p):
    rows, values, labs = _small_round(p)
    res = iso13528.evaluate(values, labs)
    if p == 8:  # ISO 5725-1 §6.3.4 (from memory): 8-15 laboratories; the module's minimum
        assert res.banded and res.labs["L8"]["band"] == "unsatisfactory"
        return
    assert not res.banded and all(e["z"] is None for e in res.labs.values())
    assert f"only {p} participants" in res.no_band
    minimum = re.search(r"fewer than (\d+)", res.no_band)
    # Below 5 the consensus itself cannot set the high lab aside (MIN_CONSENSUS); from 5
    # on the robust SD is the limit (MIN_PARTICIPANTS = 8).
    assert minimum and minimum.group(1) == ("8" if p >= 5 else "5")
    text = stats.summary_text(stats.evaluate_table(rows))
    assert re.search(r"no z-score bands for A: .*only %d participants" % p, text)


@pytest.mark.parametrize("p", [2, 3, 4])
def test_percent_sigma_pt_flags_the_high_lab_of_a_small_round_against_a_reference(p):
    # Against a consensus of p <= 4 the high lab cannot be flagged (u(x_pt) = 1.25 s*/sqrt(p)
    # makes z' < 2, ISO 13528 §9.5 from memory); against laboratory L1 (10.0, SD 0, so z
    # is read) z = (11.5 - 10.0)/(5 % of 10.0) = 3: unsatisfactory (|z| >= 3).
    _, values, labs = _small_round(p)
    percent = SigmaPt("percent", percent=5)
    consensus = iso13528.evaluate(values, labs, sigma_pt=percent)
    assert not consensus.banded and "consensus of only" in consensus.no_band
    assert consensus.labs[f"L{p}"]["band"] is None and consensus.labs[f"L{p}"]["En"] is None
    ref = iso13528.evaluate(values, labs, sigma_pt=percent, assigned="reference",
                            reference_lab="L1")
    assert ref.banded and not ref.use_z_prime
    high = ref.labs[f"L{p}"]
    assert high["z"] == pytest.approx(float(Fraction("1.5") / (Fraction(5, 100) * 10)), rel=1e-9)
    assert high["band"] == "unsatisfactory"


@pytest.mark.parametrize("p", [3, 4])
def test_three_or_four_labs_never_reach_z_2_against_their_own_robust_sd(p):
    base = [10.0, 10.1, 9.9][:p - 1]
    sd = float(np.std(base, ddof=1))
    for k in (10, 100, 1e4):
        means = base + [float(np.mean(base)) + k * sd]
        est = iso13528.algorithm_a(means)
        rx, rs, _, _ = reference_algorithm_a(means)  # Annex C.3.1, exact (reference above)
        assert (est.x, est.s) == (pytest.approx(float(rx), rel=1e-9),
                                  pytest.approx(float(rs), rel=1e-9))
        z = (means[-1] - est.x) / est.s
        assert 1 < z < 2, (k, z)


# --- 6: what read_long_csv and analyze refuse -------------------------------------------

def test_a_row_split_by_a_decimal_comma_is_refused_with_file_and_line(tmp_path):
    path = tmp_path / "comma.csv"
    path.write_text("material,lab,trial,value\nA,L1,1,10.4\nA,L1,2,10,5\n", encoding="utf-8")
    with pytest.raises(DataError, match="decimal comma") as info:
        stats.read_long_csv(path)
    assert (info.value.where.file, info.value.where.line) == (str(path), 3)


@pytest.mark.parametrize("exponent", ["e300", "e154", "e101"])
def test_values_whose_squares_overflow_are_refused(tmp_path, runner, exponent):
    lines = ["material,lab,trial,value"] + [  # 1.11e154, ..., -1.42e154
        f"A,L{i},{t},{'-' if i == 4 else ''}1.{i}{t}{exponent}" for i in (1, 2, 3, 4)
        for t in (1, 2)]
    path = tmp_path / "big.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    with pytest.raises(DataError) as info:
        stats.read_long_csv(path)
    assert (info.value.where.file, info.value.where.line) == (str(path), 2)
    rows = [dict(zip(("material", "lab", "trial", "value"), ln.split(","))) for ln in lines[1:]]
    with pytest.raises(DataError):  # not s_R = None and "satisfactory"
        stats.evaluate_table([{**r, "value": float(r["value"])} for r in rows])
    res = run_cli(runner, "analyze", path)
    assert res.exit_code == 2
    err = res.stderr.strip().splitlines()
    assert len(err) == 1 and err[0].startswith(f"error: {path}:2: ")


def test_the_largest_accepted_values_give_finite_exact_precision():
    big = [("1e100", "-1e100"), ("9e99", "-9e99"), ("1e100", "1e100"), ("-1e100", "-1e100")]
    pr = stats.evaluate_table(_table(big)[0])["precision"]["A"]
    # ISO 5725-2 §7.4.5 (from memory), balanced n = 2: s_r^2 = mean cell variance,
    # s_L^2 = (s_d^2 - s_r^2)/n, s_d^2 = n * variance of the cell means; exact (Fraction).
    cells = [(Fraction(float(a)), Fraction(float(b))) for a, b in big]
    s_r2 = sum((a - b) ** 2 / 2 for a, b in cells) / 4
    ybar = [(a + b) / 2 for a, b in cells]
    s_d2 = 2 * sum((y - sum(ybar) / 4) ** 2 for y in ybar) / 3
    assert pr["s_r"] == pytest.approx(_sqrt(s_r2), rel=1e-9)
    assert pr["s_R"] == pytest.approx(_sqrt(s_r2 + max(0, (s_d2 - s_r2) / 2)), rel=1e-9)


# --- 7: skip reasons name materials and laboratories; the reference laboratory ---------

def test_unbalanced_gauge_table_is_skipped_naming_material_and_lab():
    rows = [{"material": m, "lab": lab, "trial": t, "value": 10.0 + t / 10}
            for m in ("M1", "M2") for lab in ("L1", "L2", "L3") for t in (1, 2)
            if (m, lab, t) != ("M1", "L1", 2)]
    result = stats.evaluate_table(rows)
    for key in ("grr_anova", "grr_range"):
        reason = result[key]["skipped"]
        assert "'L1'" in reason and "'M1'" in reason and "(0, 0)" not in reason


def test_reference_lab_is_not_scored_and_missing_material_is_skipped():
    data = [("A", "L1", "10.0"), ("A", "L1", "10.2"), ("A", "L2", "10.5"), ("A", "L2", "10.7"),
            ("A", "L3", "9.9"), ("A", "L3", "10.1"), ("B", "L2", "20.0"), ("B", "L2", "20.4"),
            ("B", "L3", "20.1"), ("B", "L3", "20.3")]
    rows = [stats.Row(m, lab, str(i % 2 + 1), float(v)) for i, (m, lab, v) in enumerate(data)]
    result = stats.evaluate_table(rows, sigma_pt=0.5, assigned="reference", reference_lab="L1")
    ref = result["scores"]["A"]["labs"]["L1"]
    assert ref["reference"] is True and ref["z"] is None and ref["band"] is None
    # z of L2 = (10.6 - 10.1)/0.5 = 1 (ISO 13528 §9.4, from memory)
    assert result["scores"]["A"]["labs"]["L2"]["z"] == pytest.approx(1.0, rel=1e-9)
    skipped = result["scores"]["B"]["skipped"]
    assert "'L1'" in skipped and "L2" in skipped and "consensus" in skipped
    # precision of B is still computed: s_r^2 = mean of the cell variances d^2/2 (n = 2)
    s_r2 = (Fraction("0.4") ** 2 / 2 + Fraction("0.2") ** 2 / 2) / 2
    assert result["precision"]["B"]["s_r"] == pytest.approx(_sqrt(s_r2), rel=1e-9)
    with pytest.raises(DataError, match="did you mean 'L1'"):
        stats.check_reference(rows, "L11")


# --- 8: Mandel's h is centred on the general mean --------------------------------------

def _sqrt(q):
    with localcontext() as ctx:
        ctx.prec = 50
        return float((Decimal(q.numerator) / Decimal(q.denominator)).sqrt())


def _mandel_h_exact(cells, centre):
    means = [sum(map(Fraction, c)) / len(c) for c in cells]
    sd = _sqrt(sum((y - centre) ** 2 for y in means) / (len(cells) - 1))
    return [float(y - centre) / sd for y in means]


def test_mandel_h_with_unequal_cells_is_centred_on_the_general_mean():
    cells = [("10.1", "10.3", "10.2"), ("10.6", "10.5"), ("9.9", "10.0", "9.8", "10.1"),
             ("10.4", "10.8")]
    rows, values, labs = _table(cells)
    res = iso5725_2.evaluate(values, labs)
    # ISO 5725-2:1994 §7.3.1 eq. (6): h_i = (y_i - m)/sqrt(sum (y_j - m)^2/(p - 1)), m the
    # general mean T1/T3 of §7.4.5 (clause numbers from memory).
    every = [Fraction(v) for c in cells for v in c]
    want = _mandel_h_exact(cells, sum(every) / len(every))
    assert list(res.mandel_h.values()) == pytest.approx(want, rel=1e-9)
    means = [sum(map(Fraction, c)) / len(c) for c in cells]
    other = _mandel_h_exact(cells, sum(means) / len(means))  # centred on the mean of means
    assert max(abs(a - b) for a, b in zip(want, other)) > 1e-3  # the example tells them apart


def test_mandel_h_with_equal_cells_is_the_standardized_lab_mean():
    cells = [("10.1", "10.3"), ("10.6", "10.5"), ("9.9", "10.0"), ("10.4", "10.8"),
             ("10.2", "10.2")]
    res = iso5725_2.evaluate(*_table(cells)[1:])
    means = [sum(map(Fraction, c)) / 2 for c in cells]  # (y_i - mean of means)/SD of means
    want = _mandel_h_exact(cells, sum(means) / len(means))
    assert list(res.mandel_h.values()) == pytest.approx(want, rel=1e-9)


def test_a_sigma_pt_below_half_the_reporting_step_gives_no_band():
    # Five laboratories at 10.0, one at 10.1 (results to one decimal). Against sigma_pt =
    # 0.03 one reported digit would be 3.3 sigma_pt: "unsatisfactory" from the last digit
    # alone. Half the step (0.05) is the least sigma_pt a band rests on.
    pairs = [("10.0", "10.0")] * 5 + [("10.1", "10.1")]
    _, values, labs = _table(pairs)
    low = iso13528.evaluate(values, labs, sigma_pt=0.03, assigned="reference",
                            reference_lab="L1")
    assert not low.banded and all(e["band"] is None for e in low.labs.values())
    assert "less than half the step the results are reported to (0.1)" in low.no_band
    ok = iso13528.evaluate(values, labs, sigma_pt=0.05, assigned="reference",
                           reference_lab="L1")
    assert ok.banded and ok.labs["L6"]["z"] == pytest.approx(2.0) \
        and ok.labs["L6"]["band"] == "satisfactory"
