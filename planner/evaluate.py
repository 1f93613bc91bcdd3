"""Evaluate a round: unblind the accepted results with the key, compute, write report/.

``unblind`` joins each accepted result to its unit in the decoding key, so that
a code becomes (material, laboratory, trial), and a unit tested for several
measurands gives one result per measurand. ``evaluate_round`` does that for
a round whose key has been unsealed, runs the statistics of ``planner.stats``
for each measurand on the materials it applies to, with that measurand's
evaluation settings, twice (once with every laboratory, once with the host
left out of the consensus, because the host prepared the material and may
know more about it), and writes into ``rounds/<round>/report/``:

- ``results.csv``      the unblinded results, one line per result (long format:
                       material, measurand, lab, trial, code, value,
                       uncertainty, flags); ``ringplan analyze`` reads it as it is
- ``statistics.json``  everything computed (format ``ringplan-statistics/3``):
                       the round's identity and ``opening`` (how the key was
                       opened, as the ledger shows it) at the top, and under
                       ``measurands.<id>`` each measurand's name, unit and
                       settings with the structure ``ringplan analyze --json``
                       prints; a study in the single-measurand form has the
                       one measurand ``value``
- ``report.pdf``       for the coordinator, with the laboratories' ids
- ``letter-<lab>.pdf`` one per laboratory: its own results and scores, the
                       others only under participant codes drawn anew each round

A circulating set (``design.mode: circulate``) is evaluated from each
laboratory's own stop, the host's first; the host's later stops (middle, end)
feed ``drift_check``, the stability check of the artefacts, which goes into
statistics.json as each measurand's ``drift`` and into the report as its own section.

Flags on a result: ``late`` (received after the results were due),
``after-unseal`` (received after the key was opened), ``in-house`` (the host's
own result: it prepared the material) and ``spare-used`` (a spare unit replaced
the test unit).
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import circulate, codes, draw, files, language, plan, seal
from planner.errors import DataError, LedgerError, Where
from planner.results import Unblinded

if TYPE_CHECKING:
    from planner.ledger import Ledger
    from planner.spec import Measurand, SigmaPtPolicy, Study
    from planner.stats.iso13528 import SigmaPt, Widen

__all__ = [
    "Unblinded", "unblind", "participant_codes", "results_csv", "round_statistics",
    "evaluate_round", "REPORT_DIR", "RESULTS_NAME", "STATISTICS_NAME", "REPORT_NAME",
    "FLAGS", "letter_name", "drift_check", "DRIFT_FACTOR", "DRIFT_SOURCE", "accepted_results",
    "sigma_policy",
]

REPORT_DIR = "report"
RESULTS_NAME = "results.csv"
STATISTICS_NAME = "statistics.json"
REPORT_NAME = "report.pdf"
FLAGS = ("late", "after-unseal", "in-house", "spare-used")
_STATS_FORMAT = "ringplan-statistics/3"
_SHORTHAND = "value"  # spec.SHORTHAND_ID, without importing spec (pydantic) for it
_PARALLEL_FROM = 24  # letters; below this a process pool costs more than it saves

DRIFT_FACTOR = 0.3
"""Share of sigma_pt a host re-measurement may differ from its first (ISO 13528 Annex B)."""
DRIFT_SOURCE = (
    "Drift of the circulating artefacts: the stability check of ISO 13528:2015 Annex B, "
    "quoted from memory, not checked against the text. The host's mean of an artefact at a "
    "later stop may differ from its mean at the start by at most 0.3 sigma_pt; where it does "
    "not, the widened limit 0.3 sigma_pt + 2 sqrt(u1^2 + u2^2) allows for the uncertainty of "
    "the two means, u = s / sqrt(n) of each stop's results.")


def _field(record: Any, name: str, default: Any = None) -> Any:
    if isinstance(record, Mapping):
        return record.get(name, default)
    return getattr(record, name, default)


def _number(v: Any) -> float | None:
    if v is None or v == "":
        return None
    out = float(v)
    return out if math.isfinite(out) else None


class _Shown:
    """A code as printed, made only if a message needs it (formatting 30 000 codes costs)."""

    __slots__ = ("code", "raw")

    def __init__(self, code: str, raw: str) -> None:
        self.code, self.raw = code, raw

    def __format__(self, spec: str) -> str:
        return codes.format(self.code) if codes.is_valid(self.code) else repr(self.raw)


def _shown(code: str, raw: str) -> _Shown:
    return _Shown(code, raw)


def unblind(key: Mapping[str, Any], results: Iterable[Any], *,
            issued: Mapping[str, str] | None = None) -> list[Unblinded]:
    """Return the results joined to the key's units: material, lab, trial, code, value, flags.

    Each result (a mapping or an object) gives ``lab``, ``code``, ``value`` and
    optionally ``uncertainty``, ``trial`` (needed for a spare or a circulating
    artefact) and ``flags`` ("late", "after-unseal", ...). A result with
    ``measurements`` ({measurand id: (value, uncertainty)}) gives one row per entry,
    its ``measurand`` the id; without it one row of the measurand "value". ``issued`` maps each unit
    the host sent to replace a damaged one (a spare, or a retained unit once the
    spares of its material were gone; ``intake.issued_spares``) to the laboratory it
    went to; such a result is flagged "spare-used". Raises DataError for a code
    that is not in the key, belongs to another laboratory or to a unit nobody tests,
    a spare without a trial, or a unit (or material and trial) reported twice, or a
    measurement that is not a (value, uncertainty) pair. Rows come sorted by material,
    laboratory and trial (measurands of a unit in the order given).
    """
    units = {u.code: u for u in plan.units_from_key(dict(key))}
    sent = issued or {}
    host = str(key.get("host", ""))
    rows: list[Unblinded] = []
    seen: set[tuple[str, str]] = set()
    taken_slots: dict[tuple[str, str, int], str] = {}
    for record in results:
        lab = str(_field(record, "lab"))
        raw = str(_field(record, "code", ""))
        unit = units.get(raw)
        code = raw if unit is not None else codes.compact(raw)
        unit = unit or units.get(code)
        shown = _shown(code, raw)
        if unit is None:
            raise DataError(f"laboratory {lab!r} reported code {shown}, which is not a unit of "
                            "this round; check the result form against the packing list")
        shared = unit.kind == "artefact"  # a circulating artefact is tested by everyone
        holder = sent.get(code, unit.lab)
        if holder != lab and not shared:
            raise DataError(f"laboratory {lab!r} reported code {shown}, but that unit was sent "
                            f"to {holder!r}; check the result form")
        if unit.kind not in ("test", "spare", "artefact") and code not in sent:
            raise DataError(f"code {shown} is a {unit.kind} unit kept by the host, not a "
                            f"unit to test; laboratory {lab!r} should not report it")
        if (lab, code) in seen and not shared:
            raise DataError(f"unit {shown} is reported twice by {lab!r}; keep one result per unit")
        seen.add((lab, code))
        flags = [str(f) for f in (_field(record, "flags") or ())]
        if unit.kind == "test":
            assert unit.trial is not None
            trial = int(unit.trial)
        else:
            trial_raw = _field(record, "trial")
            if trial_raw in (None, ""):
                raise DataError(f"{unit.kind} unit {shown} of {lab!r} has no trial; the result "
                                "form line must say which trial it was tested in")
            trial = int(trial_raw)
            if unit.kind == "spare" or code in sent:
                flags.append("spare-used")
        slot = (unit.material, lab, trial)
        if slot in taken_slots:
            other = codes.format(taken_slots[slot])
            raise DataError(f"{lab!r} reported two results for the same material in trial "
                            f"{trial} (units {other} and {shown}); a spare replaces a test unit, "
                            "it is not an extra result")
        taken_slots[slot] = code
        if lab == host:
            flags.append("in-house")
        ordered = tuple(f for f in FLAGS if f in flags) + tuple(
            sorted({f for f in flags if f not in FLAGS}))
        measurements = _field(record, "measurements")
        if measurements is None:
            rows.append(Unblinded(unit.material, lab, trial, code,
                                  _number(_field(record, "value")),
                                  _number(_field(record, "uncertainty")), ordered))
            continue
        for measurand, pair in measurements.items():
            # tuple or list (checked by type first: the generic check costs on 100 000 rows)
            if not ((type(pair) is tuple or type(pair) is list or (
                    isinstance(pair, Sequence) and not isinstance(pair, (str, bytes))))
                    and len(pair) == 2):
                raise DataError(f"the result of unit {shown} from {lab!r} for measurand "
                                f"{measurand!r} is {pair!r}, not a (value, uncertainty) pair")
            rows.append(Unblinded(unit.material, lab, trial, code, _number(pair[0]),
                                  _number(pair[1]), ordered, str(measurand)))
    rows.sort(key=lambda r: (r.material, r.lab, r.trial))
    return rows


def participant_codes(secret: bytes, labs: Sequence[str]) -> dict[str, str]:
    """Return the anonymous participant code of each laboratory for one round ("P-07").

    The codes are a random permutation drawn from the round secret's "participants"
    stream, so they are the same whenever the round is evaluated and differ between
    rounds; the width grows with the number of laboratories.
    """
    order = draw.Stream(secret, "participants").shuffle(list(labs))
    width = max(2, len(str(len(labs))))
    return {lab: f"P-{i:0{width}d}" for i, lab in enumerate(order, start=1)}


def letter_name(lab: str) -> str:
    """Return the file name of a laboratory's letter."""
    return f"letter-{lab}.pdf"


