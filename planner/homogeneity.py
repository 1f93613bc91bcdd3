"""The host's homogeneity and stability checks of a round's batch (ISO 13528 Annex B).

Before the parcels leave, the host measures the ``design.homogeneity_units`` units of
each material it set aside, each twice under repeatability conditions, in a random
order drawn from the round secret (purpose ``"homogeneity/order"``), so that ``verify``
can rebuild it. After the round it measures its retained units the same way, for the
stability check. The coordinator records each filled form with ``ringplan homogeneity``.

Which unit holds which material is no secret here: homogeneity and retained units
never reach a participant, so the round's manifest lists them with their materials
(``host_checks``), and recording a form needs no decryption of the key.

sigma_pt for the verdict comes, in this order, from the measurand's fitness-for-purpose
policy (a fixed value; a percentage, of the homogeneity mean; a precision study), else
from the previous round's sigma_pt of that material (its statistics.json), else the
verdict waits for the round's own sigma_pt at evaluation.

The forms are recorded in the ledger as events (``homogeneity-form``,
``stability-form``; a later form of the same kind replaces the earlier one, the ledger
keeps both). The shipping gate (``shipping_gate``) holds the participants' packing
lists until every material passes, or the coordinator waives the check with a reason
(``homogeneity-waived``), which every report states.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any

from planner.errors import IntakeError, PlannerError, Where

__all__ = ["FORM_CSV", "FORM_XLSX", "STABILITY_CSV", "REPLICATES", "run_order",
           "host_checks", "form_text", "read_values", "record", "waive", "assess",
           "shipping_gate", "recorded", "waiver", "to_json"]

FORM_CSV = "homogeneity-form.csv"
FORM_XLSX = "homogeneity-form.xlsx"
STABILITY_CSV = "stability-form.csv"
REPLICATES = 2
"""Each unit is measured twice (duplicates), as ISO 13528 B.2 describes."""
_EVENT = {"homogeneity": "homogeneity-form", "stability": "stability-form"}
_WAIVED = "homogeneity-waived"
_COLUMNS = ("run", "code", "material", "replicate")


def run_order(secret: bytes, codes: Sequence[str], replicates: int = REPLICATES,
              purpose: str = "homogeneity/order") -> list[tuple[str, int]]:
    """Return the measuring order: every (code, replicate) once, shuffled by the round secret.

    The codes are sorted first, so the order depends on the secret and the set of codes
    only."""
    from planner.draw import Stream

    slots = [(code, rep) for code in sorted(codes) for rep in range(1, replicates + 1)]
    return Stream(secret, purpose).shuffle(slots)


def host_checks(units: Sequence[Any]) -> dict[str, dict[str, str]]:
    """Return {"homogeneity": {code: material}, "stability": {code: material}} from a
    round's units (``plan.Unit``: kind, code, material)."""
    out: dict[str, dict[str, str]] = {"homogeneity": {}, "stability": {}}
    for unit in units:
        if unit.kind == "homogeneity":
            out["homogeneity"][unit.code] = unit.material
        elif unit.kind == "retained":
            out["stability"][unit.code] = unit.material
    return {k: dict(sorted(v.items())) for k, v in out.items()}


def _value_columns(study: Any) -> list[tuple[str, str]]:
    """Return (measurand id, column name) for the form: 'value' for a single-measurand
    study, else each measurand's id."""
    if study.shorthand:
        return [(study.all_measurands[0].id, "value")]
    return [(m.id, m.id) for m in study.all_measurands]


