"""Proficiency-testing statistics (ISO 13528): robust mean and SD, assigned value, scores.

Algorithm A (ISO 13528:2015/2022 Annex C.3.1, the same algorithm as ISO 5725-5) gives
the robust mean x* and SD s* of the participants' results. The assigned value x_pt is
that consensus (u(x_pt) = 1.25 s*/sqrt(p), §7.7.3 [from memory]) or the mean of a
reference laboratory. sigma_pt is given by the caller or taken as s*. Scores:
z = (x - x_pt)/sigma_pt; z' = (x - x_pt)/sqrt(sigma_pt^2 + u^2(x_pt)), used in place of z
when u(x_pt) > 0.3 sigma_pt (§9.2.1 [from memory]); E_n = (x - x_pt)/sqrt(U^2(x) +
U^2(x_pt)) with expanded uncertainties (k = 2). Bands (ISO/IEC 17043 wording [from
memory]): |z| <= 2 satisfactory, 2 < |z| < 3 questionable, |z| >= 3 unsatisfactory;
|E_n| <= 1 satisfactory, else unsatisfactory.

Our choices, documented: Algorithm A is iterated to its fixed point (changes below
1e-12 relative), stricter than the standard's "third significant figure" stop. When
the starting MAD is 0 (more than half the results equal) the start falls back to the
sample SD, and the result says so. A laboratory with several results on a material
is scored on its mean; its U is the mean of the U values it reported. A reference
laboratory's u(x_pt) is U/2 from its reported U, else the SD of its mean (s/sqrt(n)).
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

from planner.errors import DataError
from planner.stats._common import Skipped, factorize

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import ArrayLike, NDArray

__all__ = ["SOURCE", "RobustEstimate", "Scores", "algorithm_a", "evaluate", "band_z", "band_en"]

SOURCE = ("ISO 13528:2015 (2nd ed.) and ISO 13528:2022 (3rd ed.), Statistical methods for use "
          "in proficiency testing by interlaboratory comparison: Annex C.3.1 (Algorithm A), "
          "§7.7.3 (u(x_pt) of a consensus), §9 (z, z', E_n); bands per ISO/IEC 17043:2010 B.4.1.1")

# Algorithm A constants: 1.483 ~ 1/Phi^-1(0.75); 1.134 ~ 1/SD of a standard normal
# winsorized at +-1.5; 1.5 is the winsorizing width in units of s*.
_MAD_FACTOR, _SD_FACTOR, _WIDTH = 1.483, 1.134, 1.5


@dataclass(frozen=True, slots=True)
class RobustEstimate:
    """Algorithm A result: robust mean ``x`` and SD ``s``.

    ``history`` holds (x*, s*) from the start (index 0) through every iteration; ``start``
    says how s* was started ("mad", or "sd" when the MAD was 0).
    """

    x: float
    s: float
    iterations: int
    converged: bool
    start: str
    history: tuple[tuple[float, float], ...]


@dataclass(frozen=True, slots=True)
class Scores:
    """Assigned value, its uncertainty, sigma_pt and per-laboratory scores for one material.

    ``labs`` maps lab -> {mean, z, z_prime, En, band, en_band}; ``band`` is read from z, or
    from z' when ``use_z_prime``.
    """

    assigned_value: float
    u_assigned_value: float | None
    robust_mean: float | None
    robust_sd: float | None
    sigma_pt: float | None
    sigma_pt_source: str
    method: str
    use_z_prime: bool
    p: int
    robust: RobustEstimate | None
    labs: Mapping[str, Mapping[str, object]]
    notes: tuple[str, ...]


def algorithm_a(values: ArrayLike, *, max_iterations: int = 1000,
                rtol: float = 1e-12) -> RobustEstimate:
    """Return the Algorithm A robust mean and SD of ``values`` (at least 2 finite values).

    Raises ValueError for fewer than 2 values.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    if x.size < 2:
        raise ValueError("Algorithm A needs at least 2 values")
    xs = float(np.median(x))
    s = _MAD_FACTOR * float(np.median(np.abs(x - xs)))
    start = "mad"
    if s == 0.0:
        # More than half the values equal the median: the MAD start stalls at s* = 0.
        s = float(np.std(x, ddof=1))
        start = "sd"
    history = [(xs, s)]
    if s == 0.0:
        return RobustEstimate(x=xs, s=0.0, iterations=0, converged=True, start=start,
                              history=tuple(history))
    converged = False
    it = 0
    while it < max_iterations:
        it += 1
        delta = _WIDTH * s
        w = np.clip(x, xs - delta, xs + delta)
        new_x = float(w.mean())
        new_s = _SD_FACTOR * float(np.std(w, ddof=1))
        history.append((new_x, new_s))
        scale = max(new_s, abs(new_x) * 1e-3, np.finfo(float).tiny)
        done = abs(new_x - xs) <= rtol * scale and abs(new_s - s) <= rtol * scale
        xs, s = new_x, new_s
        if done or s == 0.0:
            converged = True
            break
    return RobustEstimate(x=xs, s=s, iterations=it, converged=converged, start=start,
                          history=tuple(history))


def band_z(score: float | None) -> str | None:
    """Return 'satisfactory', 'questionable' or 'unsatisfactory' for a z or z' score."""
    if score is None or not math.isfinite(score):
        return None
    a = abs(score)
    if a <= 2.0:
        return "satisfactory"
    if a < 3.0:
        return "questionable"
    return "unsatisfactory"


def band_en(score: float | None) -> str | None:
    """Return 'satisfactory' (|E_n| <= 1) or 'unsatisfactory' for an E_n score."""
    if score is None or not math.isfinite(score):
        return None
    return "satisfactory" if abs(score) <= 1.0 else "unsatisfactory"