def results_csv(rows: Sequence[Unblinded]) -> str:
    """Return the long-format CSV of unblinded results (decimal point, ',' separated).

    Each line names its measurand after the material ("value" in a study of one
    measurand). Results without a value are left out (they are listed as missing in
    statistics.json), so that ``ringplan analyze`` reads the file as it is.
    """
    out = io.StringIO()
    writer = csv.writer(out, lineterminator="\n")
    writer.writerow(["material", "measurand", "lab", "trial", "code", "value", "uncertainty",
                     "flags"])
    shown: dict[str, str] = {}  # a unit of several measurands has several lines
    for r in rows:
        if r.value is None:
            continue
        code = shown.get(r.code)
        if code is None:
            code = shown[r.code] = codes.format(r.code)
        writer.writerow([r.material, r.measurand, r.lab, r.trial, code,
                         repr(r.value), "" if r.uncertainty is None else repr(r.uncertainty),
                         " ".join(r.flags)])
    return out.getvalue()


def _ordered(rows: Sequence[Unblinded], study: Study) -> list[Unblinded]:
    mat_rank = {m.id: i for i, m in enumerate(study.materials)}
    lab_rank = {lab.id: i for i, lab in enumerate(study.laboratories)}
    m_rank = {m.id: i for i, m in enumerate(study.all_measurands)}
    return sorted(rows, key=lambda r: (mat_rank.get(r.material, len(mat_rank)), r.material,
                                       lab_rank.get(r.lab, len(lab_rank)), r.lab, r.trial,
                                       m_rank.get(r.measurand, len(m_rank)), r.measurand))