def form_text(study: Any, round_id: str, kind: str, checks: Mapping[str, str],
              secret: bytes, *, decimal: str = "point") -> str:
    """Return the CSV form of a check (``kind`` homogeneity or stability) for the host."""
    from planner import codes as codebook

    order = run_order(secret, list(checks), purpose=f"{kind}/order")
    sep = ";" if decimal == "comma" else ","
    buf = io.StringIO()
    what = ("homogeneity check: measure every unit twice under repeatability conditions "
            "(same analyst, instrument and day), in the order of the run column"
            if kind == "homogeneity" else
            "stability check: measure every retained unit twice after the round, in the "
            "order of the run column")
    for key, value in (("study", study.id), ("round", round_id), ("check", kind),
                       ("decimal", decimal)):
        buf.write(f"# {key}: {value}\n")
    buf.write(f"# {what}; a blank value needs a remark\n")
    writer = csv.writer(buf, delimiter=sep, lineterminator="\n")
    columns = [name for _, name in _value_columns(study)]
    writer.writerow([*_COLUMNS, *columns, "remarks"])
    for run, (code, rep) in enumerate(order, start=1):
        material = checks[code]
        cells = ["" if study.measurand(mid).applies_to(material) else "n/a"
                 for mid, _ in _value_columns(study)]
        writer.writerow([run, codebook.format(code), material, rep, *cells, ""])
    return buf.getvalue()


def _number(raw: Any, decimal: str) -> float:
    """Return a number written in the form's decimal convention; raise ValueError."""
    if isinstance(raw, bool):
        raise ValueError("not a number")
    if isinstance(raw, (int, float)):
        value = float(raw)
    else:
        text = str(raw).strip().replace("\u2212", "-").replace("\u00a0", "")
        if decimal == "comma":
            if "." in text:
                raise ValueError("uses a point; this form's decimal sign is a comma")
            text = text.replace(",", ".")
        elif "," in text:
            raise ValueError("uses a comma; this form's decimal sign is a point")
        value = float(text)
    if value != value or value in (float("inf"), float("-inf")):
        raise ValueError("not a finite number")
    return value


def read_values(study: Any, round_id: str, kind: str, checks: Mapping[str, str],
                path: Path) -> dict[str, Any]:
    """Return the values of a filled check form: {"values": {measurand: {code: [v1, v2]}},
    "remarks": {code: text}, "sha256": ..., "file": name}; raise IntakeError listing
    every problem, each with its line or row."""
    from planner import codes as codebook
    from planner import forms

    form = forms.read_form(path)
    problems: list[PlannerError] = []
    for key, want in (("study", study.id), ("round", round_id)):
        got = form.ident(key)
        if got is None or got[0] != want:
            problems.append(IntakeError(
                f"the form's {key} is {got[0] if got else 'missing'!r}, expected {want!r}; "
                f"send the {kind} form written for this round", form.where(got[1] if got else 1)))
    decimal_line = form.ident("decimal")
    decimal = decimal_line[0] if decimal_line and decimal_line[0] in ("point", "comma") else "point"
    columns = _value_columns(study)
    missing = [c for c in ("code", "replicate", *(name for _, name in columns))
               if c not in form.columns]
    if missing:
        raise IntakeError(f"the table has no column {', '.join(map(repr, missing))}; keep the "
                          f"columns of the {kind} form as written", form.where(form.header_line))
    values: dict[str, dict[str, list[float | None]]] = {
        mid: {code: [None] * REPLICATES for code in checks
              if study.measurand(mid).applies_to(checks[code])} for mid, _ in columns}
    remarks: dict[str, str] = {}
    seen: set[tuple[str, int]] = set()
    for row in form.rows:
        where = form.where(row.line)
        raw = str(row.get("code") or "").strip()
        if not raw:
            continue
        try:
            code = codebook.compact(raw)
        except Exception:  # noqa: BLE001 - any malformed code is the same user mistake
            code = raw
        if code not in checks:
            problems.append(IntakeError(f"code {raw!r} is not a {kind} unit of this round; "
                                        f"copy the codes of the {kind} form", where))
            continue
        try:
            rep = int(str(row.get("replicate")).strip())
        except ValueError:
            rep = 0
        if not 1 <= rep <= REPLICATES:
            problems.append(IntakeError(f"replicate {row.get('replicate')!r} of {raw} is not "
                                        f"1 to {REPLICATES}", where))
            continue
        if (code, rep) in seen:
            problems.append(IntakeError(f"{raw} replicate {rep} is given twice; keep one", where))
            continue
        seen.add((code, rep))
        remark = str(row.get("remarks") or "").strip()
        if remark:
            remarks[code] = "; ".join(filter(None, (remarks.get(code), remark)))
        for mid, name in columns:
            cell = row.get(name)
            text = "" if cell is None else str(cell).strip()
            applies = study.measurand(mid).applies_to(checks[code])
            if not applies:
                if text not in ("", "n/a"):
                    problems.append(IntakeError(f"column {name!r} does not apply to {raw} "
                                                f"({checks[code]}); leave it 'n/a'", where))
                continue
            if text in ("", "n/a"):
                if not remark:
                    problems.append(IntakeError(f"column {name!r} of {raw} replicate {rep} is "
                                                "empty; give the value, or say why under "
                                                "remarks", where))
                continue
            try:
                values[mid][code][rep - 1] = _number(cell, decimal)
            except ValueError as exc:
                problems.append(IntakeError(f"column {name!r} of {raw} replicate {rep}: "
                                            f"{text!r} {exc}; write a number like "
                                            f"{'12,5' if decimal == 'comma' else '12.5'}", where))
    absent = sorted(f"{codebook.format(code)} replicate {rep}" for code in checks
                    for rep in range(1, REPLICATES + 1) if (code, rep) not in seen)
    if absent:
        problems.append(IntakeError(f"{len(absent)} row(s) of the {kind} form are missing "
                                    f"(first: {absent[0]}); keep every row, a blank value "
                                    "with a remark", form.where(form.header_line)))
    if problems:
        from planner.intake import condense

        raise IntakeError("\n".join(condense(problems)))
    return {"values": values, "remarks": remarks, "sha256": hashlib.sha256(form.data).hexdigest(),
            "file": Path(path).name, "decimal": decimal}