def evaluate(values: ArrayLike, labs: Sequence[Hashable], *,
             uncertainties: ArrayLike | None = None, sigma_pt: float | None = None,
             assigned: str = "consensus", reference_lab: Hashable | None = None,
             exclude_labs: Sequence[Hashable] = ()) -> Scores | Skipped:
    """Return the assigned value, sigma_pt and scores of every laboratory for one material.

    ``uncertainties`` are expanded (k = 2) per result, NaN where not given. ``assigned`` is
    "consensus" (Algorithm A over the labs not in ``exclude_labs``) or "reference" (the
    mean of ``reference_lab``). Returns ``Skipped`` when the data cannot give a value;
    raises DataError for an unknown ``assigned`` or a missing ``reference_lab``.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    codes, labels = factorize(labs)
    names = [str(v) for v in labels]
    p_all = len(names)
    n = np.bincount(codes, minlength=p_all).astype(np.float64)
    means = np.bincount(codes, weights=x, minlength=p_all) / n
    lab_u = _lab_uncertainty(uncertainties, codes, p_all)
    notes: list[str] = []

    robust: RobustEstimate | None = None
    if assigned == "consensus":
        excluded = {str(v) for v in exclude_labs}
        use = np.array([nm not in excluded for nm in names], dtype=bool)
        p = int(use.sum())
        if p < 2:
            return Skipped(f"a consensus value needs results from 2 or more laboratories; "
                           f"found {p} (after exclusions)")
        robust = algorithm_a(means[use])
        if robust.start == "sd":
            notes.append("Algorithm A: MAD was 0 (most results equal); started from the sample SD")
        x_pt = robust.x
        u_pt: float | None = 1.25 * robust.s / math.sqrt(p)
        method = "consensus of participants (Algorithm A)"
        if excluded:
            method += f", excluding {', '.join(sorted(excluded))}"
    elif assigned == "reference":
        ref = str(reference_lab) if reference_lab is not None else None
        if ref is None:
            raise DataError("assigned value 'reference' needs a reference laboratory; "
                            "name one, or use 'consensus'")
        if ref not in names:
            return Skipped(f"reference laboratory {ref!r} has no result for this material")
        i = names.index(ref)
        p = p_all
        x_pt = float(means[i])
        vals = x[codes == i]
        if math.isfinite(lab_u[i]):
            u_pt = float(lab_u[i]) / 2.0
        elif vals.size >= 2:
            u_pt = float(np.std(vals, ddof=1)) / math.sqrt(vals.size)
            notes.append(f"u(x_pt) from the SD of the mean of {ref!r} ({vals.size} results); "
                         "it reported no uncertainty")
        else:
            u_pt = None
            notes.append(f"u(x_pt) unknown: {ref!r} has one result and reported no uncertainty")
        method = f"reference laboratory {ref!r}"
        if len(means) >= 2:
            robust = algorithm_a(means)
    else:
        raise DataError(f"assigned value method {assigned!r} is unknown; "
                        "use 'consensus' or 'reference'")

    if sigma_pt is not None:
        sig: float | None = float(sigma_pt)
        sig_source = "given"
    elif robust is not None:
        sig, sig_source = robust.s, "robust SD of participants (Algorithm A)"
    else:
        sig, sig_source = None, "not available"
    if sig is not None and not sig > 0:
        notes.append(f"sigma_pt is {sig!r}: z scores cannot be computed")
        sig = None
    use_zp = bool(sig is not None and u_pt is not None and u_pt > 0.3 * sig)
    if use_zp:
        notes.append("u(x_pt) > 0.3 sigma_pt: bands are read from z'")

    dev = means - x_pt
    z = dev / sig if sig is not None else np.full(p_all, np.nan)
    if use_zp:
        zp = dev / math.sqrt(sig * sig + u_pt * u_pt)  # type: ignore[operator]
    else:
        zp = np.full(p_all, np.nan)
    if u_pt is not None:
        with np.errstate(invalid="ignore"):
            en = dev / np.sqrt(lab_u ** 2 + (2.0 * u_pt) ** 2)
    else:
        en = np.full(p_all, np.nan)
    scores = {}
    for i, name in enumerate(names):
        zi, zpi, eni = _f(z[i]), _f(zp[i]), _f(en[i])
        scores[name] = {"mean": float(means[i]), "n": int(n[i]), "z": zi, "z_prime": zpi,
                        "En": eni, "band": band_z(zpi if use_zp else zi),
                        "en_band": band_en(eni)}
    return Scores(
        assigned_value=x_pt, u_assigned_value=u_pt,
        robust_mean=robust.x if robust else None, robust_sd=robust.s if robust else None,
        sigma_pt=sig, sigma_pt_source=sig_source, method=method, use_z_prime=use_zp, p=p,
        robust=robust, labs=scores, notes=tuple(notes))


def _f(v: float) -> float | None:
    v = float(v)
    return v if math.isfinite(v) else None


def _lab_uncertainty(uncertainties: ArrayLike | None, codes: NDArray[np.intp],
                     p: int) -> NDArray[np.float64]:
    import numpy as np

    if uncertainties is None:
        return np.full(p, np.nan)
    u = np.asarray(uncertainties, dtype=np.float64).ravel()
    ok = np.isfinite(u)
    cnt = np.bincount(codes[ok], minlength=p)
    tot = np.bincount(codes[ok], weights=u[ok], minlength=p)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(cnt > 0, tot / np.maximum(cnt, 1), np.nan)
