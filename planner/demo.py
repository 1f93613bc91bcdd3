"""The example study end to end, with simulated results: plan, print, test, receive, evaluate.

``build_demo`` copies the bundled example study (the invented company Norrvik
Polymers and five of its laboratories, testing melt flow rate, density and ash
content of the same pellets) into a folder and runs a whole round
there, as the people of the study would: the coordinator plans it, the host
prints the documents, one laboratory reports a damaged unit and the host
sends it a spare, every laboratory fills in its result form (in its own decimal
convention; one returns the spreadsheet instead of the CSV), the coordinator
receives the forms, opens the key and evaluates. Before shipping, the host
measures its homogeneity units: one material (``INHOMOGENEOUS``, a recycled blend)
is made slightly inhomogeneous in melt flow rate, so the shipping gate holds the
packing lists until the coordinator waives the check with a reason; after the
round the host measures its retained units for the stability check, and the
evaluation widens u(x_pt) of that material by the between-unit SD.

The results are simulated, and invented: per measurand a true value per material,
a small bias per laboratory, a small laboratory-by-material effect and
repeatability noise, all from numpy's PCG64 generator with the given seed, and
one laboratory (``BIASED``) reading clearly high on melt flow rate, so that its
scores show it. A study in the single-measurand form is simulated as melt flow rate.
The round secret is derived from the seed too, so a demo is the same every
time it is built with the same seed. The ledger runs on a simulated clock that
walks through the round's dates; nothing reads the real clock.
"""

from __future__ import annotations

import csv
import hashlib
import io
import random
from collections.abc import Callable, Mapping
from datetime import UTC, date, datetime, time, timedelta
from pathlib import Path
from typing import Any

from planner import files
from planner.errors import PlannerError, Where

__all__ = ["build_demo", "check_target", "example_spec", "TRUE_VALUES", "BIASED", "BIAS", "PASSPHRASE",
           "ROUND", "INHOMOGENEOUS", "WAIVER"]

PASSPHRASE = "demo-only-passphrase"
"""The passphrase that seals the demo's key: for the demo only, never for a real round."""
ROUND = "2027-1"
BIASED = ("lin", "crx")
"""The laboratory whose simulated results read clearly high: the first of these that
does not host the round (the host's own results are a different story)."""
BIAS = 0.15
"""Its relative bias (+15 %)."""

# Invented true values per measurand: melt flow rate (g/10 min) spread over the range a melt
# flow tester covers, density (g/cm3) and ash content (% m/m) as such grades have them.
TRUE_VALUES = {
    "mfr": {"HD-BM5": 0.32, "LL-F1": 1.05, "PP-H12": 12.0, "PP-C8": 7.8, "RE-MIX": 2.6,
            "PP-FR": 24.0},
    "density": {"HD-BM5": 0.955, "LL-F1": 0.919, "PP-H12": 0.905, "PP-C8": 0.901,
                "RE-MIX": 0.938, "PP-FR": 1.043},
    "ash": {"RE-MIX": 1.85, "PP-FR": 21.4},
}
# Relative SDs per measurand: the laboratories' biases, laboratory x material effects and
# repeatability; ``digits`` significant digits are reported.
_MODEL = {
    "mfr": {"lab": 0.012, "inter": 0.004, "repeat": 0.010, "digits": 4},
    "density": {"lab": 0.0006, "inter": 0.0002, "repeat": 0.0003, "digits": 4},
    "ash": {"lab": 0.025, "inter": 0.008, "repeat": 0.015, "digits": 3},
}
_SHORTHAND_AS = "mfr"  # a single-measurand study is simulated as melt flow rate
_BIASED_MEASURAND = "mfr"
# Laboratories that state an expanded uncertainty (relative) where it is optional; where the
# study requires one, every laboratory gives one (``_REQUIRED_U``).
_WITH_U = {"tor": 0.05, "crx": 0.04}
_REQUIRED_U = 0.004
INHOMOGENEOUS = ("RE-MIX", "mfr", 0.035)
"""Material, measurand and relative between-unit SD of the batch the demo makes slightly
inhomogeneous (the others: ``_UNIT_SD`` times the measurand's repeatability)."""
_UNIT_SD = 0.1
WAIVER = ("RE-MIX is a recycled blend whose pellets differ a little by nature; it ships as "
          "it is, and the evaluation adds its between-unit SD to u(x_pt)")
