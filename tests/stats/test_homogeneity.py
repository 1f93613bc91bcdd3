"""Homogeneity and stability (ISO 13528 Annex B): F1/F2 against the published table, s_x,
s_w and s_s against a one-way ANOVA written independently here, and the verdicts."""

from __future__ import annotations

import csv
import math
from pathlib import Path

import numpy as np
import pytest

from planner.stats import homogeneity as hom

DATA = Path(__file__).resolve().parent.parent / "data" / "iso13528_homogeneity_f1_f2.csv"


def _table():
    with open(DATA, encoding="utf-8") as f:
        rows = [line for line in f if not line.startswith("#")]
    return list(csv.DictReader(rows))


@pytest.mark.parametrize("row", _table(), ids=lambda r: f"g={r['g']}")
def test_f1_f2_reproduce_the_published_table(row):
    # ISO 13528 Annex B.2.3 table (tests/data/iso13528_homogeneity_f1_f2.csv, two decimals)
    f1, f2 = hom.f1_f2(int(row["g"]))
    assert round(f1, 2) == float(row["F1"])
    if row["F2"]:
        assert round(f2, 2) == float(row["F2"])


def _anova(units):
    """s_x, s_w and s_s from a one-way ANOVA table (between- and within-unit mean squares):
    MS_between = m s_x², MS_within = s_w², s_s² = (MS_between - MS_within) / m."""
    x = np.asarray(units, dtype=float)
    g, m = x.shape
    grand = x.mean()
    ss_between = m * ((x.mean(axis=1) - grand) ** 2).sum()
    ss_within = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum()
    ms_b, ms_w = ss_between / (g - 1), ss_within / (g * (m - 1))
    return math.sqrt(ms_b / m), math.sqrt(ms_w), math.sqrt(max(0.0, (ms_b - ms_w) / m)), ms_b < ms_w


@pytest.mark.parametrize("seed,between,m", [(1, 0.05, 2), (2, 0.0, 2), (3, 0.2, 3), (4, 0.01, 2)])
def test_sx_sw_ss_match_a_one_way_anova(seed, between, m):
    rng = np.random.default_rng(seed)
    g = 10
    units = (20.0 + rng.normal(0, between, size=(g, 1)) + rng.normal(0, 0.05, size=(g, m)))
    got = hom.homogeneity(units.tolist(), sigma_pt=0.5)
    s_x, s_w, s_s, zero = _anova(units)
    assert got["s_x"] == pytest.approx(s_x, rel=1e-12)
    assert got["s_w"] == pytest.approx(s_w, rel=1e-12)
    assert got["s_s"] == pytest.approx(s_s, rel=1e-9, abs=1e-15)
    assert got["s_s_forced_zero"] == zero
    assert got["mean"] == pytest.approx(units.mean(), rel=1e-14)


def test_duplicates_give_the_2015_form_of_s_w():
    # For m = 2 the 2022 form sqrt(Σ s_t²/g) equals the 2015 form sqrt(Σ w_t²/(2g)).
    units = [[10.1, 10.3], [10.0, 9.9], [10.4, 10.2], [10.2, 10.2], [9.8, 10.1]]
    w = [abs(a - b) for a, b in units]
    got = hom.homogeneity(units, sigma_pt=1.0)
    assert got["s_w"] == pytest.approx(math.sqrt(sum(x * x for x in w) / (2 * len(units))))


def test_s_s_is_forced_to_zero_when_within_exceeds_between():
    # Identical unit means, scattered duplicates: s_x = 0 < s_w²/2, so s_s is 0 by rule.
    units = [[10.0, 10.2], [10.2, 10.0], [9.9, 10.3], [10.3, 9.9]]
    got = hom.homogeneity(units, sigma_pt=1.0)
    assert got["s_x"] == pytest.approx(0.0, abs=1e-12)
    assert got["s_s"] == 0.0 and got["s_s_forced_zero"]
    assert got["passes"] is True


def test_verdicts_plain_extended_and_failed():
    rng = np.random.default_rng(11)
    g = 10
    base = rng.normal(0, 1, size=(g, 1))
    noise = rng.normal(0, 1, size=(g, 2))
    units = (50 + 0.02 * base + 0.01 * noise).tolist()
    ok = hom.homogeneity(units, sigma_pt=1.0)
    assert ok["verdict"] == "sufficiently homogeneous" and ok["passes"]
    # between-unit SD about 0.45 against sigma_allow 0.3: fails the plain criterion
    bad = hom.homogeneity((50 + 0.45 * base + 0.01 * noise).tolist(), sigma_pt=1.0)
    assert bad["passes"] is False
    c = bad["F1"] * 0.3 ** 2 + bad["F2"] * bad["s_w"] ** 2
    assert bad["c"] == pytest.approx(c)
    assert bad["passes_extended"] == (bad["s_s"] ** 2 <= c)
    assert bad["verdict"] == ("sufficiently homogeneous by the extended criterion"
                              if bad["passes_extended"] else "not sufficiently homogeneous")
    clearly = hom.homogeneity((50 + 1.0 * base + 0.01 * noise).tolist(), sigma_pt=1.0)
    assert clearly["verdict"] == "not sufficiently homogeneous"


def test_the_verdict_waits_without_sigma_pt_and_warns_on_a_noisy_method():
    units = [[1.0, 1.1], [1.2, 1.0], [0.9, 1.0]]
    waits = hom.homogeneity(units, sigma_pt=None)
    assert waits["verdict"] == "waits" and waits["passes"] is None and "waits" in waits["why"]
    assert waits["s_w"] > 0
    noisy = hom.homogeneity(units, sigma_pt=0.1)
    assert noisy["repeatability_ok"] is False and "little" in noisy["why"]


def test_bad_shapes_are_refused():
    with pytest.raises(ValueError, match="at least 2 units"):
        hom.homogeneity([[1.0, 2.0]], sigma_pt=1.0)
    with pytest.raises(ValueError, match="same number of values"):
        hom.homogeneity([[1.0, 2.0], [1.0]], sigma_pt=1.0)


def test_stability_plain_and_widened():
    before = [10.0, 10.1, 9.9, 10.05, 9.95, 10.0]
    same = hom.stability(before, [10.02, 9.98, 10.01], sigma_pt=0.5)
    assert same["passes"] and same["verdict"] == "stable"
    # |difference| 0.2 > 0.3 * 0.5 = 0.15; widened by 2 sqrt(u1² + u2²) with u = s/sqrt(n)
    after = [10.25, 10.15, 10.2]
    drift = hom.stability(before, after, sigma_pt=0.5)
    u1 = np.std(before, ddof=1) / math.sqrt(len(before))
    u2 = np.std(after, ddof=1) / math.sqrt(len(after))
    assert drift["difference"] == pytest.approx(np.mean(after) - np.mean(before))
    assert drift["passes"] is False
    assert drift["criterion_widened"] == pytest.approx(0.15 + 2 * math.sqrt(u1 ** 2 + u2 ** 2))
    assert drift["verdict"] == ("stable within the uncertainty of the means"
                                if drift["passes_widened"] else "not stable")
    gone = hom.stability(before, [11.0, 11.1], sigma_pt=0.5)
    assert gone["verdict"] == "not stable"
    single = hom.stability(before, [10.0], sigma_pt=0.5)
    assert single["criterion_widened"] is None and "single" in single["why"]