def _without_host(full: Mapping[str, Any], alt: Mapping[str, Any], host: str,
                  assigned: Mapping[str, str], reference_lab: str | None,
                  known: Mapping[str, Any]) -> dict[str, Any]:
    """Return, per material, the consensus without the host and its difference to the full one.

    ``alt`` holds the scores against the consensus without the host, by material. Only a
    material whose assigned value is the consensus has one; the others say why not.
    """
    out: dict[str, Any] = {}
    for m, sc in full["scores"].items():
        other = alt.get(m, {})
        how = assigned.get(m, "consensus")
        if how == "reference":
            out[m] = {"skipped": f"the assigned value is the result of the reference laboratory "
                                 f"{reference_lab!r}, not a consensus"}
        elif how == "known":
            source = known[m].source if m in known else ""
            out[m] = {"skipped": "the assigned value is a known value"
                                 + (f" ({source})" if source else "")
                                 + " from outside the round, not a consensus"}
        elif host not in sc.get("labs", {}):
            out[m] = {"skipped": f"the host {host!r} reported no result for this material"}
        elif "skipped" in sc or "skipped" in other:
            out[m] = {"skipped": other.get("skipped") or sc.get("skipped")}
        else:
            diff = sc["assigned_value"] - other["assigned_value"]
            sig = sc.get("sigma_pt")
            out[m] = {
                "assigned_value": other["assigned_value"],
                "u_assigned_value": other["u_assigned_value"],
                "robust_sd": other["robust_sd"], "sigma_pt": other["sigma_pt"],
                "p": other["p"], "method": other["method"],
                "difference": diff,
                "difference_in_sigma_pt": diff / sig if sig else None,
                "host_z": other["labs"][host]["z"],
            }
    return out


def _check_measurands(study: Study, rows: Sequence[Unblinded]) -> dict[str, list[Unblinded]]:
    """Return the rows of each measurand of the study (spec order); DataError for a row of a
    measurand the study does not have, or on a material the measurand is not measured on."""
    items = {m.id: m for m in study.all_measurands}
    out: dict[str, list[Unblinded]] = {m: [] for m in items}
    for r in rows:
        group = out.get(r.measurand)
        if group is None:
            raise DataError(f"unit {codes.format(r.code)} of {r.lab!r} has a result for "
                            f"measurand {r.measurand!r}, which this study does not have "
                            f"(its measurands: {', '.join(items)})")
        group.append(r)
    for mid, group in out.items():
        only = items[mid].materials
        if only is None:
            continue
        for r in group:
            if r.material not in only:
                raise DataError(f"unit {codes.format(r.code)} of {r.lab!r} has a result for "
                                f"measurand {mid!r}, which is not measured on material "
                                f"{r.material!r} (only on {', '.join(only)})")
    return out


