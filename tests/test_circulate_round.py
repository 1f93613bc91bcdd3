"""A circulating round end to end: plan, print, measure at every stop, receive, unseal, evaluate.

The invented hardness example (6 laboratories, 4 plaques, host ``lin``)
goes round with simulated readings: a true hardness per plaque, a bias per
laboratory, repeatability noise, and one plaque (PA6, dry as moulded) that
softens a little at every stop, as such a plaque does when it takes up
moisture on its way. The host's drift check must flag that plaque and pass the
others. Expected figures are plain arithmetic (``statistics`` of the standard
library) on the simulated values, never our own earlier output.
"""

from __future__ import annotations

import csv
import io
import json
import math
import re
import shutil
import statistics as pystats
from datetime import UTC, date, datetime, time, timedelta

import pytest
from conftest import PASSPHRASE, ROOT, SECRET

from planner import (
    audit,
    circulate,
    codes,
    evaluate,
    forms,
    intake,
    plan,
    results,
    returns,
    spares,
    spec,
    status,
)
from planner.errors import IntakeError, LedgerError
from planner.ledger import Ledger

HARDNESS = ROOT / "examples" / "norrvik-hardness"
ROUND = "2027-C"
HOST = "lin"
# Invented true hardness (Shore D) of the plaques.
TRUE = {"PL-HD": 62.0, "PL-PP": 71.5, "PL-PA": 79.0, "PL-PM": 83.5}
DRIFTING = "PL-PA"
DRIFT_PER_STOP = -0.25   # Shore D per stop along the route
LAB_SD = 0.8             # SD of the laboratories' biases
REPEAT_SD = 0.12         # repeatability SD of one reading
SEED = 11


class _Clock:
    def __init__(self) -> None:
        self.now = datetime(2027, 1, 20, 9, tzinfo=UTC)

    def __call__(self) -> datetime:
        return self.now

    def set(self, day: date) -> None:
        self.now = datetime.combine(day, time(10), tzinfo=UTC)


def _slot(station):
    return circulate.station_key(station["lab"], station["visit"])


def _simulate(study, manifest, key):
    """Return (slot, code, trial) -> reading for every measurement of the route."""
    import numpy as np

    rng = np.random.Generator(np.random.PCG64(SEED))
    material_of = {u["code"]: u["material"] for u in key["units"]}
    bias = {lab.id: float(rng.normal(0.0, LAB_SD)) for lab in study.laboratories}
    out = {}
    for station in manifest["route"]:
        slot = _slot(station)
        for trial, run in enumerate(audit.slot_runs(manifest, slot), start=1):
            for code in run:
                m = material_of[code]
                drift = DRIFT_PER_STOP * (station["index"] - 1) if m == DRIFTING else 0.0
                x = TRUE[m] + bias[station["lab"]] + drift + float(rng.normal(0.0, REPEAT_SD))
                out[(slot, code, trial)] = round(x, 1)
    return out


def _fill(text, values, *, slot, decimal, first_day, analyst):
    """Return the blank CSV form filled in as the laboratory would."""
    sep = ";" if decimal == "comma" else ","
    head = [line for line in text.splitlines() if line.startswith("#")]
    body = [line for line in text.splitlines() if line and not line.startswith("#")]
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=sep))
    col = {name: i for i, name in enumerate(rows[0])}
    buf = io.StringIO()
    writer = csv.writer(buf, delimiter=sep, lineterminator="\n")
    writer.writerow(rows[0])
    for row in rows[1:]:
        trial = int(row[col["trial"]])
        value = values[(slot, codes.compact(row[col["code"]]), trial)]
        shown = repr(value)
        row[col["value"]] = shown.replace(".", ",") if decimal == "comma" else shown
        row[col["date"]] = (first_day + timedelta(days=trial - 1)).isoformat()
        row[col["analyst"]] = analyst
        writer.writerow(row)
    return "\n".join(head) + "\n" + buf.getvalue()


def _form_name(station):
    visit = station["visit"]
    return f"result-form-{visit}.csv" if visit not in (None, "start") else "result-form.csv"


