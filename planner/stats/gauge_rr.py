"""Gauge repeatability and reproducibility of a crossed round: ANOVA and average-and-range.

Layout: every material is tested by every laboratory the same number of times (trials);
AIAG MSA calls the materials "parts" and the laboratories "appraisers". Two methods:

- ``evaluate_anova``: the two-way crossed random-effects ANOVA with the material x
  laboratory term (AIAG MSA 4th ed., App. A; Montgomery, Design and Analysis of
  Experiments). When that term's p-value exceeds ``pool_alpha`` (default 0.25, the
  "sometimes-pooling" practice of Bancroft 1964) it is pooled into repeatability and the
  additive model is used; the result records which model was used.
- ``evaluate_range``: the average-and-range method of AIAG MSA 4th ed. (2010), with the
  published K1/K2/K3 constants (SD scale) and the D4 range control check.

Quantities (AIAG MSA names; ISO 5725 symbols where they match): EV, repeatability, the SD
of results within a laboratory (ISO 5725's s_r, here pooled over the materials); AV,
reproducibility, what the laboratories add (between laboratories and material x
laboratory); GRR = sqrt(EV^2 + AV^2), the SD of a single result from the measurement
alone (ISO 5725's s_R, pooled over the materials); PV, the SD between materials; TV =
sqrt(GRR^2 + PV^2), the SD of all results. Percentages come in three kinds:
``pct_variance`` (share of TV^2; the shares add up to 100), ``pct_tv`` (100 SD / TV, the
ratio of SDs that AIAG calls %EV, %AV, %GRR, %PV; any multiplier k cancels) and
``pct_tolerance`` (100 k SD / tolerance, with k = ``multiplier``, 6 by default: +-3 SD
holds 99.73 % of a normal distribution, the width AIAG MSA 4th ed. uses).

Both need balanced data: ``arrange_cells`` builds the materials x laboratories x trials
cube and returns a ``Skipped`` reason when a cell is missing or the cells hold different
numbers of trials. We skip rather than drop labs or trials, because discarding data to
force balance would silently change the reproducibility estimate; the ISO 5725-2 general
formulas (``iso5725_2``) handle unbalanced data per material.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from planner.stats._common import Skipped, f_sf, factorize, to_units

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import ArrayLike, NDArray

__all__ = [
    "SOURCE", "K1", "K2", "K3", "D4",
    "GaugeAnova", "RangeMethod", "GaugeStudy",
    "arrange_cells", "evaluate", "evaluate_anova", "evaluate_range",
]

SOURCE = ("AIAG, Measurement Systems Analysis (MSA), 4th ed., June 2010: ch. III section B "
          "(average-and-range method, constants K1/K2/K3, D4 range check) and appendix A "
          "(ANOVA method); pooling level after Bancroft (1964), Biometrics 20:427")

# AIAG MSA 4th ed. constants on the SD scale (K = 1/d2*), as published; not computed here.
# K1 by number of trials, K2 by number of laboratories (appraisers), K3 by number of
# materials (parts).
K1: Mapping[int, float] = {2: 0.8862, 3: 0.5908}
K2: Mapping[int, float] = {2: 0.7071, 3: 0.5231}
K3: Mapping[int, float] = {2: 0.7071, 3: 0.5231, 4: 0.4467, 5: 0.4030, 6: 0.3742,
                           7: 0.3534, 8: 0.3375, 9: 0.3249, 10: 0.3146}
# Range-chart factor D4 for subgroups of r trials (classical control-chart tables; the
# values as used in MSA are from memory).
D4: Mapping[int, float] = {2: 3.267, 3: 2.574}

_COMPONENTS = ("repeatability", "reproducibility", "laboratory", "material_x_laboratory", "grr",
               "material")


@dataclass(frozen=True, slots=True)
class GaugeAnova:
    """ANOVA gauge study: tables, the model used, SDs and percentages.

    ``table`` is the full model (material, laboratory, material_x_laboratory,
    repeatability, total), each row ``{ss, df, ms, f, p}``; ``pooled_table`` is the
    additive model when the material x laboratory term was pooled, else None.
    ``multiplier`` is the k of ``pct_tolerance`` (k SD against the tolerance width).
    """

    model: str
    pool_alpha: float
    table: Mapping[str, Mapping[str, float]]
    pooled_table: Mapping[str, Mapping[str, float]] | None
    variance: Mapping[str, float]
    repeatability_sd: float
    reproducibility_sd: float
    laboratory_sd: float
    material_x_laboratory_sd: float
    grr_sd: float
    material_sd: float
    total_sd: float
    pct_variance: Mapping[str, float]
    pct_tv: Mapping[str, float]
    pct_tolerance: Mapping[str, float] | None
    multiplier: float
    tolerance: float | None
    ndc: int | None
    materials: int
    laboratories: int
    trials: int


@dataclass(frozen=True, slots=True)
class RangeMethod:
    """Average-and-range gauge study (SD scale): EV, AV, GRR, PV, TV, percentages, ndc."""

    ev: float
    av: float
    grr: float
    pv: float
    tv: float
    pct_ev: float
    pct_av: float
    pct_grr: float
    pct_pv: float
    pct_tolerance: Mapping[str, float] | None
    ndc: int | None
    r_bar_bar: float
    x_diff: float
    r_p: float
    k1: float
    k2: float
    k3: float
    laboratory_means: Mapping[str, float]
    laboratory_r_bar: Mapping[str, float]
    range_check: Mapping[str, object]


@dataclass(frozen=True, slots=True)
class GaugeStudy:
    """Both methods on the same cube; each is a result or a ``Skipped`` reason."""

    anova: GaugeAnova | Skipped
    range: RangeMethod | Skipped


def arrange_cells(values: ArrayLike, materials: Sequence[Hashable],
                  laboratories: Sequence[Hashable]
                  ) -> tuple[NDArray[np.float64], list[Hashable], list[Hashable]] | Skipped:
    """Return the materials x laboratories x trials cube with the material and lab labels.

    Values of a cell keep their given order. Returns ``Skipped`` when a cell is empty or
    the cells hold different numbers of trials (the crossed design needs balance).
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    pc, plabels = factorize(materials)
    oc, olabels = factorize(laboratories)
    if not (x.size == pc.size == oc.size):
        raise ValueError("values, materials and laboratories differ in length")
    p, o = len(plabels), len(olabels)
    cell = pc * o + oc
    counts = np.bincount(cell, minlength=p * o)
    if counts.min() == 0:
        i = int(np.argmin(counts))
        return Skipped(f"the crossed design needs every laboratory on every material; "
                       f"{olabels[i % o]!r} has no result for {plabels[i // o]!r}")
    lo, hi = int(counts.min()), int(counts.max())
    if lo != hi:
        i, j = int(np.argmin(counts)), int(np.argmax(counts))
        return Skipped(f"the crossed design needs the same number of trials in every cell; "
                       f"found {lo} ({olabels[i % o]!r}, {plabels[i // o]!r}) to {hi} "
                       f"({olabels[j % o]!r}, {plabels[j // o]!r})")
    order = np.argsort(cell, kind="stable")
    return x[order].reshape(p, o, hi), plabels, olabels


