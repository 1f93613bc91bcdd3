"""Proficiency-testing statistics (ISO 13528): robust mean and SD, assigned value, scores.

Algorithm A (ISO 13528:2015/2022 Annex C.3.1, the same algorithm as ISO 5725-5) gives
the robust mean x* and SD s* of the participants' results. The assigned value x_pt is
that consensus (u(x_pt) = 1.25 s*/sqrt(p), §7.7.3 [from memory]), the mean of a
reference laboratory, or a value known from outside the round with its standard
uncertainty u(x_pt) (§7.3-7.5: a formulation, a certified reference value, a reference
value; ``Known``), which every participant is scored against. Scores: z = (x -
x_pt)/sigma_pt; z' = (x - x_pt)/sqrt(sigma_pt^2 + u^2(x_pt)), used in place of z when
u(x_pt) > 0.3 sigma_pt (§9.2.1 [from memory]);
E_n = (x - x_pt)/sqrt(U^2(x) + U^2(x_pt)) with expanded uncertainties (k = 2); the
difference D = x - x_pt and D% = 100 D / x_pt (§9.3 [from memory]), which need no
sigma_pt. Bands (ISO/IEC 17043 wording [from memory]): |z| <= 2 satisfactory,
2 < |z| < 3 questionable, |z| >= 3 unsatisfactory; |E_n| <= 1 satisfactory, else
unsatisfactory.

sigma_pt follows a policy (``SigmaPt``), the approaches of ISO 13528:2022 clause 8
(titles confirmed from its table of contents, formulas from memory): a fixed value
(fitness for purpose, §8.2), a percentage of the assigned value (a general model,
§8.4), the precision of a previous collaborative study (§8.5: sigma_pt^2 = sigma_R^2 -
(1 - 1/n) sigma_r^2 for a laboratory mean of n results), or the participants' robust
SD (§8.6). ISO 13528:2022 §5.4 treats small numbers of participants (title confirmed;
its advice from memory: estimates from few participants are unreliable, prefer values
from outside the round). With Algorithm A, four or fewer participants can never reach
|z| = 2 against their own robust SD, nor |z'| = 2 against their own consensus whatever
sigma_pt is (see ``MIN_CONSENSUS``), and below ``MIN_PARTICIPANTS`` the robust SD finds
a biased laboratory far less often than a fixed sigma_pt does
(tests/benchmarks/bench_verdicts.py). So a consensus of fewer than ``MIN_CONSENSUS``
participants, or a participants' sigma_pt from fewer than ``MIN_PARTICIPANTS``, gives
no z or E_n band, and the result says why.

Our choices, documented:

- Results are worked in steps of their reporting resolution (``_common.to_units``),
  so that means equal in decimal are equal in binary (the mean of 1.1 and 1.3 *is*
  1.2), and a shift of every result by a constant or a scaling by a power of ten
  changes no score.
- Algorithm A iterates on values centred on their median and stops when neither x*
  nor s* changes by more than 1e-12 s* (stricter than the standard's "third
  significant figure"). When the starting MAD is 0 (more than half the results
  equal) it starts from the sample SD and says so. When s* then falls to 0 (most
  results equal, the rest winsorized ever closer), the estimate is marked
  ``collapsed``: a robust SD of 0 is no scale to score against.
- A sigma_pt below half the reporting step gives no band: a difference of one reported
  digit would then be more than 2 sigma_pt. The step is the measurand's declared
  ``resolution`` where the study gives one; otherwise the finest digit any result of
  the material shows, so that a laboratory that reports coarser than the others carries
  its own rounding in its score. Band edges allow a relative 1e-9 for floating-point
  noise, so a score that is exactly 2 in decimal stays satisfactory.
- A laboratory with several results on a material is scored on its mean; its U is the
  mean of the U values it reported. A reference laboratory's u(x_pt) is U/2 from its
  reported U, else the SD of its mean (s/sqrt(n)). The reference laboratory is not
  scored against itself; its entry says ``reference``.
- A known value is used as given: E_n takes U(x_pt) = 2 u(x_pt), and z' replaces z when
  u(x_pt) > 0.3 sigma_pt, as for a consensus. Algorithm A still runs over the
  laboratories' means, for a sigma_pt from the participants and for comparison.
"""