@pytest.fixture(scope="module")
def round_(tmp_path_factory):
    """The whole round, run once: returns what the tests look at."""
    from planner import render

    folder_root = tmp_path_factory.mktemp("circ") / "norrvik-hardness"
    shutil.copytree(HARDNESS, folder_root)
    study = spec.load(folder_root)
    clock = _Clock()
    dates, route = plan.dates_for(study, HOST)
    made = plan.plan_round(study, round_id=ROUND, host=HOST, dates=dates, secret=SECRET,
                           route=route)
    key = plan.key_of(made)
    gate_before_end = None
    with Ledger.open(folder_root, clock=clock) as ledger:
        folder = plan.write_round(study, folder_root, made, ledger, passphrase=PASSPHRASE)
        printed = render.print_round(study, folder_root, ROUND, key=key)
        manifest = plan.read_manifest(folder)
        values = _simulate(study, manifest, key)
        returned = folder_root / "returned"
        returned.mkdir()
        for station in manifest["route"]:
            slot = _slot(station)
            lab = study.lab(station["lab"])
            text = (folder / "labs" / lab.id / _form_name(station)).read_text(encoding="utf-8")
            target = returned / f"{slot.replace('@', '-')}.csv"
            target.write_text(_fill(text, values, slot=slot, decimal=lab.decimal,
                                    first_day=date.fromisoformat(station["test_start"]),
                                    analyst=lab.contact.name.split()[0]), encoding="utf-8")
            clock.set(date.fromisoformat(station["test_end"]) + timedelta(days=1))
            if station["visit"] == "end":
                try:
                    audit.check_gate(study, ledger, ROUND, manifest=manifest)
                except LedgerError as exc:
                    gate_before_end = str(exc)
            returns.receive(study, folder_root, ROUND, [target], ledger)
        standing = status.round_status_table(study, folder_root, ROUND, ledger,
                                             today=clock.now.date())
        audit.unseal_round(study, folder_root, ROUND, ledger, passphrase=PASSPHRASE)
        report_dir = evaluate.evaluate_round(study, folder_root, ROUND, ledger)
        verdict = audit.verify_round(study, folder_root, ROUND, ledger)
    stats = results.measurand_view(  # the single-measurand form
        json.loads((report_dir / evaluate.STATISTICS_NAME).read_text(encoding="utf-8")), "value")
    return {"study": study, "study_dir": folder_root, "folder": folder, "manifest": manifest,
            "key": key, "values": values, "printed": printed, "status": standing,
            "stats": stats, "report_dir": report_dir, "gate_before_end": gate_before_end,
            "verdict": verdict}


def _pdf_text(path):
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        return "\n".join(page.extract_text() or "" for page in pdf.pages)


def _host_values(r, slot, material):
    material_of = {u["code"]: u["material"] for u in r["key"]["units"]}
    return [v for (s, code, _), v in sorted(r["values"].items())
            if s == slot and material_of[code] == material]


# --- the route's documents -------------------------------------------------------------

@pytest.fixture
def r(round_):
    return round_


def test_hand_over_sheets_name_the_right_neighbours(r):
    study, folder = r["study"], r["folder"]
    for station in r["manifest"]["route"]:
        visit = station["visit"]
        name = f"handover-{visit}.pdf" if visit else "handover.pdf"
        path = folder / "labs" / station["lab"] / name
        assert path.is_file(), path
        text = " ".join(_pdf_text(path).split())
        assert study.lab(station["lab"]).name in text
        if station["received_from"]:
            assert study.lab(station["received_from"]).name in text
            assert f"{station['arrive']}" in text
        else:
            assert "the set starts here" in text
        if station["next_lab"]:
            nxt = study.lab(station["next_lab"])
            assert nxt.name in text and nxt.contact.email in text
            assert station["pass_on"] in text
        else:
            assert "the route ends here" in text
        for code in r["manifest"]["artefacts"]:
            assert codes.format(code) in text
        assert "page 1 of" in text


