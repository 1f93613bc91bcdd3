"""Evaluation of a round: unblinding against the key, the report folder, the letters."""

from __future__ import annotations

import csv
import json
import re
from pathlib import Path

import numpy as np
import pytest

from conftest import PASSPHRASE, SECRET, run_cli
from planner import audit, evaluate, results, spec
from planner import plan as planning
from planner.errors import DataError, LedgerError
from planner.ledger import Ledger

ROUND = "2027-1"


def _plan(folder: Path):
    study = spec.load(folder)
    dates, route = planning.dates_for(study, "kal")
    result = planning.plan_round(study, round_id=ROUND, host="kal", dates=dates, secret=SECRET,
                                 route=route)
    with Ledger.open(folder) as ledger:
        planning.write_round(study, folder, result, ledger, passphrase=PASSPHRASE)
    return study, result


def _records(result, *, shift=None):
    """One result per test unit: a value that encodes material, lab and trial, so a wrong
    join shows; the 'tor' laboratory states an expanded uncertainty."""
    rng = np.random.default_rng(3)
    true = {"HD-BM5": 0.3, "LL-F1": 1.0, "PP-H12": 12.0, "PP-C8": 8.0, "RE-MIX": 2.5,
            "PP-FR": 24.0}
    bias = {"kal": 0.01, "tor": -0.01, "hel": 0.0, "lin": 0.02, "crx": -0.02}
    out = []
    for u in result.units:
        if u.kind != "test":
            continue
        v = true[u.material] * (1 + bias[u.lab] + (shift or {}).get(u.lab, 0.0)
                                + rng.normal(0, 0.005))
        out.append({"lab": u.lab, "code": u.code, "value": float(v),
                    "uncertainty": 0.05 * v if u.lab == "tor" else None})
    return out


@pytest.fixture
def evaluated(example_dir):
    study, result = _plan(example_dir)
    records = _records(result, shift={"crx": 0.2})
    with Ledger.open(example_dir) as ledger:
        audit.unseal_round(study, example_dir, ROUND, ledger, passphrase=PASSPHRASE,
                           force=True, reason="test")
        out = evaluate.evaluate_round(study, example_dir, ROUND, ledger, results=records)
        status = ledger.round_status(ROUND)
    return study, result, records, out, status


def test_unblind_joins_each_result_to_its_unit_in_the_key(example_dir):
    study, result = _plan(example_dir)
    key = planning.key_of(result)
    records = _records(result)
    rows = evaluate.unblind(key, records)
    by_code = {u["code"]: u for u in key["units"]}
    assert len(rows) == len(records) == 5 * 6 * 3
    for r in rows:
        unit = by_code[r.code]
        assert (r.material, r.lab, r.trial) == (unit["material"], unit["lab"], unit["trial"])
    given = {rec["code"]: rec["value"] for rec in records}
    assert all(r.value == given[r.code] for r in rows)


def test_host_results_are_marked_in_house(example_dir):
    _, result = _plan(example_dir)
    rows = evaluate.unblind(planning.key_of(result), _records(result))
    assert {r.lab for r in rows if "in-house" in r.flags} == {"kal"}


@pytest.mark.parametrize("kind", ["spare", "retained"])
def test_a_unit_the_host_sent_takes_the_trial_of_its_form_line_and_is_flagged(example_dir,
                                                                            kind):
    _, result = _plan(example_dir)
    key = planning.key_of(result)
    sent = next(u for u in result.units if u.kind == kind)
    assert sent.lab == "kal"  # the host keeps it until it is sent as a replacement
    replaced = next(u for u in result.units if u.kind == "test" and u.lab == "hel"
                    and u.material == sent.material and u.trial == 2)
    records = [r for r in _records(result) if r["code"] != replaced.code]
    records.append({"lab": "hel", "code": sent.code, "trial": 2, "value": 1.0})
    with pytest.raises(DataError, match="but that unit was sent to 'kal'"):
        evaluate.unblind(key, records)  # not issued to hel
    rows = evaluate.unblind(key, records, issued={sent.code: "hel"})
    row = next(r for r in rows if r.code == sent.code)
    assert (row.material, row.lab, row.trial, row.flags) == (sent.material, "hel", 2,
                                                             ("spare-used",))