def record(ledger: Any, round_id: str, kind: str, data: Mapping[str, Any]) -> None:
    """Record a read check form in the ledger (an event; a later one replaces it)."""
    with ledger.transaction():
        ledger.record_event(round_id, _EVENT[kind], dict(data))


def waive(ledger: Any, round_id: str, reason: str) -> None:
    """Record the coordinator's waiver of the homogeneity check, with its reason."""
    reason = reason.strip()
    if len(reason) < 10:
        raise PlannerError("give the reason for waiving the homogeneity check in a sentence "
                           "(it is printed in the report)", Where("--waive"))
    with ledger.transaction():
        ledger.record_event(round_id, _WAIVED, {"reason": reason})


def recorded(ledger: Any, round_id: str, kind: str) -> dict[str, Any] | None:
    """Return the newest recorded form of a check, or None."""
    events = ledger.events(round_id, _EVENT[kind])
    return dict(events[-1].detail) if events else None


def waiver(ledger: Any, round_id: str) -> dict[str, Any] | None:
    """Return the newest waiver (reason, at), or None."""
    events = ledger.events(round_id, _WAIVED)
    return {**events[-1].detail, "at": events[-1].at} if events else None


def _sigma_pt(study: Any, measurand: Any, material: str, mean: float,
              previous: Mapping[str, Mapping[str, float]] | None) -> tuple[float | None, str]:
    """Return (sigma_pt, where it came from) for the homogeneity verdict."""
    import math

    policy = measurand.evaluation.sigma_pt_for(material)
    if policy.value is not None:
        return policy.value, "the measurand's fixed sigma_pt"
    if policy.percent is not None:
        return (policy.percent / 100.0 * abs(mean),
                f"{policy.percent:g} % of the homogeneity mean (the measurand's policy)")
    if policy.precision is not None:
        n = study.design.trials
        big, small = policy.precision.sigma_R, policy.precision.sigma_r
        return (math.sqrt(big * big - (1 - 1 / n) * small * small),
                "the measurand's precision study (ISO 13528 §8.5)")
    last = (previous or {}).get(measurand.id, {}).get(material)
    if last is not None:
        return last, "the previous round's sigma_pt for this material"
    return None, "no sigma_pt before the round: the verdict waits for the round's sigma_pt"