def test_host_prints_one_label_per_artefact_without_destination(r):
    from planner.render import labels

    items = labels.host_labels(r["study"], r["manifest"], r["key"])
    found = [i for i in items if isinstance(i, labels.Label)]
    assert sorted(i.code for i in found) == sorted(r["manifest"]["artefacts"])
    assert all(i.trial == "circulating artefact" and i.lab == () and i.use_by == ""
               and i.storage for i in found)
    text = _pdf_text(r["folder"] / "host" / "labels.pdf")
    assert text.count("circulating artefact") == len(found)


def test_host_gets_a_run_sheet_and_form_per_stop(r):
    lab_dir = r["folder"] / "labs" / HOST
    for name in ("run-sheet.pdf", "run-sheet-middle.pdf", "run-sheet-end.pdf",
                 "result-form.xlsx", "result-form-middle.xlsx", "result-form-end.xlsx",
                 "handover-start.pdf", "handover-middle.pdf", "handover-end.pdf"):
        assert (lab_dir / name).is_file(), name
    middle = next(s for s in r["manifest"]["route"] if s["visit"] == "middle")
    text = " ".join(_pdf_text(lab_dir / "run-sheet-middle.pdf").split())
    assert f"Test from {middle['test_start']} to {middle['test_end']}" in text
    printed = re.findall(r"\b[0-9A-Z]{4}-[0-9A-Z]{5}\b", text)
    runs = r["manifest"]["host_visits"]["middle"]
    assert printed == [codes.format(c) for run in runs for c in run]
    assert not (lab_dir / "packing-list.pdf").exists()


def test_no_material_on_any_lab_document(r):
    from openpyxl import load_workbook

    secret = [w for m in r["study"].materials for w in (m.id, m.description)]
    files = sorted(p for p in (r["folder"] / "labs").rglob("*") if p.is_file())
    assert len(files) >= 3 * len(r["manifest"]["route"])
    for path in files:
        if path.suffix == ".pdf":
            text = _pdf_text(path)
        elif path.suffix == ".xlsx":
            book = load_workbook(path, read_only=True)
            text = " ".join(str(c) for sh in book.worksheets for row in sh.iter_rows(
                values_only=True) for c in row if c is not None)
            book.close()
        else:
            text = path.read_text(encoding="utf-8")
        for word in secret:
            assert word not in text, (path, word)
    manifest_text = (r["folder"] / plan.MANIFEST_NAME).read_text(encoding="utf-8")
    assert not any(word in manifest_text for word in secret)


# --- intake ------------------------------------------------------------------------------

def test_every_stop_is_its_own_slot_and_the_key_waits_for_the_last(r):
    rows = r["status"].rows
    assert [row["lab"] for row in rows] == [_slot(s) for s in r["manifest"]["route"]]
    assert {f"{HOST}@middle", f"{HOST}@end"} <= {row["lab"] for row in rows}
    per_stop = len(r["manifest"]["artefacts"]) * r["study"].design.trials
    assert all(row["received"] and row["expected"] == per_stop and row["missing"] == 0
               for row in rows)
    assert r["status"].may_open and not r["status"].waiting_for
    # before the host's last stop was in, the key stayed sealed and said why
    assert r["gate_before_end"] is not None and f"{HOST}@end" in r["gate_before_end"]
    assert r["verdict"].ok


def _blank(r, lab, name="result-form.csv"):
    return (r["folder"] / "labs" / lab / name).read_text(encoding="utf-8")


def _check(r, tmp_path, text, name="form.csv"):
    path = tmp_path / name
    path.write_text(text, encoding="utf-8")
    return [str(p) for p in intake.check_form(r["study"], r["manifest"], forms.read_form(path),
                                              today=date(2027, 4, 1))]


def _filled(r, lab, name="result-form.csv"):
    station = next(s for s in r["manifest"]["route"] if s["lab"] == lab
                   and _form_name(s) == name)
    return _fill(_blank(r, lab, name), r["values"], slot=_slot(station),
                 decimal=r["study"].lab(lab).decimal,
                 first_day=date.fromisoformat(station["test_start"]), analyst="X")