"""The coordinator's reason for waiving the homogeneity check in the demo."""
_XLSX_LAB = "crx"     # returns the spreadsheet form instead of the CSV
_DAMAGED_LAB = "hel"  # reports a damaged unit and tests a spare in its place


def example_spec() -> Path:
    """Return the bundled example study.yaml (installed package or source checkout)."""
    from planner.resources import example_path

    try:
        path = example_path("norrvik-pellets", "study.yaml")
    except FileNotFoundError:
        path = None
    if path is not None and path.is_file():
        return path
    raise PlannerError("the example study is missing from this installation; reinstall "
                       "ringplan")


class _Clock:
    """A clock for the ledger that the demo moves along the round's dates."""

    def __init__(self, start: datetime) -> None:
        self.now = start

    def __call__(self) -> datetime:
        return self.now

    def set(self, day: date, hour: int = 10) -> None:
        self.now = datetime.combine(day, time(hour), tzinfo=UTC)


def _secret(seed: int) -> bytes:
    # A demo secret from the seed, so the same seed builds the same round; a real
    # round draws its secret from the operating system (draw.new_secret).
    return hashlib.sha256(f"ringplan demo round secret {seed}".encode()).digest()


def _simulate(study: Any, units: Any, *, seed: int, biased: str,
              sent: Mapping[str, str]) -> dict[str, dict[str, tuple[float, float | None]]]:
    """Return code -> measurand id -> (value, expanded uncertainty or None) for every test and
    spare unit, for each measurand that applies to the unit's material.

    A spare is measured by the laboratory it was ``sent`` to (spare code -> laboratory);
    one still with the host, by the host.
    """
    import numpy as np

    rng = np.random.Generator(np.random.PCG64(seed))
    labs = [lab.id for lab in study.laboratories]
    mats = [m.id for m in study.materials]
    out: dict[str, dict[str, tuple[float, float | None]]] = {}
    for measurand in study.all_measurands:
        name = _SHORTHAND_AS if measurand.id == "value" else measurand.id
        model = _MODEL.get(name, _MODEL[_SHORTHAND_AS])
        truth = TRUE_VALUES.get(name, {})
        bias = {lab: float(rng.normal(0.0, model["lab"])) for lab in labs}
        if name == _BIASED_MEASURAND:
            bias[biased] = BIAS + float(rng.normal(0.0, model["lab"] / 3))
        inter = {(lab, m): float(rng.normal(0.0, model["inter"])) for lab in labs for m in mats}
        for u in sorted(units, key=lambda u: u.code):
            if u.kind not in ("test", "spare") or not measurand.applies_to(u.material):
                continue
            true = truth.get(u.material, 5.0)
            lab = sent.get(u.code, u.lab)
            x = true * (1 + bias[lab] + inter[(lab, u.material)]
                        + float(rng.normal(0.0, model["repeat"])))
            value = float(f"{x:.{model['digits']}g}")
            rel_u = (None if measurand.uncertainty == "none" else _REQUIRED_U
                     if measurand.uncertainty == "required" else _WITH_U.get(lab))
            out.setdefault(u.code, {})[measurand.id] = (
                value, float(f"{value * rel_u:.2g}") if rel_u else None)
    return out