from __future__ import annotations

import math
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING, Literal

from planner.errors import DataError
from planner.stats._common import Skipped, Units, factorize, majority, to_units

if TYPE_CHECKING:
    import numpy as np
    from numpy.typing import ArrayLike, NDArray

__all__ = ["SOURCE", "KNOWN_SOURCE", "MIN_PARTICIPANTS", "MIN_CONSENSUS", "SigmaPt", "Known",
           "RobustEstimate", "Scores", "algorithm_a", "evaluate", "band_z", "band_en",
           "ASSIGNED"]

SOURCE = ("ISO 13528:2015 (2nd ed.) and ISO 13528:2022 (3rd ed.), Statistical methods for use "
          "in proficiency testing by interlaboratory comparison: Annex C.3.1 (Algorithm A), "
          "§5.4 (small numbers of participants), §7.7.3 (u(x_pt) of a consensus), §8 "
          "(sigma_pt), §9 (D, D%, z, z', E_n); bands per ISO/IEC 17043:2010 B.4.1.1")

KNOWN_SOURCE = ("ISO 13528:2015/2022 §7.3-7.5: an assigned value known from outside the round "
                "(formulation, certified reference material, reference value) with its standard "
                "uncertainty u(x_pt); E_n takes U(x_pt) = 2 u(x_pt)")
"""Named among the sources only where a known value was used."""

ASSIGNED = ("consensus", "reference", "known")
"""Where an assigned value can come from: the participants' consensus, a reference
laboratory's mean, or a value known from outside the round (``Known``)."""

MIN_PARTICIPANTS = 8
"""Fewest participants whose robust SD may serve as sigma_pt with bands.

Eight is the lower end of the 8-15 laboratories ISO 5725-1:1994 §6.3.4 gives as
practical for a precision experiment (as cited by ISO/TR 21074:2016). The simulation in
tests/benchmarks/bench_verdicts.py backs it: a laboratory 4 sigma_pt off is flagged
against the participants' own robust SD in 14 % of 5-laboratory rounds where a fixed
sigma_pt flags it in 52 %, and in 69 % of 8-laboratory rounds against 89 %.
"""

MIN_CONSENSUS = 5
"""Fewest participants whose Algorithm A consensus may serve as the assigned value with bands.

With p - 1 equal values and one far away, a winsorizing step multiplies s* by
1.134 x 1.5 x sqrt(p) / (p - 1), which is 1 or more for p <= 4: s* then grows with the
far value, which is never set aside, and pulls x* and u(x_pt) after it. Against such a
consensus a laboratory any distance off never gets past |z'| = 1.41 with 3 participants
or 2.12 with 4, whatever sigma_pt is (tests/stats/test_verdicts.py,
tests/benchmarks/bench_verdicts.py). Smaller rounds need a reference laboratory for the
assigned value.
"""

# Algorithm A constants: 1.483 ~ 1/Phi^-1(0.75); 1.134 ~ 1/SD of a standard normal
# winsorized at +-1.5; 1.5 is the winsorizing width in units of s*.
_MAD_FACTOR, _SD_FACTOR, _WIDTH = 1.483, 1.134, 1.5
_RTOL = 1e-12  # stop when x* and s* move by less than this share of s*
_SLACK = 1e-9  # relative allowance at band edges for floating-point noise
_EPS = 2.0 ** -52


