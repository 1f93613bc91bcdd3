"""Homogeneity and stability of a batch of units (ISO 13528:2015/2022, Annex B).

Homogeneity (B.2-B.3): g units drawn at random from the batch, each measured m times
(m = 2, duplicates, is the usual design) under repeatability conditions, in random
order. With the unit means x̄_t and the within-unit variances s_t² (for duplicates
s_t² = w_t²/2, w_t = |x_t1 - x_t2|):

- s_x = SD of the g unit means (the general mean x̄ their mean);
- s_w = sqrt(Σ s_t² / g), the within-unit (repeatability) SD; the 2022 edition writes
  B.4 with s_t², which for duplicates equals the 2015 form sqrt(Σ w_t² / (2g));
- s_s = sqrt(max(0, s_x² - s_w²/m)), the between-unit SD. When s_x² < s_w²/m the
  estimate is forced to 0 (``s_s_forced_zero``), which happens by chance often in
  small checks; the report says so rather than claiming a perfect batch.

Criterion: s_s <= 0.3 sigma_pt. Extended criterion (B.2.3, duplicates only):
s_s² <= F1 sigma_allow² + F2 s_w², sigma_allow = 0.3 sigma_pt,
F1 = χ²_0.95(g-1)/(g-1), F2 = (F_0.95(g-1, g) - 1)/2, computed here from scipy's
distributions for the actual g; they reproduce the published table for g = 7..20
(tests/data/iso13528_homogeneity_f1_f2.csv). The method's repeatability should be
small against sigma_pt, s_w < 0.5 sigma_pt (ISO 13528 B.2, as METHODS.md records it);
above that the check has little power, and the verdict says so.

Stability (B.5): units kept to the end of the round (or sent through the transport
conditions) against the homogeneity mean: |ȳ_1 - ȳ_2| <= 0.3 sigma_pt, and the
criterion widened by the uncertainties of both means,
0.3 sigma_pt + 2 sqrt(u²(ȳ_1) + u²(ȳ_2)), u(ȳ) = s/sqrt(n) of each set.

Every function takes plain floats and returns a plain dict (JSON-ready), with None
for what cannot be computed and a ``why`` naming the reason.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

__all__ = ["evaluate", "SOURCE", "f1_f2", "homogeneity", "stability", "ALLOW_FACTOR",
           "MIN_UNITS"]

SOURCE = ("ISO 13528:2015 (2nd ed.) and ISO 13528:2022 (3rd ed.), Statistical methods for use "
          "in proficiency testing by interlaboratory comparison, Annex B: B.2-B.3 homogeneity "
          "(s_x, s_w, s_s, s_s <= 0.3 sigma_pt, extended criterion with F1 and F2), B.5 "
          "stability (|y1 - y2| <= 0.3 sigma_pt, widened by the uncertainties of the means)")

ALLOW_FACTOR = 0.3
"""sigma_allow = 0.3 sigma_pt (ISO 13528 B.2.2)."""
MIN_UNITS = 2
"""Fewest units that show any between-unit spread at all; 10 is ISO 13528's advice."""
_REPEATABILITY_LIMIT = 0.5  # s_w < 0.5 sigma_pt, else the check has little power


def f1_f2(g: int) -> tuple[float, float]:
    """Return (F1, F2) of the extended homogeneity criterion for g units in duplicate."""
    from scipy.stats import chi2, f

    if g < 2:
        raise ValueError("F1 and F2 need at least 2 units")
    return (float(chi2.ppf(0.95, g - 1) / (g - 1)),
            float((f.ppf(0.95, g - 1, g) - 1.0) / 2.0))