def _measurand_block(item: Measurand, study: Study, rows: Sequence[Unblinded], host: str, *,
                     visits: Mapping[str, Sequence[Unblinded]] | None,
                     artefacts: Mapping[str, str],
                     widen: Mapping[str, Widen] | None = None) -> dict[str, Any]:
    """Return what statistics.json holds of one measurand: name, unit, settings, every method."""
    from planner import stats
    from planner.stats.iso13528 import Known

    ev = item.evaluation
    mats = [m.id for m in study.materials if item.applies_to(m.id)]
    table = [{"material": r.material, "lab": r.lab, "trial": str(r.trial), "value": r.value,
              "uncertainty": r.uncertainty} for r in rows if r.value is not None]
    policies = {m: sigma_policy(ev.sigma_pt_for(m)) for m in mats}
    assigned = {m: ev.assigned_for(m) for m in mats}
    known = {m: Known(kv.value, kv.u, kv.source) for m in mats
             if (kv := ev.known_value_for(m)) is not None}
    counts: dict[str, int] = {}
    for r in rows:
        if r.value is not None:
            counts[r.lab] = counts.get(r.lab, 0) + 1
    block: dict[str, Any] = {
        "name": item.name, "unit": item.unit, "resolution": item.resolution,
        "method": item.method, "measured_on": mats,
        "settings": {
            "tolerance": ev.tolerance,
            "tolerance_by_material": {m: t for m in mats
                                      if (t := ev.tolerance_for(m)) != ev.tolerance},
            "sigma_pt": {m: pol.describe() for m, pol in policies.items()},
            "assigned_value": ev.assigned_value,
            "assigned_by_material": {m: a for m, a in assigned.items()
                                     if a != ev.assigned_value},
            "known_values": {m: {"value": k.value, "u": k.u, "source": k.source}
                             for m, k in known.items()},
            "reference_lab": ev.reference_lab, "pool_alpha": ev.pool_alpha,
            "resolution": item.resolution, "excluded_for_second_consensus": [host]},
        "results": {"count": len(table),
                    "per_lab": {lab.id: counts.get(lab.id, 0) for lab in study.laboratories}},
    }
    if not table:
        block.update(materials=[], labs=[], skipped="no result of this measurand has a value")
        return block
    options: dict[str, Any] = {
        "tolerance": ev.tolerance, "sigma_pt": policies, "assigned": assigned,
        "reference_lab": ev.reference_lab, "pool_alpha": ev.pool_alpha, "known": known,
        "resolution": item.resolution, "widen": widen}
    full = stats.evaluate_table(table, **options, also_without=(host,))
    without = _without_host(full, full.pop("scores_without"), host, assigned,
                            ev.reference_lab, known)
    for m, extra in without.items():
        if isinstance(full["scores"].get(m), dict):
            full["scores"][m]["without_host"] = extra
        host_entry = full["scores"].get(m, {}).get("labs", {}).get(host)
        if host_entry is not None:
            host_entry["in_house"] = True
    own_tolerance = {m: t for m in full["materials"]
                     if (t := ev.tolerance_for(m)) is not None and t != ev.tolerance}
    if own_tolerance:
        full["tolerance_by_material"] = _tolerance_by_material(full, own_tolerance)
    block.update(full)
    if visits is not None:
        start = [r for r in rows if r.lab == host]
        sigma = {m: full["scores"].get(m, {}).get("sigma_pt") for m in full["materials"]}
        block["drift"] = drift_check({"start": start, **visits}, sigma,
                                     materials=[m for m in mats if m in artefacts],
                                     codes_of=artefacts, host=host)
    return block


def _tolerance_by_material(result: Mapping[str, Any], tolerance: Mapping[str, float]
                           ) -> dict[str, Any]:
    """Return, for each material with a tolerance of its own, k GRR and k s_R against it.

    GRR is the gauge study's, pooled over the materials (the model assumes one spread for
    all); s_R is the material's own (ISO 5725-2); k is the gauge study's multiplier (6).
    """
    ga = result.get("grr_anova") or {}
    k = ga.get("multiplier") or 6.0  # gauge_rr.evaluate's default, when it could not run
    out: dict[str, Any] = {}
    for m, tol in tolerance.items():
        grr = ga.get("grr_sd") if "skipped" not in ga else None
        s_big = (result["precision"].get(m) or {}).get("s_R")
        out[m] = {"tolerance": tol, "multiplier": k,
                  "pct_grr": 100.0 * k * grr / tol if grr is not None else None,
                  "pct_s_R": 100.0 * k * s_big / tol if s_big is not None else None}
    return out