@dataclass(frozen=True, slots=True)
class SigmaPt:
    """How sigma_pt is set for a material.

    ``kind`` is "fixed" (``value``, fitness for purpose), "percent" (``percent`` of the
    assigned value), "precision" (``sigma_R`` and ``sigma_r`` of a collaborative study)
    or "participants" (the robust SD s*, with bands from ``min_participants`` on).
    """

    kind: Literal["fixed", "percent", "precision", "participants"] = "participants"
    value: float | None = None
    percent: float | None = None
    sigma_R: float | None = None
    sigma_r: float | None = None
    min_participants: int = MIN_PARTICIPANTS

    def __post_init__(self) -> None:
        need = {"fixed": ("value",), "percent": ("percent",),
                "precision": ("sigma_R", "sigma_r"), "participants": ()}
        if self.kind not in need:
            raise DataError(f"sigma_pt policy {self.kind!r} is unknown; use fixed, percent, "
                            "precision or participants")
        for name in need[self.kind]:
            v = getattr(self, name)
            if v is None or not math.isfinite(v) or not v > 0:
                raise DataError(f"sigma_pt policy {self.kind!r} needs {name} > 0, got {v!r}")
        if self.kind == "precision" and self.sigma_R < self.sigma_r:  # type: ignore[operator]
            raise DataError(f"sigma_R = {self.sigma_R!r} is smaller than sigma_r = "
                            f"{self.sigma_r!r}; reproducibility includes repeatability")
        if self.min_participants < 2:
            raise DataError(f"min_participants is {self.min_participants}; it must be 2 or more")

    def describe(self) -> str:
        """Return one line saying where sigma_pt comes from."""
        if self.kind == "fixed":
            return f"fixed at {self.value:g} (fitness for purpose)"
        if self.kind == "percent":
            return f"{self.percent:g} % of the assigned value"
        if self.kind == "precision":
            return (f"from a precision study: sigma_R = {self.sigma_R:g}, sigma_r = "
                    f"{self.sigma_r:g}, sqrt(sigma_R^2 - (1 - 1/n) sigma_r^2)")
        return "robust SD of the participants (Algorithm A)"


@dataclass(frozen=True, slots=True)
class Known:
    """An assigned value known from outside the round: ``value``, its standard uncertainty
    ``u`` and where it comes from (ISO 13528 §7.3-7.5: a formulation, a certified reference
    material, a reference value)."""

    value: float
    u: float
    source: str = ""

    def __post_init__(self) -> None:
        if not math.isfinite(self.value):
            raise DataError(f"the known value {self.value!r} is not a finite number")
        if not (math.isfinite(self.u) and self.u >= 0):
            raise DataError(f"the standard uncertainty {self.u!r} of the known value "
                            f"{self.value!r} must be a finite number, 0 or more")

    def describe(self) -> str:
        """Return one line naming the value, its u and its source."""
        return (f"known value {self.value!r} with u = {self.u!r}"
                + (f" ({self.source})" if self.source else ""))


@dataclass(frozen=True, slots=True)
class Widen:
    """A between-unit SD or an instability of the items that is not negligible, and where
    it goes (ISO 13528:2022 §6.1 and B.2-B.3, as METHODS §4 records them): ``into``
    "sigma_pt" gives sigma'_pt = sqrt(sigma_pt² + sd²), "uncertainty" gives
    u'(x_pt) = sqrt(u(x_pt)² + sd²). ``why`` says what ``sd`` holds (s_s, u_stab)."""

    into: Literal["sigma_pt", "uncertainty"]
    sd: float
    why: str

    def __post_init__(self) -> None:
        if self.into not in ("sigma_pt", "uncertainty"):
            raise DataError(f"the items' variation goes into 'sigma_pt' or 'uncertainty', "
                            f"not {self.into!r}")
        if not (math.isfinite(self.sd) and self.sd >= 0):
            raise DataError(f"the items' SD {self.sd!r} must be a finite number, 0 or more")