def _fill_check(study: Any, text: str, material_of: Mapping[str, str], *, seed: int,
                drift: float = 0.0) -> str:
    """Return the host's check form (CSV) filled in: per unit a between-unit effect (relative
    SD ``_UNIT_SD`` times the repeatability, ``INHOMOGENEOUS`` its own), per value the
    measurand's repeatability (the host's, half the model's),
    times (1 + ``drift``) for units measured after the round."""
    import numpy as np

    from planner import codes

    rng = np.random.Generator(np.random.PCG64(seed + 1000))
    lines = text.splitlines()
    comma = "# decimal: comma" in lines
    sep = ";" if comma else ","
    body = [ln for ln in lines if not ln.startswith("#")]
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=sep))
    header = rows[0]
    effect: dict[tuple[str, str], float] = {}
    out_rows = [header]
    for row in rows[1:]:
        code = row[1]
        material = material_of[codes.compact(code)]
        for i, name in enumerate(header):
            if i < 3 or name == "remarks" or row[i] == "n/a":
                continue
            measurand = _SHORTHAND_AS if name == "value" else name
            model = _MODEL.get(measurand, _MODEL[_SHORTHAND_AS])
            sd = (INHOMOGENEOUS[2] if (material, measurand) == INHOMOGENEOUS[:2]
                  else _UNIT_SD * model["repeat"])
            if (code, name) not in effect:
                effect[code, name] = float(rng.normal(0.0, sd))
            true = TRUE_VALUES.get(measurand, {}).get(material, 5.0)
            x = true * (1 + effect[code, name] + float(rng.normal(0.0, model["repeat"] / 2))
                        ) * (1 + drift)
            row[i] = _number(float(f"{x:.{model['digits'] + 1}g}"), "comma" if comma else "point")
        out_rows.append(row)
    buf = io.StringIO()
    csv.writer(buf, delimiter=sep, lineterminator="\n").writerows(out_rows)
    return "\n".join(ln for ln in lines if ln.startswith("#")) + "\n" + buf.getvalue()


def _record_check(study: Any, out: Path, ledger: Any, kind: str, *, seed: int) -> Path:
    """Fill the host's check form of ``kind`` as the host would, save it under returned/ and
    record it as ``ringplan homogeneity`` does; return the filled form."""
    from planner import homogeneity
    from planner import plan as planning

    folder = planning.round_dir(out, ROUND)
    blank = (folder / "host" / f"{homogeneity.FORM_NAMES[kind]}.csv").read_text(encoding="utf-8")
    target = out / "returned" / f"{homogeneity.FORM_NAMES[kind]}.csv"
    checks = homogeneity.checks_of(ledger, ROUND) or {}
    files.write_text(target, _fill_check(study, blank, checks[kind],
                                         seed=seed + (kind == "stability")),
                     root=out, private=False)
    data = homogeneity.read_values(study, ROUND, kind, checks[kind], target)
    homogeneity.record(ledger, ROUND, kind, data)
    return target


def _columns(measurand_id: str) -> tuple[str, str]:
    """Return the form's value and uncertainty column names of a measurand."""
    if measurand_id == "value":
        return "value", "uncertainty"
    return measurand_id, f"{measurand_id} uncertainty"


def _number(v: float, decimal: str) -> str:
    text = repr(v)
    return text.replace(".", ",") if decimal == "comma" else text


def _fill_csv(text: str, values: Mapping[str, Mapping[str, tuple[float, float | None]]], *,
              decimal: str,
              swap: Mapping[str, str], day_of: Callable[[int], date], analyst: str) -> str:
    """Return the blank CSV form filled in as the laboratory would (its separator and decimal)."""
    from planner import codes

    sep = ";" if decimal == "comma" else ","
    out: list[str] = []
    body: list[str] = []
    for line in text.splitlines():
        (out if line.startswith("#") and not body else body).append(line)
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=sep))
    header = rows[0]
    col = {name: i for i, name in enumerate(header)}
    buf = io.StringIO()
    writer = csv.writer(buf, delimiter=sep, lineterminator="\n")
    writer.writerow(header)
    for row in rows[1:]:
        code = codes.compact(row[col["code"]])
        remarks = ""
        if code in swap:
            remarks = f"unit {codes.format(code)} arrived damaged; tested spare instead"
            code = swap[code]
            row[col["code"]] = codes.format(code)
        for measurand, (value, unc) in values[code].items():
            value_col, unc_col = _columns(measurand)
            row[col[value_col]] = _number(value, decimal)
            if unc_col in col:
                row[col[unc_col]] = _number(unc, decimal) if unc is not None else ""
        row[col["date"]] = day_of(int(row[col["trial"]])).isoformat()
        row[col["analyst"]] = analyst
        row[col["remarks"]] = remarks
        writer.writerow(row)
    return "\n".join(out) + "\n" + buf.getvalue()