def test_a_visit_line_on_a_participant_form_is_refused(r, tmp_path):
    text = _filled(r, "crx").replace("# laboratory: crx\n", "# laboratory: crx\n# visit: end\n")
    problems = _check(r, tmp_path, text)
    assert len(problems) == 1 and "laboratory 'crx' has one stop on the route" in problems[0]


def test_an_unknown_host_visit_is_refused(r, tmp_path):
    text = _filled(r, HOST, "result-form-end.csv").replace("# visit: end", "# visit: late")
    problems = _check(r, tmp_path, text)
    assert len(problems) == 1 and "visit 'late' is not a stop of the host" in problems[0]


def test_each_artefact_once_per_trial(r, tmp_path):
    text = _filled(r, "hel")
    lines = text.splitlines()
    rows = [i for i, line in enumerate(lines) if line[:1].isdigit()]
    # the first row of trial 2 claims trial 1: that artefact is then twice in trial 1
    second_trial = rows[len(r["manifest"]["artefacts"])]
    cells = lines[second_trial].split(";")
    first = next(i for i in rows if lines[i].split(";")[2] == cells[2])  # its trial-1 row
    cells[0] = "1"
    lines[second_trial] = ";".join(cells)
    problems = _check(r, tmp_path, "\n".join(lines) + "\n")
    assert any(f"appears twice in trial 1 (first on line {first + 1})" in p
               for p in problems), problems


def test_a_row_without_trial_is_refused(r, tmp_path):
    text = _filled(r, "hel")
    lines = text.splitlines()
    at = next(i for i, line in enumerate(lines) if line[:1].isdigit())
    lines[at] = ";" + lines[at].split(";", 1)[1]
    problems = _check(r, tmp_path, "\n".join(lines) + "\n")
    assert len(problems) == 1 and "give the trial (1 to 3)" in problems[0]


def test_the_host_forms_are_accepted_as_their_stops(r, tmp_path):
    assert _check(r, tmp_path, _filled(r, HOST, "result-form-middle.csv")) == []
    assert _check(r, tmp_path, _filled(r, HOST)) == []


def test_spare_says_a_circulating_set_has_none(r):
    with Ledger.open(r["study_dir"]) as ledger, pytest.raises(IntakeError) as info:
        spares.issue_spare(r["study"], r["study_dir"], ROUND, ledger, lab="hel",
                           damaged=codes.format(r["manifest"]["artefacts"][0]), key=r["key"])
    message = str(info.value)
    assert "circulates one set of artefacts, which has no spares" in message
    assert "\n" not in message


# --- evaluation --------------------------------------------------------------------------

def test_statistics_use_each_laboratory_own_stop_and_the_host_start(r):
    stats = r["stats"]
    for m in TRUE:
        labs = stats["scores"][m]["labs"]
        assert sorted(labs) == sorted(lab.id for lab in r["study"].laboratories)
        start = _host_values(r, HOST, m)
        assert labs[HOST]["n"] == 3
        assert labs[HOST]["mean"] == pytest.approx(pystats.mean(start), abs=1e-9)
        assert labs["crx"]["mean"] == pytest.approx(pystats.mean(_host_values(r, "crx", m)),
                                                    abs=1e-9)
    assert stats["results"]["count"] == len(TRUE) * 3 * len(r["study"].laboratories)
    assert stats["results"]["missing"] == []