@dataclass(frozen=True, slots=True)
class RobustEstimate:
    """Algorithm A result: robust mean ``x`` and SD ``s``.

    ``history`` holds (x*, s*) from the start (index 0) through every iteration; ``start``
    says how s* was started ("mad", or "sd" when the MAD was 0); ``collapsed`` is True
    when s* fell to 0 (most values equal), so that it cannot serve as a scale.
    """

    x: float
    s: float
    iterations: int
    converged: bool
    start: str
    history: tuple[tuple[float, float], ...]
    collapsed: bool = False


@dataclass(frozen=True, slots=True)
class Scores:
    """Assigned value, its uncertainty, sigma_pt and per-laboratory scores for one material.

    ``labs`` maps lab -> {mean, n, D, D_percent, z, z_prime, En, band, en_band} (and
    ``reference: True`` for the reference laboratory, which is not scored); ``band`` is
    read from z, or from z' when ``use_z_prime``. When ``banded`` is False no z, z' or
    band is given and ``no_band`` says why in one sentence.
    """

    assigned_value: float
    u_assigned_value: float | None
    robust_mean: float | None
    robust_sd: float | None
    sigma_pt: float | None
    sigma_pt_source: str
    sigma_pt_policy: str
    method: str
    use_z_prime: bool
    banded: bool
    no_band: str | None
    p: int
    resolution: float | None
    robust: RobustEstimate | None
    labs: Mapping[str, Mapping[str, object]]
    notes: tuple[str, ...]


def _iterate(d: NDArray[np.float64], *, max_iterations: int) -> RobustEstimate:
    """Algorithm A on values ``d`` already centred near their median."""
    import numpy as np

    # Differences below this are floating-point noise of the data's magnitude, not data.
    tie = 64 * _EPS * float(np.abs(d).max(initial=0.0))
    xs = float(np.median(d))
    mad = float(np.median(np.abs(d - xs)))
    s = _MAD_FACTOR * mad if mad > tie else 0.0
    start = "mad"
    if s == 0.0:
        # More than half the values equal the median: the MAD start stalls at s* = 0.
        sd = float(np.std(d, ddof=1))
        s = sd if sd > tie else 0.0
        start = "sd"
    history = [(xs, s)]
    if s == 0.0:
        return RobustEstimate(x=xs, s=0.0, iterations=0, converged=True, start=start,
                              history=tuple(history), collapsed=True)
    it = 0
    while it < max_iterations:
        it += 1
        delta = _WIDTH * s
        w = np.clip(d, xs - delta, xs + delta)
        new_x = float(w.mean())
        new_s = _SD_FACTOR * float(np.std(w, ddof=1))
        history.append((new_x, new_s))
        if new_s <= tie:
            return RobustEstimate(x=new_x, s=0.0, iterations=it, converged=True, start=start,
                                  history=tuple(history), collapsed=True)
        done = abs(new_x - xs) <= _RTOL * new_s and abs(new_s - s) <= _RTOL * new_s
        xs, s = new_x, new_s
        if done:
            return RobustEstimate(x=xs, s=s, iterations=it, converged=True, start=start,
                                  history=tuple(history))
    return RobustEstimate(x=xs, s=s, iterations=it, converged=False, start=start,
                          history=tuple(history))