def _fill_xlsx(source: Path, target: Path,
               values: Mapping[str, Mapping[str, tuple[float, float | None]]], *,
               day_of: Callable[[int], date], analyst: str) -> None:
    """Fill the spreadsheet form's value, uncertainty, date and analyst cells; save as target."""
    from openpyxl import load_workbook

    from planner import codes

    book = load_workbook(source)
    sheet = book.worksheets[0]
    col: dict[str, int] = {}
    for row in sheet.iter_rows():
        cells = {str(c.value).strip(): c.column for c in row if c.value is not None}
        if not col:
            if "code" in cells and "trial" in cells:
                col = cells
            continue
        code_cell = sheet.cell(row=row[0].row, column=col["code"]).value
        if not code_cell:
            continue
        r = row[0].row
        for measurand, (value, unc) in values[codes.compact(str(code_cell))].items():
            value_col, unc_col = _columns(measurand)
            sheet.cell(row=r, column=col[value_col]).value = value
            if unc is not None and unc_col in col:
                sheet.cell(row=r, column=col[unc_col]).value = unc
        trial = int(sheet.cell(row=r, column=col["trial"]).value)
        sheet.cell(row=r, column=col["date"]).value = day_of(trial)
        sheet.cell(row=r, column=col["analyst"]).value = analyst
    files.write_atomic(target, lambda temp: book.save(temp), root=target.parent,
                       private=False)


def check_target(out: Path) -> None:
    """Raise PlannerError if ``out`` exists and is not an empty folder."""
    if out.exists() and (not out.is_dir() or any(out.iterdir())):
        raise PlannerError("the folder exists and is not empty; give a new folder for the demo",
                           Where(str(out)))