def round_statistics(study: Study, key: Mapping[str, Any], rows: Sequence[Unblinded], *,
                     missing: Sequence[Mapping[str, Any]] = (),
                     visits: Mapping[str, Sequence[Unblinded]] | None = None,
                     opening: Mapping[str, Any] | None = None,
                     items: Callable[[Mapping[str, Mapping[str, float]]], dict[str, Any]]
                     | None = None) -> dict[str, Any]:
    """Return the statistics.json content of a round: the round's identity at the top and,
    under ``measurands.<id>``, every method's statistics of each measurand.

    Each measurand is evaluated on the materials it is measured on, with its own
    evaluation settings (sigma_pt, tolerance, where the assigned value comes from). The
    host is left out of a second consensus; ``scores.<material>.without_host`` holds that
    consensus and its difference from the full one (materials with a consensus assigned
    value only). ``visits`` (a circulating set) are the host's results of its later stops
    by visit; with them each measurand's ``drift`` holds the drift check of
    ``drift_check``. ``opening`` is the ledger's record of the key
    (``status.read_key_history``); ``opening`` in the result holds of it ``at``,
    ``forced``, ``reason``, ``missing``, ``early_decryptions``, ``first_result_at`` and
    ``received_after``, and is None without it. ``items`` returns the host's homogeneity
    and stability assessment (``homogeneity.assess``) given the round's sigma_pt per
    measurand and material; with it ``homogeneity`` in the result holds that assessment
    and, under ``widened``, what was added to sigma_pt or u(x_pt) of the materials whose
    check failed (``widen_of``); those materials' statistics are computed with it.
    Without it ``homogeneity`` is None. Raises DataError when no result has a
    value, or a result is of a measurand the study (or its material) does not have.
    """
    host = str(key["host"])
    grouped = _check_measurands(study, rows)
    if not any(r.value is not None for r in rows):
        raise DataError("no accepted result of this round has a value; nothing to evaluate")
    later = ({v: _check_measurands(study, rs) for v, rs in visits.items()}
             if visits is not None else None)
    artefacts = ({u.material: codes.format(u.code) for u in plan.units_from_key(dict(key))
                  if u.kind == "artefact"} if visits is not None else {})
    blocks = {item.id: _measurand_block(
        item, study, grouped[item.id], host, artefacts=artefacts,
        visits=({v: g[item.id] for v, g in later.items()} if later is not None else None))
        for item in study.all_measurands}
    checked = None
    if items is not None:
        checked = items({mid: {m: sc["sigma_pt"] for m, sc in block.get("scores", {}).items()
                               if isinstance(sc, dict) and sc.get("sigma_pt") is not None}
                         for mid, block in blocks.items()})
        widened = widen_of(study, checked)
        for mid, per in widened.items():
            blocks[mid] = _measurand_block(study.measurand(mid), study, grouped[mid], host,
                                           artefacts=artefacts, visits=None, widen=per)
        checked["widened"] = {mid: {m: {"into": w.into, "sd": w.sd, "why": w.why}
                                    for m, w in per.items()} for mid, per in widened.items()}
    flagged: dict[str, dict[str, None]] = {}
    counts: dict[str, int] = {}
    for r in rows:
        for f in r.flags:
            flagged.setdefault(f, {})[r.lab] = None
        if r.value is not None:
            counts[r.lab] = counts.get(r.lab, 0) + 1
    flags = {f: list(labs) for f, labs in flagged.items()}
    per_lab = {lab.id: counts.get(lab.id, 0) for lab in study.laboratories}
    labs: dict[str, None] = {}
    sources: dict[str, Any] = {}
    for block in blocks.values():
        labs.update(dict.fromkeys(block.get("labs", ())))
        for name, text in block.pop("sources", {}).items():
            # The same texts in every block, except that a measurand with a known value
            # names its clause as well.
            if len(text) > len(sources.get(name, "")):
                sources[name] = text
    secret = bytes.fromhex(str(key["secret"]))
    return {
        "format": _STATS_FORMAT,
        "study": study.id, "title": study.study.title, "round": str(key["round"]),
        "host": host, "organiser": study.study.organiser,
        "fingerprint": seal.fingerprint(seal.canonical(dict(key))),
        "trials": study.design.trials,
        "results": {"count": sum(b["results"]["count"] for b in blocks.values()),
                    "per_lab": per_lab, "missing": list(missing), "flags": flags},
        "participants": participant_codes(secret, [lab.id for lab in study.laboratories]),
        "opening": _opening(opening),
        "labs": list(labs),
        "sources": sources,
        "measurands": blocks,
        "homogeneity": checked,
    }


def widen_of(study: Study, checked: Mapping[str, Any]) -> dict[str, dict[str, Widen]]:
    """Return measurand -> material -> what to add to sigma_pt or u(x_pt), for the materials
    whose items were found not sufficiently homogeneous or not stable.

    Between units: s_s of the homogeneity check. Instability: u_stab = |y2 - y1| / sqrt(3),
    the difference of the means taken as the half-width of a rectangular distribution
    (ISO Guide 35 treats instability so; recalled from memory, not checked against the
    text). Both present: their root sum of squares. Where they go is the measurand's
    ``evaluation.between_units`` (u(x_pt) unless it says sigma_pt).
    """
    from planner.stats.iso13528 import Widen

    out: dict[str, dict[str, Widen]] = {}
    for mid, per in (checked.get("measurands") or {}).items():
        into = study.measurand(mid).evaluation.widen
        for material, e in per.items():
            parts: list[tuple[float, str]] = []
            if e.get("verdict") == "not sufficiently homogeneous":
                parts.append((float(e["s_s"]), f"the between-unit SD s_s = {e['s_s']:.3g}"))
            st = e.get("stability") or {}
            if st.get("verdict") == "not stable":
                u = abs(float(st["difference"])) / math.sqrt(3.0)
                parts.append((u, f"the instability u_stab = |y2 - y1|/sqrt(3) = {u:.3g}"))
            if parts:
                sd = math.sqrt(math.fsum(v * v for v, _ in parts))
                out.setdefault(mid, {})[material] = Widen(into, sd, " and ".join(
                    why for _, why in parts))
    return out