def evaluate(cube: ArrayLike, *, tolerance: float | None = None, pool_alpha: float = 0.25,
             multiplier: float = 6.0, materials: Sequence[Hashable] | None = None,
             laboratories: Sequence[Hashable] | None = None) -> GaugeStudy:
    """Return both gauge studies (ANOVA and average-and-range) of a balanced cube."""
    return GaugeStudy(
        anova=evaluate_anova(cube, tolerance=tolerance, pool_alpha=pool_alpha,
                             multiplier=multiplier),
        range=evaluate_range(cube, tolerance=tolerance, multiplier=multiplier,
                             materials=materials, laboratories=laboratories))


def _check_cube(cube: ArrayLike) -> NDArray[np.float64] | Skipped:
    import numpy as np

    y = np.asarray(cube, dtype=np.float64)
    if y.ndim != 3:
        raise ValueError(f"expected a materials x laboratories x trials array, got {y.ndim} "
                         "dimensions")
    p, o, r = y.shape
    if not np.isfinite(y).all():
        return Skipped("the gauge study needs a complete cube; some cells are missing (NaN)")
    if p < 2 or o < 2 or r < 2:
        return Skipped(f"a gauge study needs at least 2 materials, 2 laboratories and 2 "
                       f"trials; found {p}, {o} and {r}")
    return y