def build_demo(out: Path, *, passphrase: str = PASSPHRASE, seed: int = 7,
               workers: int = 1) -> dict[str, Any]:
    """Build the example study in ``out`` and run one round end to end; return what was made.

    ``out`` must be missing or empty. Returns a dict with the study folder, round,
    host, fingerprint, the laboratory simulated off, and the paths to open first
    (report, a letter, a run sheet). Raises PlannerError if ``out`` holds files.
    """
    from planner import audit, evaluate, homogeneity, overview, returns, rotation, spares, spec
    from planner import plan as planning
    from planner import render
    from planner.ledger import Ledger

    out = Path(out)
    check_target(out)
    files.write_bytes(out / spec.SPEC_NAME, example_spec().read_bytes(), root=out,
                      private=False)
    study = spec.load(out)
    host = rotation.propose(study, overview.past_rounds(study, out), rounds=1)[0].host
    dates, route = planning.dates_for(study, host)
    day = dates.to_json()
    test_start = date.fromisoformat(day["test_start"])
    test_end = date.fromisoformat(day["test_end"])
    due = date.fromisoformat(day["results_due"])
    prepare = date.fromisoformat(day["prepare_on"]) if day.get("prepare_on") else test_start
    clock = _Clock(datetime.combine(prepare - timedelta(days=14), time(9), tzinfo=UTC))

    def day_of(trial: int) -> date:
        # Trials on separate days across the test window, as the run sheet asks.
        span = max((test_end - test_start).days, 0)
        return test_start + timedelta(days=min(span, (trial - 1) * max(1, span // 3)))

    with Ledger.open(out, clock=clock) as ledger:
        result = planning.plan_round(study, round_id=ROUND, host=host, dates=dates,
                                     secret=_secret(seed), taken=ledger.codes(), route=route)
        folder = planning.write_round(study, out, result, ledger, passphrase=passphrase)
        key = planning.key_of(result)
        clock.set(prepare - timedelta(days=1))
        # The host's documents first; the packing lists wait for the homogeneity check.
        printed = render.print_round(study, out, ROUND, key=key, workers=workers,
                                     hold={"packing"})
        with ledger.transaction():
            ledger.record_event(ROUND, "printed", {
                "documents": [p.relative_to(folder).as_posix() for p in printed]})
        files.make_folders(out / "returned", root=out)
        clock.set(prepare, hour=15)
        checks = homogeneity.checks_of(ledger, ROUND) or {}
        held = None
        if checks.get("homogeneity"):
            _record_check(study, out, ledger, "homogeneity", seed=seed)
            held = homogeneity.shipping_gate(study, ledger, ROUND, checks)
            if held:
                clock.set(prepare, hour=16)
                homogeneity.waive(ledger, ROUND, WAIVER)
        lists = render.print_round(study, out, ROUND, key=key, only="packing", workers=workers)
        with ledger.transaction():
            ledger.record_event(ROUND, "printed", {
                "documents": [p.relative_to(folder).as_posix() for p in lists], "only": "packing"})
        printed += lists

        biased = next(lab for lab in BIASED if lab != host)
        manifest = planning.read_manifest(folder)
        clock.set(test_start)
        damaged = manifest["labs"][_DAMAGED_LAB]["trials"][0][0]
        swap = spares.issue_spare(study, out, ROUND, ledger, lab=_DAMAGED_LAB, damaged=damaged,
                                  key=key, pick=random.Random(seed).choice)
        values = _simulate(study, result.units, seed=seed, biased=biased,
                           sent={swap.spare: swap.lab})
        returned = out / "returned"
        forms = []
        for lab in study.laboratories:
            lab_dir = folder / "labs" / lab.id
            analyst = lab.contact.name.split()[0]
            if lab.id == _XLSX_LAB and (lab_dir / "result-form.xlsx").is_file():
                target = returned / f"{lab.id}.xlsx"
                _fill_xlsx(lab_dir / "result-form.xlsx", target, values, day_of=day_of,
                           analyst=analyst)
            else:
                target = returned / f"{lab.id}.csv"
                text = (lab_dir / "result-form.csv").read_text(encoding="utf-8")
                files.write_text(target, _fill_csv(text, values, decimal=lab.decimal,
                                                   swap={swap.damaged: swap.spare}
                                                   if lab.id == swap.lab else {},
                                                   day_of=day_of, analyst=analyst),
                                 root=out, private=False)
            forms.append(target)
        clock.set(min(test_end + timedelta(days=1), due))
        receipts = returns.receive(study, out, ROUND, forms, ledger)
        if checks.get("stability"):
            _record_check(study, out, ledger, "stability", seed=seed)
        clock.set(due, hour=15)
        audit.unseal_round(study, out, ROUND, ledger, passphrase=passphrase)
        report_dir = evaluate.evaluate_round(study, out, ROUND, ledger, workers=workers)
        status = ledger.round_status(ROUND)

    first_other = next(lab.id for lab in study.laboratories if lab.id != host)
    return {
        "study_dir": out, "round": ROUND, "host": host, "fingerprint": result.fingerprint,
        "passphrase": passphrase, "biased_lab": biased, "status": status,
        "received": [r.lab for r in receipts], "spare": {"lab": swap.lab,
                                                        "damaged": swap.damaged,
                                                        "spare": swap.spare},
        "report": report_dir / evaluate.REPORT_NAME,
        "statistics": report_dir / evaluate.STATISTICS_NAME,
        "results": report_dir / evaluate.RESULTS_NAME,
        "letter": report_dir / evaluate.letter_name(biased),
        "letters": sorted(report_dir.glob("letter-*.pdf")),
        "run_sheet": folder / "labs" / first_other / "run-sheet.pdf",
        "printed": printed,
        "held": held,
    }