def assess(study: Any, checks: Mapping[str, Mapping[str, str]], ledger: Any, round_id: str, *,
           previous: Mapping[str, Mapping[str, float]] | None = None,
           round_sigma: Mapping[str, Mapping[str, float]] | None = None) -> dict[str, Any]:
    """Return the homogeneity (and, when recorded, stability) assessment per measurand and
    material. ``previous``: measurand -> material -> the previous round's sigma_pt;
    ``round_sigma``: the round's own sigma_pt (at evaluation), used where nothing came
    before the round."""
    from planner.stats import homogeneity as hom

    out: dict[str, Any] = {"recorded": False, "waiver": waiver(ledger, round_id),
                           "measurands": {}}
    form = recorded(ledger, round_id, "homogeneity")
    late = recorded(ledger, round_id, "stability")
    if form is None:
        return out
    out["recorded"] = True
    out["file"] = form.get("file")
    out["sha256"] = form.get("sha256")
    out["remarks"] = form.get("remarks", {})
    for measurand in study.all_measurands:
        per: dict[str, Any] = {}
        got = form["values"].get(measurand.id, {})
        for material in (m.id for m in study.materials):
            if not measurand.applies_to(material):
                continue
            codes = [c for c, mat in checks["homogeneity"].items() if mat == material]
            pairs = [got.get(c) for c in codes]
            complete = [p for p in pairs if p is not None and None not in p]
            if len(complete) < hom.MIN_UNITS:
                per[material] = {"verdict": "cannot be computed",
                                 "why": f"{len(complete)} unit(s) with both values; at least "
                                        f"{hom.MIN_UNITS} are needed"}
                continue
            mean = sum(sum(p) for p in complete) / (2 * len(complete))
            sigma, source = _sigma_pt(study, measurand, material, mean, previous)
            if sigma is None and round_sigma is not None:
                own = round_sigma.get(measurand.id, {}).get(material)
                if own is not None:
                    sigma, source = own, "the round's sigma_pt (given at evaluation)"
            entry = hom.homogeneity(complete, sigma)
            entry["sigma_pt_source"] = source
            entry["left_out"] = len(codes) - len(complete)
            if late is not None:
                after = [v for c, mat in checks["stability"].items() if mat == material
                         for v in (late["values"].get(measurand.id, {}).get(c) or []) if v is not None]
                if after:
                    entry["stability"] = hom.stability([v for p in complete for v in p], after,
                                                       sigma)
            per[material] = entry
        out["measurands"][measurand.id] = per
    return out


def shipping_gate(study: Any, ledger: Any, round_id: str,
                  checks: Mapping[str, Mapping[str, str]]) -> str | None:
    """Return None when the participants' parcels may be printed, else why not."""
    if study.design.homogeneity_units == 0 or not checks.get("homogeneity"):
        return None
    if waiver(ledger, round_id) is not None:
        return None
    found = assess(study, checks, ledger, round_id)
    if not found["recorded"]:
        return ("the host's homogeneity check is not recorded yet: record it with 'ringplan "
                "homogeneity DIR --round R FILE', or waive it with --waive \"reason\"")
    failed = [f"{mid}/{mat}: {entry['verdict']}" for mid, per in found["measurands"].items()
              for mat, entry in per.items()
              if entry["verdict"] in ("not sufficiently homogeneous", "cannot be computed")]
    if failed:
        return ("the homogeneity check did not pass (" + "; ".join(failed) + "); prepare the "
                "batch again, or waive the check with --waive \"reason\"")
    return None


def to_json(data: Mapping[str, Any]) -> str:
    """Return the assessment as JSON text."""
    return json.dumps(data, indent=1, ensure_ascii=False, default=str) + "\n"