@pytest.mark.parametrize("case, message", [
    ("foreign", "but that unit was sent to"),
    ("unknown", "which is not a unit of this round"),
    ("twice", "is reported twice"),
    ("retained", "unit kept by the host"),
], ids=["foreign", "unknown", "twice", "retained"])
def test_unblind_refuses_codes_that_do_not_belong(example_dir, case, message):
    _, result = _plan(example_dir)
    key = planning.key_of(result)
    records = _records(result)
    if case == "foreign":
        records[0] = {**records[0], "lab": "crx" if records[0]["lab"] != "crx" else "kal"}
    elif case == "unknown":
        records[0] = {**records[0], "code": "000000000"}
    elif case == "twice":
        records.append(dict(records[0]))
    else:
        retained = next(u for u in result.units if u.kind == "retained")
        records.append({"lab": "kal", "code": retained.code, "value": 1.0})
    with pytest.raises(DataError, match=message):
        evaluate.unblind(key, records)


def test_participant_codes_are_a_permutation_fixed_by_the_round_secret():
    labs = ["kal", "tor", "hel", "lin", "crx"]
    a = evaluate.participant_codes(SECRET, labs)
    assert sorted(a.values()) == ["P-01", "P-02", "P-03", "P-04", "P-05"]
    assert a == evaluate.participant_codes(SECRET, labs)
    others = [evaluate.participant_codes(bytes([i]) * 32, labs) for i in range(1, 6)]
    assert any(o != a for o in others)  # a new round secret, new codes


def test_evaluate_refuses_a_sealed_round(example_dir):
    study, result = _plan(example_dir)
    with Ledger.open(example_dir) as ledger, pytest.raises(LedgerError, match="still sealed"):
        evaluate.evaluate_round(study, example_dir, ROUND, ledger, results=_records(result))


def test_cli_evaluate_on_a_sealed_round_is_one_line_and_exit_2(example_dir, runner):
    _plan(example_dir)
    res = run_cli(runner, "evaluate", example_dir, "--round", ROUND)
    assert res.exit_code == 2
    assert res.stderr.strip().splitlines() == [
        f"error: round {ROUND!r} is planned, its key is still sealed; run 'ringplan unseal' "
        "once every laboratory has reported"]


def test_results_csv_is_the_unblinded_long_table(evaluated):
    _, result, records, out, status = evaluated
    assert status == "evaluated"
    with open(out / "results.csv", encoding="utf-8") as f:
        table = list(csv.DictReader(f))
    assert list(table[0]) == ["material", "measurand", "lab", "trial", "code", "value",
                              "uncertainty", "flags"]
    assert {line["measurand"] for line in table} == {"value"}  # the single-measurand form
    assert len(table) == len(records)
    units = {u.code: u for u in result.units}
    for line in table:
        u = units[line["code"].replace("-", "")]
        assert (line["material"], line["lab"], int(line["trial"])) == (u.material, u.lab, u.trial)
        assert ("in-house" in line["flags"]) == (line["lab"] == "kal")


def test_statistics_json_holds_every_method_and_the_host_free_consensus(evaluated):
    study, result, records, out, _ = evaluated
    raw = json.loads((out / "statistics.json").read_text(encoding="utf-8"))
    assert raw["format"] == "ringplan-statistics/3"
    for k in ("study", "round", "host", "fingerprint", "results", "participants", "labs",
              "sources", "measurands"):
        assert k in raw
    # a study in the single-measurand form: its one measurand "value", today's blocks in it
    assert list(raw["measurands"]) == ["value"]
    block = raw["measurands"]["value"]
    assert (block["name"], block["unit"]) == (study.study.measurand, study.study.unit)
    for k in ("settings", "materials", "labs", "anova", "grr_anova", "grr_range", "precision",
              "scores"):
        assert k in block
    s = results.measurand_view(raw, "value")
    assert s["fingerprint"] == (out.parent / "key.fingerprint").read_text().split()[0]
    assert s["materials"] == [m.id for m in study.materials]
    units = {u.code: u for u in result.units}
    for m in s["materials"]:
        sc = s["scores"][m]
        # the laboratory means are plain means of its three results (arithmetic, numpy)
        for lab, entry in sc["labs"].items():
            vals = [r["value"] for r in records if units[r["code"]].lab == lab
                    and units[r["code"]].material == m]
            assert entry["mean"] == pytest.approx(np.mean(vals), rel=1e-12)
        assert sc["labs"]["kal"]["in_house"] is True
        wh = sc["without_host"]
        assert wh["p"] == 4 and "excluding kal" in wh["method"]
        assert wh["difference"] == pytest.approx(sc["assigned_value"] - wh["assigned_value"])
    # the host-free consensus equals the consensus of a table without the host's rows
    from planner import stats

    table = [{"material": units[r["code"]].material, "lab": units[r["code"]].lab,
              "trial": str(units[r["code"]].trial), "value": r["value"]}
             for r in records if units[r["code"]].lab != "kal"]
    alone = stats.evaluate_table(table)
    for m in s["materials"]:
        assert s["scores"][m]["without_host"]["assigned_value"] == pytest.approx(
            alone["scores"][m]["assigned_value"], rel=1e-12)