def evaluate_anova(cube: ArrayLike, *, tolerance: float | None = None,
                   pool_alpha: float = 0.25, multiplier: float = 6.0) -> GaugeAnova | Skipped:
    """Return the crossed random-effects ANOVA gauge study, or ``Skipped`` for too little data.

    ``pool_alpha=1.0`` never pools the material x laboratory term. Negative variance
    estimates are set to 0 (each component separately).
    """
    y = _check_cube(cube)
    if isinstance(y, Skipped):
        return y
    p, o, r = y.shape
    # In steps of the reporting resolution from a data value (see _common.to_units):
    # sums of whole steps are exact and nothing depends on where the results lie.
    units = to_units(y)
    d = units.u.reshape(y.shape)
    grand = d.mean()
    mp = d.mean(axis=(1, 2))
    mo = d.mean(axis=(0, 2))
    mc = d.mean(axis=2)
    ss_p = o * r * math.fsum(((mp - grand) ** 2).tolist())
    ss_o = p * r * math.fsum(((mo - grand) ** 2).tolist())
    ss_po = r * math.fsum(((mc - mp[:, None] - mo[None, :] + grand) ** 2).ravel().tolist())
    ss_e = math.fsum(((d - mc[:, :, None]) ** 2).ravel().tolist())
    ss_t = math.fsum(((d - grand) ** 2).ravel().tolist())
    df_p, df_o, df_po, df_e = p - 1, o - 1, (p - 1) * (o - 1), p * o * (r - 1)
    ms_p, ms_o, ms_po, ms_e = ss_p / df_p, ss_o / df_o, ss_po / df_po, ss_e / df_e

    def row(ss: float, df: int, ms: float, denom: float | None, dfd: int) -> dict[str, float]:
        if denom is None:
            return {"ss": ss, "df": df, "ms": ms, "f": math.nan, "p": math.nan}
        f = ms / denom if denom > 0 else (math.inf if ms > 0 else math.nan)
        pv = f_sf(f, df, dfd) if math.isfinite(f) else (0.0 if f > 0 else math.nan)
        return {"ss": ss, "df": df, "ms": ms, "f": f, "p": pv}

    # Full model: materials and laboratories are tested against material x laboratory
    # (random effects).
    table = {
        "material": row(ss_p, df_p, ms_p, ms_po, df_po),
        "laboratory": row(ss_o, df_o, ms_o, ms_po, df_po),
        "material_x_laboratory": row(ss_po, df_po, ms_po, ms_e, df_e),
        "repeatability": row(ss_e, df_e, ms_e, None, 0),
        "total": {"ss": ss_t, "df": p * o * r - 1, "ms": math.nan, "f": math.nan, "p": math.nan},
    }
    p_inter = table["material_x_laboratory"]["p"]
    pooled = math.isfinite(p_inter) and p_inter > pool_alpha
    pooled_table = None
    if pooled:
        df_pool = df_po + df_e
        ms_pool = (ss_po + ss_e) / df_pool
        pooled_table = {
            "material": row(ss_p, df_p, ms_p, ms_pool, df_pool),
            "laboratory": row(ss_o, df_o, ms_o, ms_pool, df_pool),
            "repeatability": row(ss_po + ss_e, df_pool, ms_pool, None, 0),
            "total": dict(table["total"]),
        }
        v_e, v_po = ms_pool, 0.0
        v_o = max(0.0, (ms_o - ms_pool) / (p * r))
        v_p = max(0.0, (ms_p - ms_pool) / (o * r))
    else:
        v_e = ms_e
        v_po = max(0.0, (ms_po - ms_e) / r)
        v_o = max(0.0, (ms_o - ms_po) / (p * r))
        v_p = max(0.0, (ms_p - ms_po) / (o * r))
    variance = {"repeatability": v_e, "reproducibility": v_o + v_po, "laboratory": v_o,
                "material_x_laboratory": v_po, "grr": v_e + v_o + v_po, "material": v_p}
    variance["total"] = variance["grr"] + v_p
    sd_steps = {k: math.sqrt(v) for k, v in variance.items()}
    total_v = variance["total"]
    sd = {k: units.scale(v) for k, v in sd_steps.items()}
    total_sd = sd["total"]
    pct_variance = {k: _pct(variance[k], total_v) for k in _COMPONENTS}
    pct_tv = {k: _pct(sd_steps[k], sd_steps["total"]) for k in _COMPONENTS}
    pct_tol = None
    if tolerance is not None:
        pct_tol = {k: _pct(multiplier * sd[k], tolerance) for k in _COMPONENTS + ("total",)}

    def sq(v: float) -> float:
        return units.scale(units.scale(v))

    def in_values(rows: Mapping[str, Mapping[str, float]]) -> dict[str, dict[str, float]]:
        return {name: {**r, "ss": sq(r["ss"]), "ms": sq(r["ms"])} for name, r in rows.items()}

    return GaugeAnova(
        model="pooled" if pooled else "full", pool_alpha=pool_alpha, table=in_values(table),
        pooled_table=in_values(pooled_table) if pooled_table else None,
        variance={k: sq(v) for k, v in variance.items()},
        repeatability_sd=sd["repeatability"], reproducibility_sd=sd["reproducibility"],
        laboratory_sd=sd["laboratory"], material_x_laboratory_sd=sd["material_x_laboratory"],
        grr_sd=sd["grr"], material_sd=sd["material"], total_sd=total_sd,
        pct_variance=pct_variance, pct_tv=pct_tv, pct_tolerance=pct_tol, multiplier=multiplier,
        tolerance=tolerance, ndc=_ndc(sd_steps["material"], sd_steps["grr"]), materials=p,
        laboratories=o, trials=r)