def homogeneity(replicates: Sequence[Sequence[float]], sigma_pt: float | None) -> dict[str, Any]:
    """Return the homogeneity check of units measured ``replicates[t]`` (m values each).

    ``sigma_pt`` may be None (not known yet): the figures are computed, the verdict is
    "waits". Raises ValueError for fewer than 2 units, fewer than 2 values on a unit, or
    units with different numbers of values.
    """
    g = len(replicates)
    if g < MIN_UNITS:
        raise ValueError(f"a homogeneity check needs at least {MIN_UNITS} units, found {g}")
    m = len(replicates[0])
    if m < 2 or any(len(r) != m for r in replicates):
        raise ValueError("every unit needs the same number of values, at least 2")
    means = [math.fsum(r) / m for r in replicates]
    mean = math.fsum(means) / g
    s_x2 = math.fsum((x - mean) ** 2 for x in means) / (g - 1)
    s_t2 = [math.fsum((v - mu) ** 2 for v in r) / (m - 1) for r, mu in zip(replicates, means)]
    s_w2 = math.fsum(s_t2) / g
    between2 = s_x2 - s_w2 / m
    out: dict[str, Any] = {
        "g": g, "m": m, "mean": mean, "s_x": math.sqrt(s_x2), "s_w": math.sqrt(s_w2),
        "s_s": math.sqrt(max(0.0, between2)), "s_s_forced_zero": between2 < 0,
        "sigma_pt": sigma_pt, "sigma_allow": None, "criterion": None, "passes": None,
        "F1": None, "F2": None, "c": None, "passes_extended": None,
        "repeatability_ok": None, "verdict": "waits", "why": None,
    }
    if m == 2:
        out["F1"], out["F2"] = f1_f2(g)
    if sigma_pt is None or not sigma_pt > 0:
        out["why"] = "no sigma_pt yet: the verdict waits for the round's sigma_pt"
        return out
    allow = ALLOW_FACTOR * sigma_pt
    out["sigma_allow"] = allow
    out["criterion"] = allow
    out["passes"] = out["s_s"] <= allow
    if m == 2:
        c = out["F1"] * allow ** 2 + out["F2"] * s_w2
        out["c"] = c
        out["passes_extended"] = max(0.0, between2) <= c
    out["repeatability_ok"] = out["s_w"] < _REPEATABILITY_LIMIT * sigma_pt
    if out["passes"]:
        out["verdict"] = "sufficiently homogeneous"
    elif out["passes_extended"]:
        out["verdict"] = "sufficiently homogeneous by the extended criterion"
    else:
        out["verdict"] = "not sufficiently homogeneous"
    if not out["repeatability_ok"]:
        out["why"] = (f"s_w = {out['s_w']:.3g} is not below 0.5 sigma_pt = "
                      f"{0.5 * sigma_pt:.3g}: the method's own scatter hides between-unit "
                      "differences, so a pass says little")
    return out


def evaluate(replicates: Sequence[Sequence[float]], sigma_pt: float | None) -> dict[str, Any]:
    """Return the homogeneity check (the module's method, as ``homogeneity``)."""
    return homogeneity(replicates, sigma_pt)


def stability(before: Sequence[float], after: Sequence[float],
              sigma_pt: float | None) -> dict[str, Any]:
    """Return the stability check: the mean of ``after`` (units tested after the round)
    against the mean of ``before`` (the homogeneity results, every value)."""
    if len(before) < 1 or len(after) < 1:
        raise ValueError("a stability check needs results before and after")
    y1 = math.fsum(before) / len(before)
    y2 = math.fsum(after) / len(after)

    def u_mean(values: Sequence[float], mu: float) -> float | None:
        if len(values) < 2:
            return None
        s2 = math.fsum((v - mu) ** 2 for v in values) / (len(values) - 1)
        return math.sqrt(s2 / len(values))

    u1, u2 = u_mean(before, y1), u_mean(after, y2)
    out: dict[str, Any] = {
        "n_before": len(before), "n_after": len(after), "mean_before": y1, "mean_after": y2,
        "difference": y2 - y1, "u_before": u1, "u_after": u2, "sigma_pt": sigma_pt,
        "criterion": None, "criterion_widened": None, "passes": None, "passes_widened": None,
        "verdict": "waits", "why": None,
    }
    if sigma_pt is None or not sigma_pt > 0:
        out["why"] = "no sigma_pt yet: the verdict waits for the round's sigma_pt"
        return out
    limit = ALLOW_FACTOR * sigma_pt
    out["criterion"] = limit
    out["passes"] = abs(y2 - y1) <= limit
    if u1 is not None and u2 is not None:
        out["criterion_widened"] = limit + 2.0 * math.sqrt(u1 ** 2 + u2 ** 2)
        out["passes_widened"] = abs(y2 - y1) <= out["criterion_widened"]
    else:
        out["why"] = "one side has a single result, so the uncertainty of its mean is unknown"
    if out["passes"]:
        out["verdict"] = "stable"
    elif out["passes_widened"]:
        out["verdict"] = "stable within the uncertainty of the means"
    else:
        out["verdict"] = "not stable"
    return out
