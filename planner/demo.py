"""The example study end to end, with simulated results: plan, print, test, receive, evaluate.

``build_demo`` copies the bundled example study (the invented company Norrvik
Polymers and five of its laboratories) into a folder and runs a whole round
there, as the people of the study would: the coordinator plans it, the host
prints the documents, one laboratory reports a damaged unit and the host
sends it a spare, every laboratory fills in its result form (in its own decimal
convention; one returns the spreadsheet instead of the CSV), the coordinator
receives the forms, opens the key and evaluates.

The results are simulated, and invented: a true melt flow rate per material,
a small bias per laboratory, a small laboratory-by-material effect and
repeatability noise, all from numpy's PCG64 generator with the given seed, and
one laboratory (``BIASED``) reading clearly high, so that its scores show it.
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
           "ROUND"]

PASSPHRASE = "demo-only-passphrase"
"""The passphrase that seals the demo's key: for the demo only, never for a real round."""
ROUND = "2027-1"
BIASED = ("lin", "crx")
"""The laboratory whose simulated results read clearly high: the first of these that
does not host the round (the host's own results are a different story)."""
BIAS = 0.15
"""Its relative bias (+15 %)."""

# Invented true values (g/10 min), spread over the range a melt flow tester covers.
TRUE_VALUES = {"HD-BM5": 0.32, "LL-F1": 1.05, "PP-H12": 12.0, "PP-C8": 7.8, "RE-MIX": 2.6,
               "PP-FR": 24.0}
_LAB_SD = 0.012       # relative SD of the laboratories' biases
_INTERACTION_SD = 0.004  # relative SD of laboratory x material effects
_REPEAT_SD = 0.010    # relative repeatability SD
_WITH_U = {"tor": 0.05, "crx": 0.04}  # laboratories that state an expanded uncertainty (relative)
_XLSX_LAB = "crx"     # returns the spreadsheet form instead of the CSV
_DAMAGED_LAB = "hel"  # reports a damaged unit and tests a spare in its place


def example_spec() -> Path:
    """Return the bundled example study.yaml (installed package or source checkout)."""
    from planner.resources import example_path

    try:
        path = example_path("norrvik-mfr", "study.yaml")
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
              sent: Mapping[str, str]) -> dict[str, tuple[float, float | None]]:
    """Return code -> (value, expanded uncertainty or None) for every test and spare unit.

    A spare is measured by the laboratory it was ``sent`` to (spare code -> laboratory);
    one still with the host, by the host.
    """
    import numpy as np

    rng = np.random.Generator(np.random.PCG64(seed))
    labs = [lab.id for lab in study.laboratories]
    mats = [m.id for m in study.materials]
    bias = {lab: float(rng.normal(0.0, _LAB_SD)) for lab in labs}
    bias[biased] = BIAS + float(rng.normal(0.0, _LAB_SD / 3))
    inter = {(lab, m): float(rng.normal(0.0, _INTERACTION_SD)) for lab in labs for m in mats}
    out: dict[str, tuple[float, float | None]] = {}
    for u in sorted(units, key=lambda u: u.code):
        if u.kind not in ("test", "spare"):
            continue
        true = TRUE_VALUES.get(u.material, 5.0)
        lab = sent.get(u.code, u.lab)
        x = true * (1 + bias[lab] + inter[(lab, u.material)]
                    + float(rng.normal(0.0, _REPEAT_SD)))
        value = float(f"{x:.4g}")
        rel_u = _WITH_U.get(lab)
        out[u.code] = (value, float(f"{value * rel_u:.2g}") if rel_u else None)
    return out


def _number(v: float, decimal: str) -> str:
    text = repr(v)
    return text.replace(".", ",") if decimal == "comma" else text


def _fill_csv(text: str, values: Mapping[str, tuple[float, float | None]], *, decimal: str,
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
        value, unc = values[code]
        row[col["value"]] = _number(value, decimal)
        row[col["uncertainty"]] = _number(unc, decimal) if unc is not None else ""
        row[col["date"]] = day_of(int(row[col["trial"]])).isoformat()
        row[col["analyst"]] = analyst
        row[col["remarks"]] = remarks
        writer.writerow(row)
    return "\n".join(out) + "\n" + buf.getvalue()


def _fill_xlsx(source: Path, target: Path, values: Mapping[str, tuple[float, float | None]], *,
               day_of: Callable[[int], date], analyst: str) -> None:
    """Fill the spreadsheet form's value, uncertainty, date and analyst cells; save as target."""
    from openpyxl import load_workbook

    from planner import codes

    book = load_workbook(source)
    sheet = book.worksheets[0]
    col: dict[str, int] = {}
    for row in sheet.iter_rows():
        cells = {str(c.value).strip().lower(): c.column for c in row if c.value is not None}
        if not col:
            if "code" in cells and "value" in cells:
                col = cells
            continue
        code_cell = sheet.cell(row=row[0].row, column=col["code"]).value
        if not code_cell:
            continue
        value, unc = values[codes.compact(str(code_cell))]
        r = row[0].row
        sheet.cell(row=r, column=col["value"]).value = value
        if unc is not None:
            sheet.cell(row=r, column=col["uncertainty"]).value = unc
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
    from planner import audit, evaluate, overview, returns, rotation, spares, spec
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
        printed = render.print_round(study, out, ROUND, key=key, workers=workers)
        with ledger.transaction():
            ledger.record_event(ROUND, "printed", {
                "documents": [p.relative_to(folder).as_posix() for p in printed]})

        biased = next(lab for lab in BIASED if lab != host)
        manifest = planning.read_manifest(folder)
        clock.set(test_start)
        damaged = manifest["labs"][_DAMAGED_LAB]["trials"][0][0]
        swap = spares.issue_spare(study, out, ROUND, ledger, lab=_DAMAGED_LAB, damaged=damaged,
                                  key=key, pick=random.Random(seed).choice)
        values = _simulate(study, result.units, seed=seed, biased=biased,
                           sent={swap.spare: swap.lab})
        returned = files.make_folders(out / "returned", root=out)
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
    }
