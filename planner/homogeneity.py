"""The host's homogeneity and stability checks of a round's batch (ISO 13528 Annex B).

Before the parcels leave, the host measures the ``design.homogeneity_units`` units of
each material it set aside, each twice under repeatability conditions, in a random
order drawn from the round secret (purpose ``"homogeneity/order"``), so that ``verify``
can rebuild it. After the round it measures its retained units the same way, for the
stability check. The coordinator records each filled form with ``ringplan homogeneity``.

Homogeneity and retained units never reach a participant, so which of them holds
which material is recorded in the ledger's planning event (``host_checks``) and
recording a form needs no decryption of the key. The forms themselves name no
material (the round folder names none until the key prints the host's documents):
the host reads each unit's material from its label or the preparation sheet.

sigma_pt for the verdict comes, in this order, from the measurand's fitness-for-purpose
policy (a fixed value; a percentage, of the homogeneity mean; a precision study), else
from the previous round's sigma_pt of that material (its statistics.json), else the
verdict waits for the round's own sigma_pt at evaluation.

The forms are read by the rules of the result forms (codes with their check character,
numbers as ``planner.intake`` reads them) and recorded in the ledger as events
(``homogeneity-form``, ``stability-form``; a later form of the same kind replaces the
earlier one, the ledger keeps both and the assessment lists the replaced ones with what
they found). The shipping gate (``shipping_gate``) holds the participants' packing lists
until every material passes with a repeatability small enough for the check to mean
something (s_w < 0.5 sigma_pt), or the coordinator waives the check with a reason
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

__all__ = ["FORM_CSV", "FORM_XLSX", "STABILITY_CSV", "FORM_NAMES", "REPLICATES", "run_order",
           "host_checks", "form_text", "form_xlsx", "read_values", "record", "waive", "assess",
           "shipping_gate", "recorded", "waiver", "to_json", "checks_of", "write_forms",
           "previous_sigma", "form_order", "state_lines"]

FORM_CSV = "homogeneity-form.csv"
FORM_XLSX = "homogeneity-form.xlsx"
STABILITY_CSV = "stability-form.csv"
FORM_NAMES = {"homogeneity": "homogeneity-form", "stability": "stability-form"}
"""File stems of the host's check forms in the round's ``host/`` folder (.csv and .xlsx)."""
REPLICATES = 2
"""Each unit is measured twice (duplicates), as ISO 13528 B.2 describes."""
_EVENT = {"homogeneity": "homogeneity-form", "stability": "stability-form"}
_WAIVED = "homogeneity-waived"
_COLUMNS = ("run", "code", "replicate")


def run_order(secret: bytes, codes: Sequence[str], replicates: int = REPLICATES,
              purpose: str = "homogeneity/order") -> list[tuple[str, int]]:
    """Return the measuring order: every (code, replicate) once, shuffled by the round secret.

    The codes are sorted first, so the order depends on the secret and the set of codes
    only."""
    from planner.draw import Stream

    slots = [code for code in sorted(codes) for _ in range(replicates)]
    seen: dict[str, int] = {}
    out: list[tuple[str, int]] = []
    # A unit's replicates are alike: numbered in the order they are measured.
    for code in Stream(secret, purpose).shuffle(slots):
        seen[code] = seen.get(code, 0) + 1
        out.append((code, seen[code]))
    return out


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
    buf.write("# each unit's material is on its label and on the preparation sheet; n/a: "
              "this property is not measured on the unit's material\n")
    writer = csv.writer(buf, delimiter=sep, lineterminator="\n")
    columns = [name for _, name in _value_columns(study)]
    writer.writerow([*_COLUMNS, *columns, "remarks"])
    for run, (code, rep) in enumerate(order, start=1):
        material = checks[code]
        cells = ["" if study.measurand(mid).applies_to(material) else "n/a"
                 for mid, _ in _value_columns(study)]
        writer.writerow([run, codebook.format(code), rep, *cells, ""])
    return buf.getvalue()


def form_xlsx(csv_text: str) -> bytes:
    """Return the XLSX twin of a check form's CSV: the identity lines as ``# key: value`` in
    column A, the header and the rows; only the value and remarks cells are open (sheet
    protection without a password: it stops slips, not intent) and the value cells take
    numbers only. A spreadsheet stores numbers without a decimal mark, so the form's
    decimal convention matters for the CSV only."""
    from openpyxl import Workbook
    from openpyxl.styles import Font, PatternFill, Protection
    from openpyxl.worksheet.datavalidation import DataValidation

    lines = csv_text.splitlines()
    notes = [line for line in lines if line.startswith("#")]
    body = [line for line in lines if line and not line.startswith("#")]
    sep = ";" if body[0].count(";") > body[0].count(",") else ","
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=sep))
    header, data = rows[0], rows[1:]
    book = Workbook()
    sheet = book.active
    sheet.title = "check form"
    for note in notes:
        sheet.append([note])
        sheet.cell(sheet.max_row, 1).font = Font(italic=True, color="6B6B6B")
    sheet.append([])
    sheet.append(header)
    top = sheet.max_row
    for cell in sheet[top]:
        cell.font = Font(bold=True)
        cell.fill = PatternFill("solid", fgColor="EEF3F3")
    for row in data:
        sheet.append([int(c) if i in (0, 2) and c.isdigit() else (c or None)
                      for i, c in enumerate(row)])
    value_columns = range(len(_COLUMNS) + 1, len(header))  # 1-based, before 'remarks'
    check = DataValidation(type="decimal", operator="between", formula1="-1E+300",
                           formula2="1E+300", allow_blank=True, showErrorMessage=True,
                           errorTitle="not a number", error="Type the measured value as a number.")
    sheet.add_data_validation(check)
    grey = PatternFill("solid", fgColor="D9DCDD")
    for r in range(top + 1, sheet.max_row + 1):
        for c in [*value_columns, len(header)]:
            cell = sheet.cell(r, c)
            if cell.value == "n/a":
                cell.fill = grey
                continue
            cell.protection = Protection(locked=False)
            if c != len(header):
                check.add(cell.coordinate)
    for i, width in enumerate([6, 14, 10] + [12] * len(value_columns) + [40], start=1):
        sheet.column_dimensions[sheet.cell(1, i).column_letter].width = width
    sheet.freeze_panes = sheet.cell(top + 1, 1)
    sheet.protection.sheet = True
    out = io.BytesIO()
    book.save(out)
    return out.getvalue()


def write_forms(study: Any, staging: Path, round_id: str, host: str,
                checks: Mapping[str, Mapping[str, str]], secret: bytes, *, root: Path) -> None:
    """Write the host's check forms (CSV and XLSX) into ``staging/host`` (owner-only)."""
    from planner import files

    decimal = next(lab.decimal for lab in study.laboratories if lab.id == host)
    for kind, stem in FORM_NAMES.items():
        if not checks.get(kind):
            continue
        text = form_text(study, round_id, kind, checks[kind], secret, decimal=decimal)
        files.write_text(staging / "host" / f"{stem}.csv", text, root=root, private=True)
        files.write_bytes(staging / "host" / f"{stem}.xlsx", form_xlsx(text), root=root,
                          private=True)