def test_drift_check_against_plain_arithmetic(r):
    drift = r["stats"]["drift"]
    assert drift["visits"] == ["start", "middle", "end"] and drift["host"] == HOST
    for m in TRUE:
        e = drift["materials"][m]
        sig = r["stats"]["scores"][m]["sigma_pt"]
        assert e["sigma_pt"] == sig and e["limit"] == pytest.approx(0.3 * sig)
        first = _host_values(r, HOST, m)
        u1 = pystats.stdev(first) / math.sqrt(len(first))
        assert e["visits"]["start"]["mean"] == pytest.approx(pystats.mean(first), abs=1e-9)
        assert e["visits"]["start"]["u"] == pytest.approx(u1, rel=1e-9)
        expected_ok = []
        for visit in ("middle", "end"):
            later = _host_values(r, f"{HOST}@{visit}", m)
            u2 = pystats.stdev(later) / math.sqrt(len(later))
            diff = pystats.mean(later) - pystats.mean(first)
            widened = 0.3 * sig + 2 * math.sqrt(u1 ** 2 + u2 ** 2)
            c = e["checks"][visit]
            assert e["visits"][visit]["n"] == 3
            assert c["difference"] == pytest.approx(diff, abs=1e-9)
            assert c["widened_limit"] == pytest.approx(widened, rel=1e-9)
            assert c["within_limit"] == (abs(diff) <= 0.3 * sig)
            assert c["within_widened_limit"] == (abs(diff) <= widened)
            expected_ok.append(abs(diff) <= 0.3 * sig)
        if m == DRIFTING:
            assert e["verdict"] == "fail"
            assert not any(expected_ok)
        else:
            assert e["verdict"] == "pass" and all(expected_ok)


def test_drift_of_the_soft_plaque_is_about_what_was_simulated(r):
    # the PA6 plaque lost DRIFT_PER_STOP at every stop: by the end (stop 8) 7 steps
    route = r["manifest"]["route"]
    end = next(s for s in route if s["visit"] == "end")["index"]
    diff = r["stats"]["drift"]["materials"][DRIFTING]["checks"]["end"]["difference"]
    assert diff == pytest.approx(DRIFT_PER_STOP * (end - 1), abs=4 * REPEAT_SD)


def test_report_has_a_drift_section(r):
    text = " ".join(_pdf_text(r["report_dir"] / evaluate.REPORT_NAME).split())
    assert "Drift of the circulating artefacts" in text
    assert f"DRIFT beyond the widened limit: {DRIFTING}" in text
    assert "quoted from memory" in text
    assert len(list(r["report_dir"].glob("letter-*.pdf"))) == len(r["study"].laboratories)


def test_host_middle_form_as_spreadsheet_is_its_stop(r, tmp_path):
    from openpyxl import load_workbook

    station = next(s for s in r["manifest"]["route"] if s["visit"] == "middle")
    book = load_workbook(r["folder"] / "labs" / HOST / "result-form-middle.xlsx")
    sheet = book.worksheets[0]
    col = {}
    for row in sheet.iter_rows():
        cells = {str(c.value).strip().lower(): c.column for c in row if c.value is not None}
        if not col:
            col = cells if {"code", "value"} <= set(cells) else {}
            continue
        n = row[0].row
        code = codes.compact(str(sheet.cell(n, col["code"]).value))
        trial = int(sheet.cell(n, col["trial"]).value)
        sheet.cell(n, col["value"]).value = r["values"][(_slot(station), code, trial)]
        sheet.cell(n, col["date"]).value = date.fromisoformat(station["test_start"])
        sheet.cell(n, col["analyst"]).value = "A"
    path = tmp_path / "middle.xlsx"
    book.save(path)
    form = forms.read_form(path)
    assert form.ident("visit")[0] == "middle"
    assert intake.check_form(r["study"], r["manifest"], form, today=date(2027, 4, 1)) == []


def test_labels_for_one_laboratory_are_refused(r):
    from planner.errors import PlannerError
    from planner.render import print_round

    with pytest.raises(PlannerError, match="printed once, by the host"):
        print_round(r["study"], r["study_dir"], ROUND, key=r["key"], only="labels", lab="crx")


def _rows(material, values, trial0=1):
    return [evaluate.Unblinded(material, HOST, trial0 + i, "X", v, None, ("in-house",))
            for i, v in enumerate(values)]