def _opening(record: Mapping[str, Any] | None) -> dict[str, Any] | None:
    """Return the part of the ledger's record of the key that statistics.json keeps."""
    if record is None or not record.get("opened"):
        return None
    return {"at": record["at"], "forced": bool(record["forced"]), "reason": record["reason"],
            "missing": list(record["missing"]),
            "early_decryptions": [dict(e) for e in record["early_decryptions"]],
            "first_result_at": record["first_result_at"],
            "received_after": list(record["received_after"]),
            "sealing": dict(record.get("sealing") or {}),
            "releases": list(record.get("releases") or ())}


def sigma_policy(policy: SigmaPtPolicy) -> SigmaPt:
    """Return the statistics' sigma_pt policy for a policy of the study spec."""
    from planner.stats.iso13528 import SigmaPt

    if policy.value is not None:
        return SigmaPt("fixed", value=policy.value)
    if policy.percent is not None:
        return SigmaPt("percent", percent=policy.percent)
    if policy.precision is not None:
        return SigmaPt("precision", sigma_R=policy.precision.sigma_R,
                       sigma_r=policy.precision.sigma_r)
    assert policy.participants is not None
    return SigmaPt("participants", min_participants=policy.participants.min_participants)


def _visit_summary(values: Sequence[float]) -> dict[str, Any]:
    n = len(values)
    mean = math.fsum(values) / n
    sd = (math.sqrt(math.fsum((v - mean) ** 2 for v in values) / (n - 1)) if n >= 2 else None)
    return {"n": n, "mean": mean, "sd": sd, "u": sd / math.sqrt(n) if sd is not None else None}


def drift_check(by_visit: Mapping[str, Sequence[Unblinded]],
                sigma_pt: Mapping[str, float | None], *, materials: Sequence[str],
                codes_of: Mapping[str, str], host: str) -> dict[str, Any]:
    """Return the drift check of a circulating set from the host's results by visit.

    ``by_visit`` holds the host's results of each stop ("start", then "middle",
    "end"); per material come the mean, SD, n and u = s/sqrt(n) of each stop, and for
    each later stop the difference to the start, the limit 0.3 sigma_pt, the widened
    limit 0.3 sigma_pt + 2 sqrt(u_start^2 + u_stop^2) and whether the difference is
    within each. The verdict: "pass" (every difference within 0.3 sigma_pt), "pass
    (widened limit)" (within the widened limit only), "fail", or "not checked" with the
    reason.
    """
    order = {v: i for i, v in enumerate(("start", "middle", "end"))}
    visits = sorted(by_visit, key=lambda v: (order.get(v, len(order)), v))
    out: dict[str, Any] = {}
    for m in materials:
        values = {v: [r.value for r in by_visit[v] if r.material == m and r.value is not None]
                  for v in visits}
        summary = {v: _visit_summary(vals) for v, vals in values.items() if vals}
        sig = sigma_pt.get(m)
        entry: dict[str, Any] = {"code": codes_of.get(m), "sigma_pt": sig,
                                 "limit": DRIFT_FACTOR * sig if sig else None,
                                 "visits": summary, "checks": {}}
        first = summary.get("start")
        later = [v for v in visits if v != "start" and v in summary]
        if not sig:
            entry.update(verdict="not checked", why="no sigma_pt for this material")
        elif first is None:
            entry.update(verdict="not checked", why=f"the host {host!r} has no result of its "
                                                    "first stop")
        elif not later:
            entry.update(verdict="not checked", why=f"the host {host!r} has no result of a "
                                                    "later stop")
        else:
            limit = DRIFT_FACTOR * sig
            for v in later:
                now = summary[v]
                diff = now["mean"] - first["mean"]
                widened = (limit + 2 * math.sqrt(first["u"] ** 2 + now["u"] ** 2)
                           if first["u"] is not None and now["u"] is not None else None)
                entry["checks"][v] = {
                    "difference": diff, "difference_in_sigma_pt": diff / sig,
                    "limit": limit, "widened_limit": widened,
                    "within_limit": abs(diff) <= limit,
                    "within_widened_limit": abs(diff) <= widened if widened is not None
                    else None}
            checks = entry["checks"].values()
            if all(c["within_limit"] for c in checks):
                entry["verdict"] = "pass"
            elif all(c["within_limit"] or c["within_widened_limit"] for c in checks):
                entry["verdict"] = "pass (widened limit)"
            else:
                entry["verdict"] = "fail"
        out[m] = entry
    return {"host": host, "visits": visits, "factor": DRIFT_FACTOR, "method": DRIFT_SOURCE,
            "materials": out}