def evaluate_range(cube: ArrayLike, *, tolerance: float | None = None,
                   multiplier: float = 6.0, materials: Sequence[Hashable] | None = None,
                   laboratories: Sequence[Hashable] | None = None) -> RangeMethod | Skipped:
    """Return the average-and-range gauge study, or ``Skipped`` outside the constants' table.

    The tables cover 2-3 trials, 2-3 laboratories (appraisers) and 2-10 materials (parts).
    """
    import numpy as np

    y = _check_cube(cube)
    if isinstance(y, Skipped):
        return y
    n, k, r = y.shape
    for what, count, table in (("trials", r, K1), ("laboratories", k, K2),
                               ("materials", n, K3)):
        if count not in table:
            return Skipped(f"the average-and-range constants cover {min(table)}-{max(table)} "
                           f"{what}, found {count}: see the ANOVA gauge study instead")
    mat_labels = [str(v) for v in (materials if materials is not None else range(1, n + 1))]
    lab_labels = [str(v) for v in (laboratories if laboratories is not None
                                   else range(1, k + 1))]
    units = to_units(y)  # steps from a data value: nothing depends on where results lie
    u = units.u.reshape(y.shape)
    sc = units.scale
    ranges = u.max(axis=2) - u.min(axis=2)          # materials x laboratories
    r_bar = ranges.mean(axis=0)                      # per laboratory
    r_bar_bar = float(r_bar.mean())
    x_bar = u.mean(axis=(0, 2))                      # laboratory averages
    x_diff = float(x_bar.max() - x_bar.min())
    mat_means = u.mean(axis=(1, 2))
    r_p = float(mat_means.max() - mat_means.min())
    k1, k2, k3 = K1[r], K2[k], K3[n]
    ev = r_bar_bar * k1
    # AV^2 = (X_DIFF K2)^2 - EV^2/(n r); a negative value means no detectable AV.
    av = math.sqrt(max(0.0, (x_diff * k2) ** 2 - ev ** 2 / (n * r)))
    grr = math.hypot(ev, av)
    pv = r_p * k3
    tv = math.hypot(grr, pv)
    ucl = D4[r] * r_bar_bar
    flagged = [{"material": mat_labels[i], "laboratory": lab_labels[j],
                "range": sc(float(ranges[i, j]))}
               for i, j in zip(*np.nonzero(ranges > ucl * (1 + 1e-9)))]
    pct_tol = None
    if tolerance is not None:
        pct_tol = {"ev": _pct(multiplier * sc(ev), tolerance),
                   "av": _pct(multiplier * sc(av), tolerance),
                   "grr": _pct(multiplier * sc(grr), tolerance),
                   "pv": _pct(multiplier * sc(pv), tolerance)}
    return RangeMethod(
        ev=sc(ev), av=sc(av), grr=sc(grr), pv=sc(pv), tv=sc(tv), pct_ev=_pct(ev, tv),
        pct_av=_pct(av, tv), pct_grr=_pct(grr, tv), pct_pv=_pct(pv, tv), pct_tolerance=pct_tol,
        ndc=_ndc(pv, grr), r_bar_bar=sc(r_bar_bar), x_diff=sc(x_diff), r_p=sc(r_p), k1=k1,
        k2=k2, k3=k3,
        laboratory_means={lab: units.value(v) for lab, v in zip(lab_labels, x_bar.tolist())},
        laboratory_r_bar={lab: sc(v) for lab, v in zip(lab_labels, r_bar.tolist())},
        range_check={"d4": D4[r], "ucl": sc(ucl), "flagged": flagged})


def _pct(part: float, whole: float | None) -> float:
    if whole is None or not whole > 0:
        return math.nan
    return 100.0 * part / whole


def _ndc(material_sd: float, grr_sd: float) -> int | None:
    # ndc = 1.41 PV/GRR truncated, never below 1 (AIAG MSA; truncation and floor from memory).
    if not grr_sd > 0:
        return None
    return max(1, math.trunc(1.41 * material_sd / grr_sd))
