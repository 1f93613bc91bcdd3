"""Repeatability and reproducibility of a standard method (ISO 5725-2) for one material.

Per laboratory (cell): count, mean and SD. Then the repeatability SD s_r, the
between-laboratory SD s_L (0 when its estimate is negative), the reproducibility SD
s_R and the limits r = 2.8 s_r and R = 2.8 s_R, by the general (unbalanced) formulas
with T1..T5 (1994 §7.4.4-7.4.5). Consistency and outlier scrutiny: Mandel's h and k
with exact 5 % / 1 % indicator values, Cochran's C, and the single and double Grubbs
tests at both ends, each classed as correct / straggler / outlier (§7.3).

Critical values: Mandel h/k and Cochran from t/F quantiles (exact under normality);
Grubbs single from the t form (NIST e-Handbook), two-sided as in ISO 5725-2 Table 5.
The double Grubbs test has no closed form: the 5 % / 1 % values for p = 4..12 are
read from ``grubbs_double.csv`` beside this module (its header names the source). For
other p the result says "not available" rather than guessing;
``simulate_grubbs_double`` gives a seeded Monte Carlo value for a caller who wants one.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import TYPE_CHECKING

from planner.stats._common import (Skipped, classify_large, classify_small, f_isf, factorize,
                                   majority, t_isf, to_units)

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "SOURCE", "Precision", "evaluate",
    "mandel_h_indicator", "mandel_k_indicator", "cochran_critical",
    "grubbs_single_critical", "grubbs_double_critical", "simulate_grubbs_double",
]

SOURCE = ("ISO 5725-2:1994 (with Cor 1:2002; 2nd ed. 2019), Accuracy (trueness and precision) "
          "of measurement methods and results - Part 2: basic method for the determination "
          "of repeatability and reproducibility; §7.3 (Mandel h/k, Cochran, Grubbs), "
          "§7.4.4-7.4.5 (general formulas T1..T5); r = 2.8 s_r, R = 2.8 s_R")

# Factor 2.8 ~ 1.96 * sqrt(2) for the 95 % limits (ISO 5725-6:1994 §4.1.4, from memory).
_LIMIT_FACTOR = 2.8
_GRUBBS_P3 = 1.155  # printed single Grubbs value for 3 laboratories, 5 % and 1 %


@dataclass(frozen=True, slots=True)
class Precision:
    """Precision estimates and scrutiny results for one material.

    ``cells`` maps lab -> {n, mean, sd}; ``mandel_h``/``mandel_k`` map lab -> value (None
    where undefined); ``cochran`` and ``grubbs`` hold statistics, critical values and
    classes; ``notes`` explains anything not computed.
    """

    p: int
    n_for_tests: int
    mean: float
    s_r: float
    s_L: float
    s_R: float
    r: float
    R: float
    cells: Mapping[str, Mapping[str, float | int | None]]
    mandel_h: Mapping[str, float | None]
    mandel_k: Mapping[str, float | None]
    indicators: Mapping[str, float | None]
    cochran: Mapping[str, object]
    grubbs: Mapping[str, object]
    notes: tuple[str, ...]


def evaluate(values: ArrayLike, labs: Sequence[Hashable]) -> Precision | Skipped:
    """Return the ISO 5725-2 precision results for one material, or ``Skipped`` with why.

    ``values`` are the test results, ``labs`` the laboratory of each result.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    codes, labels = factorize(labs)
    if x.size != codes.size:
        raise ValueError("values and labs differ in length")
    p = len(labels)
    if p < 2:
        return Skipped(f"precision needs at least 2 laboratories; found {p}")
    if x.size == p:
        return Skipped("one result per laboratory: repeatability (s_r) needs replicates")
    names = [str(v) for v in labels]
    # Work in steps of the reporting resolution, counted from a data value: sums of
    # whole steps are exact, and no statistic depends on where the results lie.
    units = to_units(x)
    d = units.u
    n = np.bincount(codes, minlength=p)
    nf = n.astype(np.float64)
    dmean = np.bincount(codes, weights=d, minlength=p) / nf
    e = d - dmean[codes]
    ss_cell = np.bincount(codes, weights=e * e, minlength=p)
    with np.errstate(invalid="ignore", divide="ignore"):
        var = np.where(n >= 2, ss_cell / (nf - 1.0), np.nan)

    # General formulas (T1..T5). (T2 T3 - T1^2)/T3 is written as sum n_i (y_i - m)^2,
    # the same quantity without the cancellation of the textbook form.
    t3 = float(n.sum())
    t4 = float((nf * nf).sum())
    t5 = math.fsum(ss_cell.tolist())
    dm = math.fsum(d.tolist()) / t3  # the general mean m = T1/T3 (§7.4.5)
    between = math.fsum((nf * (dmean - dm) ** 2).tolist())
    s_r2 = t5 / (t3 - p)
    s_d2 = between / (p - 1)
    s_L2 = max(0.0, (s_d2 - s_r2) * t3 * (p - 1) / (t3 * t3 - t4))
    s_r, s_L = math.sqrt(s_r2), math.sqrt(s_L2)
    s_R = math.sqrt(s_L2 + s_r2)
    sc = units.scale

    notes: list[str] = []
    with_sd = n >= 2
    n_test = majority(n[with_sd].tolist())
    if len(set(n.tolist())) > 1:
        notes.append(f"unbalanced cells (n from {int(n.min())} to {int(n.max())}): Mandel k "
                     f"and Cochran use n = {n_test}, the count of most cells (ISO 5725-2 §7.3.3)")

    h = _mandel_h(dmean, dm)
    k_vals = _mandel_k(var)
    p_k = int(with_sd.sum())
    indicators = {
        "h_5": mandel_h_indicator(p, 0.05) if p >= 3 else None,
        "h_1": mandel_h_indicator(p, 0.01) if p >= 3 else None,
        "k_5": mandel_k_indicator(p_k, n_test, 0.05) if p_k >= 2 else None,
        "k_1": mandel_k_indicator(p_k, n_test, 0.01) if p_k >= 2 else None,
    }
    cells = {name: {"n": int(n[i]), "mean": units.value(float(dmean[i])),
                    "sd": (sc(math.sqrt(float(var[i]))) if with_sd[i] else None)}
             for i, name in enumerate(names)}
    return Precision(
        p=p, n_for_tests=n_test, mean=units.value(dm), s_r=sc(s_r), s_L=sc(s_L), s_R=sc(s_R),
        r=_LIMIT_FACTOR * sc(s_r), R=_LIMIT_FACTOR * sc(s_R), cells=cells,
        mandel_h=dict(zip(names, _nones(h))), mandel_k=dict(zip(names, _nones(k_vals))),
        indicators=indicators, cochran=_cochran(var, names, n_test, notes),
        grubbs=_grubbs(dmean, names, notes), notes=tuple(notes))