def test_drift_check_widened_limit_by_hand():
    # start 10.0, 10.2, 10.1 (mean 10.1, s 0.1); end 10.3, 10.5, 10.4 (mean 10.4, s 0.1);
    # sigma_pt 0.5: limit 0.15 < |0.3|; widened 0.15 + 2 sqrt(2 (0.1/sqrt 3)^2) = 0.31330
    out = evaluate.drift_check({"start": _rows("A", [10.0, 10.2, 10.1]),
                                "end": _rows("A", [10.3, 10.5, 10.4])},
                               {"A": 0.5}, materials=["A"], codes_of={"A": "X"}, host=HOST)
    e = out["materials"]["A"]
    c = e["checks"]["end"]
    assert c["difference"] == pytest.approx(0.3, abs=1e-12)
    assert c["limit"] == pytest.approx(0.15)
    assert c["widened_limit"] == pytest.approx(0.15 + 2 * math.sqrt(2 * 0.01 / 3), rel=1e-12)
    assert c["widened_limit"] == pytest.approx(0.31330, abs=1e-5)
    assert (c["within_limit"], c["within_widened_limit"]) == (False, True)
    assert e["verdict"] == "pass (widened limit)" and out["visits"] == ["start", "end"]


def test_drift_check_says_when_it_cannot_check():
    start = _rows("A", [10.0, 10.2, 10.1])
    out = evaluate.drift_check({"start": start, "end": _rows("A", [10.1])}, {"A": None},
                               materials=["A"], codes_of={}, host=HOST)
    assert out["materials"]["A"]["verdict"] == "not checked"
    assert "sigma_pt" in out["materials"]["A"]["why"]
    only_start = evaluate.drift_check({"start": start}, {"A": 0.5}, materials=["A"],
                                      codes_of={}, host=HOST)
    assert only_start["materials"]["A"]["verdict"] == "not checked"
    # one reading at the end: no s, so no widened limit; 0.6 > 0.15 fails outright
    single = evaluate.drift_check({"start": start, "end": _rows("A", [10.7])}, {"A": 0.5},
                                  materials=["A"], codes_of={}, host=HOST)
    check = single["materials"]["A"]["checks"]["end"]
    assert check["widened_limit"] is None and check["within_widened_limit"] is None
    assert single["materials"]["A"]["verdict"] == "fail"


def test_ledger_keeps_one_result_row_per_code_and_trial(tmp_path):
    import sqlite3

    with Ledger.open(tmp_path) as ledger:
        ledger.db.execute("INSERT INTO submissions (round, lab, version, sha256, file_name, "
                          "received_at, late, after_unseal) VALUES ('r', 'kal', 1, 'x', 'f.csv', "
                          "'t', 0, 0)")
        ledger.db.execute("INSERT INTO result_rows VALUES (1, 'CODE', 1, 1, 2.5, NULL, NULL, "
                          "'A', '', '')")
        # the same artefact in another trial is a row of its own; the same trial is refused
        ledger.db.execute("INSERT INTO result_rows VALUES (1, 'CODE', 2, 1, 2.6, NULL, NULL, "
                          "'A', '', '')")
        with pytest.raises(sqlite3.IntegrityError):
            ledger.db.execute("INSERT INTO result_rows VALUES (1, 'CODE', 1, 1, 2.7, NULL, "
                              "NULL, 'A', '', '')")
        assert [(r.code, r.trial) for r in ledger.result_rows(1)] == [("CODE", 1), ("CODE", 2)]


def test_evaluate_from_the_cli_names_the_drift_verdicts(r, tmp_path):
    from typer.testing import CliRunner

    from planner.cli import app

    folder = tmp_path / "study"
    shutil.copytree(r["study_dir"], folder)
    result = CliRunner().invoke(app, ["evaluate", str(folder), "--round", ROUND])
    assert result.exit_code == 0, result.output
    assert f"drift of artefact {DRIFTING} between the host's stops: fail" in result.stdout


def test_dates_are_checked_against_the_stop_own_window(r, tmp_path):
    station = next(s for s in r["manifest"]["route"] if s["lab"] == "hel")
    before = (date.fromisoformat(station["test_start"]) - timedelta(days=1)).isoformat()
    text = _filled(r, "hel")
    lines = text.splitlines()
    row = next(i for i, line in enumerate(lines) if line[:1].isdigit())
    cells = lines[row].split(";")
    cells[5] = before  # the round had started, but the set had not reached hel yet
    lines[row] = ";".join(cells)
    problems = _check(r, tmp_path, "\n".join(lines) + "\n")
    assert len(problems) == 1 and f"date {before} is before the test window" in problems[0]