def checks_of(ledger: Any, round_id: str) -> dict[str, dict[str, str]] | None:
    """Return the host's check units of a round ({kind: {code: material}}) as the planning
    event recorded them, or None for a round planned without them."""
    planned = ledger.events(round_id, "planned")
    found = planned[-1].detail.get("host_checks") if planned else None
    return {k: dict(v) for k, v in found.items()} if isinstance(found, dict) else None


def previous_sigma(study_dir: Path, ledger: Any, round_id: str
                   ) -> dict[str, dict[str, float]]:
    """Return measurand -> material -> sigma_pt of the newest evaluated round of the study
    before ``round_id`` (its statistics.json), or {} when there is none."""
    from planner import plan

    ids = [r.round for r in ledger.rounds()]
    earlier = ids[:ids.index(round_id)] if round_id in ids else ids
    for other in reversed(earlier):
        path = plan.round_dir(study_dir, other) / "report" / "statistics.json"
        try:
            data = json.loads(path.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            continue
        out: dict[str, dict[str, float]] = {}
        for mid, block in (data.get("measurands") or {}).items():
            for material, scores in (block.get("scores") or {}).items():
                sigma = scores.get("sigma_pt") if isinstance(scores, dict) else None
                if isinstance(sigma, (int, float)) and sigma > 0:
                    out.setdefault(mid, {})[material] = float(sigma)
        if out:
            return out
    return {}


def form_order(path: Path) -> list[tuple[str, int]]:
    """Return the (code, replicate) rows of a check form in the order of its run column
    (CSV or XLSX), for ``verify``; rows it cannot read are left out, so an edited form
    differs from the order the secret draws."""
    from planner import codes as codebook
    from planner import forms

    try:
        form = forms.read_form(path)
    except PlannerError:
        return []
    rows: list[tuple[int, str, int]] = []
    for row in form.rows:
        try:
            rows.append((int(str(row.get("run")).strip()),
                         codebook.compact(str(row.get("code") or "")),
                         int(str(row.get("replicate")).strip())))
        except (ValueError, TypeError, PlannerError):
            continue
    return [(code, rep) for _, code, rep in sorted(rows)]


def _number(raw: Any, decimal: str) -> float:
    """Return a number written in the form's decimal convention, by the rules of the result
    forms (``planner.intake``: no thousands separators, no limits or markers, finite and
    between 1e-100 and 1e100 in size, so that no square in the statistics overflows); raise
    IntakeError without a place."""
    from planner.intake import read_number

    return read_number(raw, decimal, "value")


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
            if any(str(row.get(name) or "").strip() not in ("", "n/a") for _, name in columns):
                problems.append(IntakeError("the row has a value but no code; every value "
                                            f"needs the code of its unit from the {kind} form",
                                            where))
            continue
        try:
            code = codebook.validate(raw)
        except PlannerError as exc:
            problems.append(IntakeError(f"{exc.message}; copy the code from the {kind} form",
                                        where))
            continue
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
                    # The line names the row: the same words on every row let
                    # intake.condense fold an unfilled form into one line.
                    problems.append(IntakeError(f"column {name!r} is empty; give the value, "
                                                "or say why under remarks", where))
                continue
            try:
                values[mid][code][rep - 1] = _number(cell, decimal)
            except PlannerError as exc:
                problems.append(IntakeError(f"column {name!r} of {raw} replicate {rep}: "
                                            f"{exc.message}", where))
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
    # One line, as the report and status print it; a reason is words, not 10 dots.
    reason = " ".join(reason.split())
    if len(reason) < 10 or sum(ch.isalpha() for ch in reason) < 5 or any(
            not ch.isprintable() for ch in reason):
        raise PlannerError("give the reason for waiving the homogeneity check in a sentence "
                           "(it is printed in the report)", Where("--waive"))
    with ledger.transaction():
        ledger.record_event(round_id, _WAIVED, {"reason": reason})


def recorded(ledger: Any, round_id: str, kind: str) -> dict[str, Any] | None:
    """Return the newest recorded form of a check (with ``at``, when it was recorded), or
    None."""
    events = ledger.events(round_id, _EVENT[kind])
    return {**events[-1].detail, "at": events[-1].at} if events else None


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
    return None, "no source before the round: the verdict waits for the round's sigma_pt"


def _judge(study: Any, checks: Mapping[str, Mapping[str, str]], form: Mapping[str, Any],
           late: Mapping[str, Any] | None, previous: Mapping[str, Mapping[str, float]] | None,
           round_sigma: Mapping[str, Mapping[str, float]] | None) -> dict[str, Any]:
    """Return measurand -> material -> the homogeneity (and stability) figures and verdict
    of one recorded form."""
    from planner import codes as codebook
    from planner.stats import homogeneity as hom

    out: dict[str, Any] = {}
    for measurand in study.all_measurands:
        per: dict[str, Any] = {}
        got = form["values"].get(measurand.id, {})
        for material in (m.id for m in study.materials):
            if not measurand.applies_to(material):
                continue
            codes = [c for c, mat in checks["homogeneity"].items() if mat == material]
            pairs = {c: got.get(c) for c in codes}
            complete = {c: p for c, p in pairs.items() if p is not None and None not in p}
            if len(complete) < hom.MIN_UNITS:
                per[material] = {"verdict": "cannot be computed",
                                 "why": f"{len(complete)} unit(s) with both values; at least "
                                        f"{hom.MIN_UNITS} are needed"}
                continue
            mean = sum(sum(p) for p in complete.values()) / (2 * len(complete))
            sigma, source = _sigma_pt(study, measurand, material, mean, previous)
            late_sigma = False
            if sigma is None and round_sigma is not None:
                own = round_sigma.get(measurand.id, {}).get(material)
                if own is not None:
                    sigma, source = own, "the round's sigma_pt (given at evaluation)"
                    late_sigma = True
            try:
                entry = hom.homogeneity(list(complete.values()), sigma)
            except (ValueError, OverflowError):
                # Values the form reader refuses (beyond 1e100) that reached the ledger some
                # other way: no figure rather than a traceback in every later command.
                per[material] = {"verdict": "cannot be computed",
                                 "why": "the recorded values are too large to compute with"}
                continue
            entry["sigma_pt_source"] = source
            entry["judged_at_evaluation"] = late_sigma
            entry["left_out"] = len(codes) - len(complete)
            # The unit whose replicates differ most: where a mistyped value usually is.
            widest = max(complete, key=lambda c: abs(complete[c][0] - complete[c][1]))
            entry["widest_unit"] = codebook.format(widest)
            if sigma is not None and not sigma > 0:
                entry["verdict"] = "cannot be computed"
                entry["why"] = (f"sigma_pt from {source} is {sigma:g}, so no criterion can be "
                                "drawn from it")
            if late is not None:
                kept = late["values"].get(measurand.id, {})
                after = [v for c, mat in checks["stability"].items() if mat == material
                         for v in (kept.get(c) or []) if v is not None]
                if after:
                    try:
                        entry["stability"] = hom.stability(
                            [v for p in complete.values() for v in p], after, sigma)
                    except (ValueError, OverflowError):
                        pass
            per[material] = entry
        out[measurand.id] = per
    return out


def assess(study: Any, checks: Mapping[str, Mapping[str, str]], ledger: Any, round_id: str, *,
           previous: Mapping[str, Mapping[str, float]] | None = None,
           round_sigma: Mapping[str, Mapping[str, float]] | None = None) -> dict[str, Any]:
    """Return the homogeneity (and, when recorded, stability) assessment per measurand and
    material. ``previous``: measurand -> material -> the previous round's sigma_pt;
    ``round_sigma``: the round's own sigma_pt (at evaluation), used where nothing came
    before the round.

    The newest form of each kind is judged; ``replaced`` lists the earlier homogeneity forms
    (file, sha256, at, and which materials did not pass on them), so that a check measured
    again until it passed shows. ``shipped_at`` is when the first packing list was printed
    (None before); ``after_shipping`` says no homogeneity form was recorded before then."""
    out: dict[str, Any] = {"recorded": False, "waiver": waiver(ledger, round_id),
                           "measurands": {}}
    forms = ledger.events(round_id, _EVENT["homogeneity"])
    late = recorded(ledger, round_id, "stability")
    # A first form recorded after the first packing list was printed: the check did not
    # gate this round.
    printed = [e.at for e in ledger.events(round_id, "printed")
               if any(str(d).endswith(("packing-list.pdf", "handover.pdf"))
                      for d in e.detail.get("documents", ()))]
    shipped = min(printed) if printed else None
    out["shipped_at"] = shipped
    if out["waiver"] is not None:
        out["waiver"]["after_shipping"] = shipped is not None and shipped < out["waiver"]["at"]
        out["waiver"]["before_any_form"] = not forms or out["waiver"]["at"] < forms[0].at
    if not forms:
        return out
    form = {**forms[-1].detail, "at": forms[-1].at}
    out["recorded"] = True
    out["file"] = form.get("file")
    out["sha256"] = form.get("sha256")
    out["at"] = form.get("at")
    out["stability_at"] = late.get("at") if late else None
    out["after_shipping"] = shipped is not None and shipped < forms[0].at
    out["remarks"] = form.get("remarks", {})
    out["measurands"] = _judge(study, checks, form, late, previous, round_sigma)
    out["replaced"] = []
    for event in forms[:-1]:
        failed, weak = _holding(_judge(study, checks, event.detail, None, previous,
                                       round_sigma))
        out["replaced"].append({"file": event.detail.get("file"),
                                "sha256": event.detail.get("sha256"), "at": event.at,
                                "not_passing": failed + weak})
    return out


_HOLD = ("not sufficiently homogeneous", "cannot be computed")
"""Verdicts that hold the packing lists."""


def _holding(measurands: Mapping[str, Mapping[str, Any]]) -> tuple[list[str], list[str]]:
    """Return (the items whose verdict holds the parcels, the items that pass with s_w not
    below 0.5 sigma_pt), each as 'measurand/material: why'."""
    failed = [f"{mid}/{mat}: {entry['verdict']}" for mid, per in measurands.items()
              for mat, entry in per.items() if entry["verdict"] in _HOLD]
    weak = [f"{mid}/{mat}: s_w = {entry['s_w']:.3g} is not below 0.5 sigma_pt = "
            f"{0.5 * entry['sigma_pt']:.3g} (replicates differ most on unit "
            f"{entry['widest_unit']})" for mid, per in measurands.items()
            for mat, entry in per.items()
            if entry["verdict"] not in _HOLD and entry.get("repeatability_ok") is False]
    return failed, weak


def shipping_gate(study: Any, ledger: Any, round_id: str,
                  checks: Mapping[str, Mapping[str, str]], *,
                  previous: Mapping[str, Mapping[str, float]] | None = None,
                  found: Mapping[str, Any] | None = None) -> str | None:
    """Return None when the participants' parcels may be printed, else why not.

    ``previous`` is the previous round's sigma_pt (``previous_sigma``), which judges the
    check before any result of this round, as ``ringplan homogeneity`` shows it. A pass
    whose s_w is not below 0.5 sigma_pt holds the parcels too: the method's scatter (often
    a single mistyped value) is then what the check measured. ``found``: the caller's
    ``assess`` of the same round and ``previous``, not computed again."""
    if study.design.homogeneity_units == 0 or not checks.get("homogeneity"):
        return None
    if waiver(ledger, round_id) is not None:
        return None
    if found is None:
        found = assess(study, checks, ledger, round_id, previous=previous)
    if not found["recorded"]:
        return (f"the host's homogeneity check is not recorded yet: record the filled "
                f"host/{FORM_CSV} with 'ringplan homogeneity STUDY_DIR --round {round_id} FILE', "
                f"or waive the check with 'ringplan homogeneity STUDY_DIR --round {round_id} "
                "--waive REASON'")
    failed, weak = _holding(found["measurands"])
    waive_hint = (f"or waive the check with 'ringplan homogeneity STUDY_DIR --round {round_id} "
                  "--waive REASON'")
    if failed:
        return ("the homogeneity check did not pass (" + "; ".join(failed + weak) + "); prepare "
                f"the batch again and plan a new round, {waive_hint}")
    if weak:
        return ("the homogeneity check cannot tell whether the batch is homogeneous, the "
                "replicates scatter too much (" + "; ".join(weak) + "); look for a mistyped "
                f"value or a value in another unit and record the corrected form, {waive_hint}")
    return None


def state_lines(study: Any, ledger: Any, round_id: str,
                checks: Mapping[str, Mapping[str, str]], *,
                previous: Mapping[str, Mapping[str, float]] | None = None) -> list[str]:
    """Return what ``status`` says of the host's checks: recorded or not, the verdicts in
    short, a waiver, and whether the packing lists may be printed (``previous`` as for
    ``shipping_gate``)."""
    found = assess(study, checks, ledger, round_id, previous=previous)
    out: list[str] = []
    if checks.get("homogeneity"):
        if not found["recorded"]:
            out.append("homogeneity check: not recorded yet")
        else:
            verdicts: dict[str, list[str]] = {}
            for mid, per in found["measurands"].items():
                for mat, entry in per.items():
                    verdicts.setdefault(entry["verdict"], []).append(f"{mid}/{mat}")
            out.append(f"homogeneity check: {found.get('file')} recorded; " + "; ".join(
                f"{verdict}: {', '.join(items) if len(items) < 6 else f'{len(items)} items'}"
                for verdict, items in verdicts.items()))
    if found["waiver"]:
        out.append(f"homogeneity check waived on {found['waiver']['at']}: "
                   f"{found['waiver']['reason']}")
    if checks.get("stability"):
        late = recorded(ledger, round_id, "stability")
        out.append(f"stability check: {late.get('file')} recorded" if late else
                   "stability check: not recorded yet (the host measures its retained units "
                   "after the round)")
    gate = shipping_gate(study, ledger, round_id, checks, previous=previous, found=found)
    out.append(f"packing lists: held: {gate}" if gate else "packing lists: may be printed")
    return out


def to_json(data: Mapping[str, Any]) -> str:
    """Return the assessment as JSON text."""
    return json.dumps(data, indent=1, ensure_ascii=False, default=str) + "\n"