def _missing(study: Study, key: Mapping[str, Any],
             rows: Sequence[Unblinded]) -> list[dict[str, Any]]:
    """Return each test unit and measurand with no value (neither the unit's own nor a
    spare's), and why."""
    have = {(r.material, r.lab, r.trial, r.measurand) for r in rows if r.value is not None}
    failed = {(r.material, r.lab, r.trial, r.measurand) for r in rows if r.value is None}
    of = {m.id: [item.id for item in study.measurands_of(m.id)] for m in study.materials}
    out = []
    for u in plan.units_from_key(dict(key)):
        if u.kind != "test":
            continue
        for measurand in of.get(u.material, (_SHORTHAND,)):
            slot = (u.material, u.lab, u.trial, measurand)
            if slot not in have:
                out.append({"material": u.material, "measurand": measurand, "lab": u.lab,
                            "trial": u.trial, "position": u.position,
                            "code": codes.format(u.code),
                            "why": "reported without a value" if slot in failed
                            else "not reported"})
    out.sort(key=lambda d: (d["lab"], d["trial"], d["position"] or 0))
    return out


def _missing_circulating(study: Study, manifest: Mapping[str, Any], key: Mapping[str, Any],
                         accepted: Sequence[Any]) -> list[dict[str, Any]]:
    """Return every (stop, trial, artefact, measurand) of a circulating set with no value,
    and why."""
    from planner import audit

    material = {u.code: u.material for u in plan.units_from_key(dict(key))}
    of = {m.id: [item.id for item in study.measurands_of(m.id)] for m in study.materials}
    have: set[tuple[str, str, int, str]] = set()
    failed: set[tuple[str, str, int, str]] = set()
    for r in accepted:
        slot = circulate.station_key(str(_field(r, "lab")), _field(r, "visit"))
        trial = _field(r, "trial")
        if trial in (None, ""):
            continue
        code = codes.compact(str(_field(r, "code", "")))
        measurements = _field(r, "measurements")
        pairs = (measurements.items() if measurements is not None
                 else [(_SHORTHAND, (_field(r, "value"), None))])
        for measurand, pair in pairs:
            item = (slot, code, int(trial), str(measurand))
            (have if _number(pair[0]) is not None else failed).add(item)
    out = []
    for slot in audit.report_slots(manifest):
        for trial, run in enumerate(audit.slot_runs(manifest, slot), start=1):
            for position, code in enumerate(run, start=1):
                mat = material.get(code, "")
                for measurand in of.get(mat, (_SHORTHAND,)):
                    item = (slot, code, trial, measurand)
                    if item not in have:
                        out.append({"material": mat, "measurand": measurand, "lab": slot,
                                    "trial": trial, "position": position,
                                    "code": codes.format(code),
                                    "why": "reported without a value"
                                    if item in failed else "not reported"})
    return out


def _write_text(path: Path, text: str, *, root: Path) -> None:
    # report/ is owner-only until the coordinator sends it out (see planner.files)
    files.write_text(path, text, root=root, private=True)


# Row flags written by intake that name the same thing as ours.
_INTAKE_FLAGS = {"late-date": "late", "after-unseal": "after-unseal", "no-value": "",
                 "spare": ""}


def accepted_results(study: Study, ledger: Ledger, round_id: str, *,
                     manifest: Mapping[str, Any] | None = None) -> list[dict[str, Any]]:
    """Return the results in force of a round: per laboratory the merge of its forms.

    A correction may carry only the rows it changes (``returns.slot_state``). Each
    result is a dict (lab, code, trial, value, uncertainty, remarks, flags) as
    ``unblind`` takes it; "late" when the form it came from arrived after the results
    were due or a test date lies after the test window, "after-unseal" when that form
    came after the key was opened. A circulating set's results also say the ``visit``
    of the host's later stops ("middle", "end"; None for a laboratory's own stop and the
    host's first). With several measurands ``value`` and ``uncertainty`` are None and
    ``measurements`` maps each measurand measured on the unit to (value, uncertainty).
    """
    from planner import audit, intake, returns

    out: list[dict[str, Any]] = []
    circulating = study.design.mode == "circulate"
    if manifest is None:
        raise ValueError("accepted_results needs the round's manifest")
    slots = (audit.round_slots(study, ledger, round_id, manifest=manifest) if circulating
             else [lab.id for lab in study.laboratories])
    swaps = intake.spare_swaps(ledger, round_id)
    absent = plan.not_applicable(manifest, swaps)
    for slot in slots:
        lab_id, visit = audit.split_slot(slot)
        state = returns.slot_state(manifest, ledger, round_id, slot, swaps=swaps,
                                   absent=absent)
        for sub, r in state.rows:
            flags = {_INTAKE_FLAGS.get(f, f) for f in r.flags} - {""}
            if sub.late:
                flags.add("late")
            if sub.after_unseal:
                flags.add("after-unseal")
            record = {"lab": lab_id, "code": r.code, "trial": r.trial, "value": r.value,
                      "uncertainty": r.uncertainty, "remarks": r.remarks,
                      "flags": tuple(sorted(flags))}
            if not study.shorthand:
                # One entry per measurand measured on the unit: (None, None) for a blank
                # explained in remarks, or one never reported when the key was forced open.
                got = {m: (v, u) for m, v, u in r.measurements}
                record["measurements"] = {m.id: got.get(m.id, (None, None))
                                          for m in study.all_measurands
                                          if m.id not in absent.get(r.code, ())}
            if circulating:
                record["visit"] = visit
            out.append(record)
    return out