def _nones(a: NDArray[np.float64]) -> list[float | None]:
    return [v if math.isfinite(v) else None for v in a.tolist()]


def _mandel_h(means: NDArray[np.float64], general: float) -> NDArray[np.float64]:
    # ISO 5725-2:1994 §7.3.1, equation (6) (clause from memory): h_i = (y_i - m) / sqrt(sum (y_j - m)^2 / (p-1))
    # with m the general mean T1/T3 of §7.4.5, the mean of all results; with equal cell
    # sizes that is the plain mean of the cell means.
    import numpy as np

    dev = means - general
    s = math.sqrt(math.fsum((dev * dev).tolist()) / (means.size - 1))
    if not s > 0:
        return np.full(means.shape, np.nan)
    return dev / s


def _mandel_k(var: NDArray[np.float64]) -> NDArray[np.float64]:
    import numpy as np

    ok = np.isfinite(var)
    total = math.fsum(var[ok].tolist())
    if ok.sum() < 2 or not total > 0:
        return np.full(var.shape, np.nan)
    return np.sqrt(var * ok.sum() / total)


def _cochran(var: NDArray[np.float64], names: list[str], n: int,
             notes: list[str]) -> dict[str, object]:
    import numpy as np

    ok = np.isfinite(var)
    p = int(ok.sum())
    total = math.fsum(var[ok].tolist())
    if p < 2 or not total > 0:
        notes.append("Cochran's test needs 2 or more cells with replicates and some scatter")
        return {"statistic": None, "lab": None, "critical_5": None, "critical_1": None,
                "result": None}
    i = int(np.nanargmax(var))
    c = float(var[i]) / total
    c5, c1 = cochran_critical(p, n, 0.05), cochran_critical(p, n, 0.01)
    return {"statistic": c, "lab": names[i], "critical_5": c5, "critical_1": c1,
            "result": classify_large(c, c5, c1)}


def _grubbs(dmeans: NDArray[np.float64], names: list[str],
            notes: list[str]) -> dict[str, object]:
    import numpy as np

    p = dmeans.size
    out: dict[str, object] = {"critical_single_5": None, "critical_single_1": None,
                              "critical_double_5": None, "critical_double_1": None,
                              "high": None, "low": None, "double_high": None,
                              "double_low": None, "double_applies": False}
    s = float(np.std(dmeans, ddof=1)) if p >= 2 else math.nan
    if p < 3 or not s > 0:
        notes.append("Grubbs tests need 3 or more laboratories whose means differ")
        return out
    order = np.argsort(dmeans, kind="stable")
    xbar = float(dmeans.mean())
    g5, g1 = grubbs_single_critical(p, 0.05), grubbs_single_critical(p, 0.01)
    out["critical_single_5"], out["critical_single_1"] = g5, g1
    hi, lo = int(order[-1]), int(order[0])
    g_hi = (float(dmeans[hi]) - xbar) / s
    g_lo = (xbar - float(dmeans[lo])) / s
    c_hi, c_lo = classify_large(g_hi, g5, g1), classify_large(g_lo, g5, g1)
    out["high"] = {"lab": names[hi], "statistic": g_hi, "result": c_hi}
    out["low"] = {"lab": names[lo], "statistic": g_lo, "result": c_lo}
    # ISO 5725-2 §7.3.4 [from memory]: the double test is read only when the single test
    # finds no outlier at either end.
    out["double_applies"] = "outlier" not in (c_hi, c_lo)
    if p == 3:
        notes.append("with 3 laboratories Grubbs' test cannot flag: the largest G three means "
                     "can give, 2/sqrt(3) = 1.1547, is below the published critical value 1.155")
    if p < 4:
        return out
    d5, d1 = grubbs_double_critical(p, 0.05), grubbs_double_critical(p, 0.01)
    if d5 is None:
        notes.append(f"double Grubbs critical values are tabulated for 4-12 laboratories only; "
                     f"p = {p}: not available (statistics are still given)")
    out["critical_double_5"], out["critical_double_1"] = d5, d1
    ss0 = _ss(dmeans)
    for key, drop in (("double_high", order[-2:]), ("double_low", order[:2])):
        keep = np.ones(p, dtype=bool)
        keep[drop] = False
        g = _ss(dmeans[keep]) / ss0
        out[key] = {"labs": [names[int(i)] for i in sorted(drop.tolist())], "statistic": g,
                    "result": classify_small(g, d5, d1)}
    return out