def algorithm_a(values: ArrayLike, *, max_iterations: int = 1000) -> RobustEstimate:
    """Return the Algorithm A robust mean and SD of ``values`` (at least 2 finite values).

    The iteration runs on the values centred on their median, so that its stop rule and
    result do not depend on where the values lie. Raises ValueError for fewer than 2.
    """
    import numpy as np

    x = np.asarray(values, dtype=np.float64).ravel()
    if x.size < 2:
        raise ValueError("Algorithm A needs at least 2 values")
    centre = float(np.sort(x)[(x.size - 1) // 2])
    est = _iterate(x - centre, max_iterations=max_iterations)
    return RobustEstimate(x=centre + est.x, s=est.s, iterations=est.iterations,
                          converged=est.converged, start=est.start,
                          history=tuple((centre + a, b) for a, b in est.history),
                          collapsed=est.collapsed)


def band_z(score: float | None) -> str | None:
    """Return 'satisfactory', 'questionable' or 'unsatisfactory' for a z or z' score."""
    if score is None or not math.isfinite(score):
        return None
    a = abs(score)
    if a <= 2.0 * (1 + _SLACK):
        return "satisfactory"
    if a < 3.0 * (1 - _SLACK):
        return "questionable"
    return "unsatisfactory"


def band_en(score: float | None) -> str | None:
    """Return 'satisfactory' (|E_n| <= 1) or 'unsatisfactory' for an E_n score."""
    if score is None or not math.isfinite(score):
        return None
    return "satisfactory" if abs(score) <= 1.0 * (1 + _SLACK) else "unsatisfactory"


def _policy(sigma_pt: float | SigmaPt | None) -> SigmaPt:
    if sigma_pt is None:
        return SigmaPt()
    if isinstance(sigma_pt, SigmaPt):
        return sigma_pt
    return SigmaPt("fixed", value=float(sigma_pt))


def evaluate(values: ArrayLike, labs: Sequence[Hashable], *,
             uncertainties: ArrayLike | None = None, sigma_pt: float | SigmaPt | None = None,
             assigned: str = "consensus", reference_lab: Hashable | None = None,
             exclude_labs: Sequence[Hashable] = (), known: Known | None = None,
             resolution: float | None = None, widen: Widen | None = None) -> Scores | Skipped:
    """Return the assigned value, sigma_pt and scores of every laboratory for one material.

    ``uncertainties`` are expanded (k = 2) per result, NaN where not given. ``sigma_pt``
    is a ``SigmaPt`` policy, a number (fixed) or None (the participants' robust SD).
    ``assigned`` is "consensus" (Algorithm A over the labs not in ``exclude_labs``),
    "reference" (the mean of ``reference_lab``) or "known" (``known``: a value from
    outside the round and its standard uncertainty). ``resolution`` is the declared step
    results are reported in; without it the step is read from the data. ``widen``: a
    between-unit SD or instability of the items that is not negligible, added to sigma_pt
    or to u(x_pt) (``Widen``). Returns
    ``Skipped`` when the data cannot give an assigned value; raises DataError for an
    unknown ``assigned``, a missing ``reference_lab`` name or known value, or a bad policy.
    """
    import numpy as np

    policy = _policy(sigma_pt)
    x = np.asarray(values, dtype=np.float64).ravel()
    codes, labels = factorize(labs)
    names = [str(v) for v in labels]
    p_all = len(names)
    units = to_units(x)
    n = np.bincount(codes, minlength=p_all).astype(np.float64)
    # Means in steps: sums of whole steps are exact, so equal decimal means are equal.
    means = np.bincount(codes, weights=units.u, minlength=p_all) / n
    lab_u = np.array([units.steps(v) for v in _lab_uncertainty(uncertainties, codes, p_all)])
    notes: list[str] = []

    robust: RobustEstimate | None = None
    ref: str | None = None
    if assigned == "consensus":
        excluded = {str(v) for v in exclude_labs}
        use = np.array([nm not in excluded for nm in names], dtype=bool)
        p = int(use.sum())
        if p < 2:
            return Skipped(f"a consensus value needs results from 2 or more laboratories; "
                           f"found {p} (after exclusions)")
        robust = _iterate(means[use], max_iterations=1000)
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
            others = ", ".join(names[:6]) + (", ..." if len(names) > 6 else "")
            return Skipped(f"the reference laboratory {ref!r} has no result for this material; "
                           f"name another reference laboratory ({others}) or use the "
                           "consensus of participants")
        i = names.index(ref)
        p = p_all
        x_pt = float(means[i])
        vals = units.u[codes == i]
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
            robust = _recentred(means)
    elif assigned == "known":
        if known is None:
            raise DataError("assigned value 'known' needs the known value and its standard "
                            "uncertainty")
        p = p_all
        x_pt = units.location(float(known.value))
        u_pt = units.steps(float(known.u))
        method = "known value" + (f" ({known.source})" if known.source else "")
        if len(means) >= 2:
            robust = _recentred(means)
    else:
        raise DataError(f"assigned value method {assigned!r} is unknown; "
                        "use 'consensus', 'reference' or 'known'")
    if robust is not None and robust.start == "sd":
        notes.append("Algorithm A: MAD was 0 (most results equal); started from the sample SD")
    if robust is not None and not robust.converged:
        notes.append(f"Algorithm A did not settle in {robust.iterations} iterations; "
                     "x* and s* are its last values")

    # A known value is reported as given, not as it comes back from steps.
    x_pt_value = float(known.value) if assigned == "known" and known else units.value(x_pt)
    sig, no_band = _sigma(policy, units, robust, p=p, x_pt=x_pt_value,
                          n=majority(n.astype(int).tolist()))
    widened_u = False
    if widen is not None and widen.sd > 0:
        extra = units.steps(float(widen.sd))
        if widen.into == "sigma_pt" and policy.kind == "participants":
            notes.append(f"{widen.why} is not added to sigma_pt: the participants' robust SD "
                         "already holds the differences between units (ISO 13528 B.2)")
        elif widen.into == "sigma_pt" and sig is not None:
            sig = math.sqrt(sig * sig + extra * extra)
            notes.append(f"sigma_pt widened by {widen.why}: sqrt(sigma_pt² + "
                         f"{units.scale(extra):.3g}²)")
        elif widen.into == "uncertainty":
            u_pt = math.sqrt((u_pt or 0.0) ** 2 + extra * extra)
            widened_u = True
            notes.append(f"u(x_pt) widened by {widen.why}: sqrt(u(x_pt)² + "
                         f"{units.scale(extra):.3g}²)")
    weak_consensus = assigned == "consensus" and p < MIN_CONSENSUS
    if weak_consensus:
        no_band = (f"the assigned value is the consensus of only {p} participants, and "
                   f"Algorithm A cannot set a stray result aside among fewer than "
                   f"{MIN_CONSENSUS}, so a laboratory any distance off could look "
                   "satisfactory; name a reference laboratory for the assigned value to have "
                   "bands")
    sig_source = policy.describe()
    if resolution is not None:
        # The declared step decides, not the finest digit some laboratory happened to write.
        floor = 0.5 * units.steps(float(resolution))
        if units.exact and units.step < float(resolution) * (1 - _SLACK):
            notes.append(f"results are reported to {_step(units)}, finer than the declared "
                         f"resolution {_decimal(float(resolution))}")
    else:
        floor = units.band_floor
    if sig is not None and sig < floor * (1 - _SLACK):
        no_band = (f"sigma_pt = {units.scale(sig):.3g} is less than half the declared "
                   f"resolution ({_decimal(float(resolution))}), so a difference of one "
                   "reported digit would decide the band" if resolution is not None else
                   f"sigma_pt = {units.scale(sig):.3g} is less than half the step the results "
                   f"are reported to ({_step(units)}), so a difference of one reported digit "
                   "would decide the band")
    banded = no_band is None
    use_zp = bool(banded and sig is not None and u_pt is not None and u_pt > 0.3 * sig)
    if use_zp:
        notes.append("u(x_pt) > 0.3 sigma_pt: bands are read from z'")

    dev = means - x_pt
    nan = np.full(p_all, np.nan)
    z = dev / sig if banded and sig else nan
    zp = dev / math.sqrt(sig * sig + u_pt * u_pt) if use_zp else nan  # type: ignore[operator]
    if u_pt is not None and not weak_consensus:
        with np.errstate(invalid="ignore", divide="ignore"):
            en = dev / np.sqrt(lab_u ** 2 + (2.0 * u_pt) ** 2)
    else:
        en = nan
    scores: dict[str, dict[str, object]] = {}
    for i, name in enumerate(names):
        d_value = units.scale(float(dev[i]))
        entry: dict[str, object] = {
            "mean": units.value(float(means[i])), "n": int(n[i]), "D": d_value,
            "D_percent": 100.0 * d_value / abs(x_pt_value) if x_pt_value != 0 else None}
        if name == ref:
            entry.update(z=None, z_prime=None, En=None, band=None, en_band=None,
                         reference=True)
        else:
            zi, zpi, eni = _f(z[i]), _f(zp[i]), _f(en[i])
            entry.update(z=zi, z_prime=zpi, En=eni, band=band_z(zpi if use_zp else zi),
                         en_band=band_en(eni))
        scores[name] = entry
    return Scores(
        assigned_value=x_pt_value,
        u_assigned_value=(float(known.u) if assigned == "known" and known and not widened_u
                          else units.scale(u_pt) if u_pt is not None else None),
        robust_mean=units.value(robust.x) if robust else None,
        robust_sd=units.scale(robust.s) if robust else None,
        sigma_pt=units.scale(sig) if sig is not None else None, sigma_pt_source=sig_source,
        sigma_pt_policy=policy.kind, method=method, use_z_prime=use_zp, banded=banded,
        no_band=no_band, p=p,
        resolution=(float(resolution) if resolution is not None
                    else units.step if units.exact else None),
        robust=_in_values(robust, units) if robust else None, labs=scores, notes=tuple(notes))


def _step(units: Units) -> str:
    return f"{units.step:.{max(units.decimals, 0)}f}" if units.exact else repr(units.step)


def _decimal(v: float) -> str:
    """Return a step as plain decimals (0.00001, not 1e-05)."""
    from decimal import Decimal

    return format(Decimal(repr(v)).normalize(), "f")


def _recentred(means: NDArray[np.float64]) -> RobustEstimate:
    """Algorithm A on laboratory means in steps, centred on their median first."""
    import numpy as np

    centre = float(np.median(means))
    robust = _iterate(means - centre, max_iterations=1000)
    return RobustEstimate(x=robust.x + centre, s=robust.s, iterations=robust.iterations,
                          converged=robust.converged, start=robust.start,
                          history=robust.history, collapsed=robust.collapsed)


def _sigma(policy: SigmaPt, units: Units, robust: RobustEstimate | None, *, p: int,
           x_pt: float, n: int) -> tuple[float | None, str | None]:
    """Return sigma_pt in steps (None if there is none) and the reason for no band, if any."""
    if policy.kind == "fixed":
        return units.steps(float(policy.value)), None  # type: ignore[arg-type]
    if policy.kind == "percent":
        if x_pt == 0:
            return None, ("sigma_pt is a percentage of the assigned value, which is 0, so no "
                          "z score can be computed")
        return units.steps(float(policy.percent) / 100.0 * abs(x_pt)), None  # type: ignore[arg-type]
    if policy.kind == "precision":
        big, small = float(policy.sigma_R), float(policy.sigma_r)  # type: ignore[arg-type]
        return units.steps(math.sqrt(big * big - (1.0 - 1.0 / max(n, 1)) * small * small)), None
    if robust is None:
        return None, "no robust SD of the participants could be computed"
    if p < policy.min_participants:
        return None, (f"sigma_pt would be the robust SD of only {p} participants, and fewer "
                      f"than {policy.min_participants} cannot support bands (ISO 13528 §5.4); "
                      "set a sigma_pt for the study (a fixed value, a percentage or a "
                      "precision study) to have bands")
    if robust.collapsed:
        return None, ("the robust SD of the participants is 0 (most results are equal), so "
                      "there is no scale to score against; set a sigma_pt for the study")
    return robust.s, None


def _in_values(est: RobustEstimate, units: Units) -> RobustEstimate:
    return RobustEstimate(x=units.value(est.x), s=units.scale(est.s),
                          iterations=est.iterations, converged=est.converged, start=est.start,
                          history=tuple((units.value(a), units.scale(b))
                                        for a, b in est.history),
                          collapsed=est.collapsed)


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