def evaluate_round(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *,
                   workers: int = 2, results: Iterable[Any] | None = None) -> Path:
    """Unblind and evaluate an unsealed round; write report/ and record 'evaluated'; return report/.

    The 'evaluated' event holds the SHA-256 of the statistics.json written
    (``statistics_sha256``): history reads no other.

    ``results`` are the accepted results (default: read from the intake records).
    Raises LedgerError when the round was not planned here or its key is still sealed,
    SealError when key.json does not match the published fingerprint, DataError when
    the results cannot be joined to the key.
    """
    from planner import intake, render
    from planner import status as standing
    from planner.render import letter, report

    folder = plan.round_dir(study_dir, round_id)
    status = ledger.round_status(round_id)
    if status is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder")
    if status not in ("unsealed", "evaluated"):
        raise LedgerError(f"round {round_id!r} is {status}, its key is still sealed; run "
                          "'ringplan unseal' once every laboratory has reported")
    from planner import audit

    # The fingerprint recorded in the ledger at planning decides, not key.fingerprint.
    key = audit.read_key(folder, ledger, round_id)
    if key.get("round") != round_id or key.get("study") != study.id:
        raise LedgerError(f"key.json belongs to study {key.get('study')!r} round "
                          f"{key.get('round')!r}, not to this round", Where(str(folder)))
    manifest = plan.read_manifest(folder)
    opening = standing.read_key_history(ledger, round_id)
    issued = intake.issued_spares(ledger, round_id)  # the units the host sent, and to whom
    accepted = (list(results) if results is not None else
                accepted_results(study, ledger, round_id, manifest=manifest))
    if manifest.get("mode") == "circulate":
        # Each laboratory's own stop (the host's first) makes the statistics; the host's
        # later stops only say whether the artefacts drifted.
        later: dict[str, list[Any]] = {}
        for r in accepted:
            if _field(r, "visit") not in (None, "", "start"):
                later.setdefault(str(_field(r, "visit")), []).append(r)
        own = [r for r in accepted if _field(r, "visit") in (None, "", "start")]
        rows = _ordered(unblind(key, own), study)
        visits = {v: _ordered(unblind(key, rs), study) for v, rs in later.items()}
        statistics = round_statistics(study, key, rows, visits=visits, opening=opening,
                                      missing=_missing_circulating(study, manifest, key,
                                                                   accepted))
    else:
        from planner import homogeneity

        rows = _ordered(unblind(key, accepted, issued=issued), study)
        checks = homogeneity.checks_of(ledger, round_id)
        previous = homogeneity.previous_sigma(study_dir, ledger, round_id) if checks else {}

        def items(sigma: Mapping[str, Mapping[str, float]]) -> dict[str, Any]:
            return homogeneity.assess(study, checks or {}, ledger, round_id,
                                      previous=previous, round_sigma=sigma)

        statistics = round_statistics(study, key, rows, missing=_missing(study, key, rows),
                                      opening=opening, items=items if checks else None)
    # The record this evaluation rests on: the chain head goes onto every letter, so a
    # laboratory can later show the ledger was not rewritten behind the letter.
    head = ledger.head()
    statistics["ledger"] = {"link": head.seq, "at": head.at, "head": head.head}
    out = folder / REPORT_DIR
    # A font file that cannot be used is named before any file of the report is written,
    render.use_fonts(study, study_dir)
    # and so is a link or a folder in the way.
    files.check_paths([out / name for name in (RESULTS_NAME, STATISTICS_NAME, REPORT_NAME)]
                      + [out / letter_name(lab.id) for lab in study.laboratories],
                      root=study_dir)
    _write_text(out / RESULTS_NAME, results_csv(rows), root=study_dir)
    _write_text(out / STATISTICS_NAME,
                json.dumps(statistics, indent=1, ensure_ascii=False, allow_nan=False) + "\n",
                root=study_dir)
    # The bytes as they lie on disk, so that history can tell this file from an edited one.
    written = hashlib.sha256((out / STATISTICS_NAME).read_bytes()).hexdigest()
    paper = study.study.paper
    report.render(out / REPORT_NAME, statistics, rows, paper=paper)
    addressees = [letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name,
                                   lab.decimal, language.of(lab)) for lab in study.laboratories]
    letter.render_all(out, statistics, rows, addressees, paper=paper,
                      workers=workers if len(addressees) >= _PARALLEL_FROM else 1)
    with ledger.transaction():
        ledger.record_event(round_id, "evaluated", {
            "fingerprint": statistics["fingerprint"], "results": statistics["results"]["count"],
            "missing": len(statistics["results"]["missing"]), "report": str(out.name),
            "statistics_sha256": written})
    return out