def _ss(a: NDArray[np.float64]) -> float:
    m = float(a.mean())
    return math.fsum(((a - m) ** 2).tolist())


def mandel_h_indicator(p: int, alpha: float) -> float:
    """Return Mandel's h indicator for p laboratories at level alpha (two-sided, exact).

    h_c = (p-1) t / sqrt(p (p-2+t^2)), t the upper alpha/2 quantile of t with p-2 df.
    """
    t = t_isf(alpha / 2, p - 2)
    return (p - 1) * t / math.sqrt(p * (p - 2 + t * t))


def mandel_k_indicator(p: int, n: int, alpha: float) -> float:
    """Return Mandel's k indicator for p laboratories with n replicates at level alpha.

    k_c = sqrt(p / (1 + (p-1)/F)), F the upper alpha quantile of F(n-1, (p-1)(n-1)).
    """
    f = f_isf(alpha, n - 1, (p - 1) * (n - 1))
    return math.sqrt(p / (1 + (p - 1) / f))


def cochran_critical(p: int, n: int, alpha: float) -> float:
    """Return Cochran's C critical value for p cells of n replicates at level alpha.

    C_c = 1 / (1 + (p-1)/F), F the upper alpha/p quantile of F(n-1, (p-1)(n-1)).
    """
    f = f_isf(alpha / p, n - 1, (p - 1) * (n - 1))
    return 1.0 / (1.0 + (p - 1) / f)


def grubbs_single_critical(p: int, alpha: float) -> float:
    """Return the single Grubbs critical value for p values, two-sided at level alpha.

    G_c = ((p-1)/sqrt(p)) sqrt(t^2/(p-2+t^2)), t the upper alpha/(2p) quantile of t, p-2 df.
    """
    if p == 3:
        # The published tables print 1.155 at both levels (ISO 5725-2 Table 5 as
        # remembered; D. Harvey, Analytical Chemistry 2.0, App. 7). The exact values
        # (1.1543, 1.1547) lie a hair below the largest G three values can give,
        # 2/sqrt(3) = 1.15470, which two tied means reach: the exact value would call a
        # tie an outlier. We follow the printed table, so with 3 laboratories Grubbs'
        # test never flags.
        return _GRUBBS_P3
    t = t_isf(alpha / (2 * p), p - 2)
    return (p - 1) / math.sqrt(p) * math.sqrt(t * t / (p - 2 + t * t))


def grubbs_double_critical(p: int, alpha: float) -> float | None:
    """Return the tabulated double Grubbs critical value, or None outside p = 4..12."""
    return _double_table().get((p, round(alpha, 6)))


@lru_cache(maxsize=1)
def _double_table() -> dict[tuple[int, float], float]:
    from importlib import resources

    text = resources.files("planner.stats").joinpath("grubbs_double.csv").read_text("utf-8")
    rows = [ln for ln in text.splitlines() if ln.strip() and not ln.startswith("#")]
    table = {}
    for ln in rows[1:]:
        p, alpha, crit = ln.split(",")
        table[(int(p), round(float(alpha), 6))] = float(crit)
    return table


def simulate_grubbs_double(p: int, alpha: float, *, draws: int = 200_000,
                           seed: int = 0) -> float:
    """Return a Monte Carlo double Grubbs critical value (smaller of both ends), seeded.

    Simulates ``draws`` samples of p standard normals, takes for each the smaller of the
    two-largest and two-smallest ratios, and returns its alpha quantile.
    """
    import numpy as np

    rng = np.random.default_rng(seed)
    stat = np.empty(draws)
    step = max(1, 2_000_000 // p)
    for start in range(0, draws, step):
        x = np.sort(rng.standard_normal((min(step, draws - start), p)), axis=1)
        ss0 = ((x - x.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
        top = x[:, :-2]
        bottom = x[:, 2:]
        ss_hi = ((top - top.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
        ss_lo = ((bottom - bottom.mean(axis=1, keepdims=True)) ** 2).sum(axis=1)
        stat[start:start + x.shape[0]] = np.minimum(ss_hi, ss_lo) / ss0
    return float(np.quantile(stat, alpha))