def _text(path: Path) -> str:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return "\n".join(page.extract_text() or "" for page in pdf.pages)


def _mediabox(path: Path) -> tuple[float, float]:
    import pypdfium2 as pdfium

    pdf = pdfium.PdfDocument(str(path))
    try:
        return tuple(round(v, 1) for v in pdf[0].get_size())
    finally:
        pdf.close()


A4 = (595.3, 841.9)  # ISO 216: 210 x 297 mm in points


def test_letters_name_only_their_own_laboratory(evaluated):
    study, _, _, out, _ = evaluated
    s = json.loads((out / "statistics.json").read_text(encoding="utf-8"))
    ids = [lab.id for lab in study.laboratories]
    for lab in ids:
        path = out / f"letter-{lab}.pdf"
        assert _mediabox(path) == A4
        text = _text(path)
        assert re.search(rf"\b{lab}\b", text)
        for other in ids:
            if other != lab:
                assert not re.search(rf"\b{other}\b", text), (lab, other)
        others = {c for o, c in s["participants"].items() if o != lab}
        assert all(c in text for c in others)
        assert s["participants"][lab] not in text  # its own row says "you"
    # white space made even: where a line breaks depends on the font
    assert "prepared in-house" in " ".join(_text(out / "letter-kal.pdf").split())
    assert "prepared in-house" not in " ".join(_text(out / "letter-tor.pdf").split())


def test_report_is_a4_and_shows_the_biased_laboratory(evaluated):
    _, _, _, out, _ = evaluated
    path = out / "report.pdf"
    assert _mediabox(path) == A4
    text = _text(path)
    assert "crx: outside the satisfactory band on 6 of 6 materials" in text
    assert "Consensus without the host" in text and "kal (in-house)" in text


def test_report_gauge_section_speaks_of_materials_and_laboratories(evaluated):
    _, _, _, out, _ = evaluated
    text = " ".join(_text(out / "report.pdf").split())
    assert "Repeatability and reproducibility across laboratories (gauge R&R)" in text
    assert "Variance budget" in text
    for row in ("materials × laboratories", "within laboratories (repeatability)",
                "between materials"):
        assert row in text
    assert "k = 6: ±3 SD holds 99.73 % of a normal distribution" in text
    for old in ("study variation", "% contribution", "appraiser", "operator",
                "Components of variation", "material (part)", "interaction"):
        assert old not in text, old


def test_letter_paper_gives_us_letter_pages(evaluated, tmp_path):
    from planner.render import letter, report

    _, _, _, out, _ = evaluated
    s = json.loads((out / "statistics.json").read_text(encoding="utf-8"))
    with open(out / "results.csv", encoding="utf-8") as f:
        rows = [evaluate.Unblinded(r["material"], r["lab"], int(r["trial"]), r["code"],
                                   float(r["value"]), None, tuple(r["flags"].split()))
                for r in csv.DictReader(f)]
    us_letter = (612.0, 792.0)  # 8.5 x 11 in
    assert _mediabox(report.render(tmp_path / "r.pdf", s, rows, paper="letter")) == us_letter
    to = letter.Addressee("tor", "Torvhaug", ("x",), "M. Eide", "comma")
    assert _mediabox(letter.render(tmp_path / "l.pdf", s, rows, to, paper="letter")) == us_letter


def test_letters_in_two_processes_equal_letters_in_one(evaluated, tmp_path):
    from planner.render import letter

    study, _, _, out, _ = evaluated
    s = json.loads((out / "statistics.json").read_text(encoding="utf-8"))
    with open(out / "results.csv", encoding="utf-8") as f:
        rows = [evaluate.Unblinded(r["material"], r["lab"], int(r["trial"]), r["code"],
                                   float(r["value"]), None, tuple(r["flags"].split()))
                for r in csv.DictReader(f)]
    to = [letter.Addressee(lab.id, lab.name) for lab in study.laboratories]
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    one = letter.render_all(tmp_path / "a", s, rows, to, paper="A4", workers=1)
    two = letter.render_all(tmp_path / "b", s, rows, to, paper="A4", workers=2)
    assert [p.name for p in one] == [p.name for p in two]
    assert [_text(p) for p in one] == [_text(p) for p in two]
