"""The gate counts complete results, and corrections merge: tried as a laboratory that sends a
stub to look "in", and as one that sends a one-row correction or an old file again."""

from __future__ import annotations

import json

from conftest import (FIRST_ROW, LABS, ROUND, filled, get_cell, receive, run_cli, set_cell,
                      value_of, write)
from planner import codes, plan
from planner.ledger import Ledger


def _stub(lines, keep):
    """The form's identity and header lines with only the first ``keep`` data rows."""
    return lines[:FIRST_ROW - 1 + keep]


def test_a_stub_of_one_row_does_not_open_the_gate(planned, runner, tmp_path, passphrase):
    for lab in LABS[:-1]:
        assert receive(runner, planned, write(tmp_path, f"{lab}.csv",
                                              filled(planned, lab))).exit_code == 0
    stub = receive(runner, planned, write(tmp_path, "crx.csv", _stub(filled(planned, "crx"), 1)))
    assert stub.exit_code == 0 and "outstanding: 17 codes" in stub.stdout
    status = json.loads(run_cli(runner, "status", planned, "--round", ROUND, "--json").stdout)
    crx = next(r for r in status["rows"] if r["lab"] == "crx")
    assert crx["received"] and not crx["complete"] and crx["missing"] == 17
    assert status["may_open"] is False and status["waiting_for"] == ["crx"]
    early = run_cli(runner, "unseal", planned, "--round", ROUND)
    assert early.exit_code == 2 and "missing or incomplete from crx" in early.stderr
    assert not (plan.round_dir(planned, ROUND) / "key.json").exists()


def test_a_one_row_correction_merges_with_the_earlier_form(planned, runner, tmp_path,
                                                            passphrase):
    for lab in LABS:
        assert receive(runner, planned, write(tmp_path, f"{lab}.csv",
                                              filled(planned, lab))).exit_code == 0
    full = filled(planned, "kal")
    row = FIRST_ROW + 3
    correction = full[:FIRST_ROW - 1] + [full[row - 1]]
    set_cell(correction, FIRST_ROW, "value", "99,75", "kal")
    result = receive(runner, planned, write(tmp_path, "kal-fix.csv", correction))
    assert result.exit_code == 0, result.stderr
    assert "recorded version 2 (supersedes version 1)" in result.stdout
    assert "merged with the earlier versions: 18 results in force" in result.stdout
    receipt = (plan.round_dir(planned, ROUND) / "results" / "receipt-kal-v2.txt").read_text()
    assert "(merged with its earlier versions): 18 results; complete" in receipt
    status = json.loads(run_cli(runner, "status", planned, "--round", ROUND, "--json").stdout)
    kal = next(r for r in status["rows"] if r["lab"] == "kal")
    assert kal["complete"] and kal["merged"] and kal["version"] == 2
    assert status["may_open"] is True
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    assert run_cli(runner, "evaluate", planned, "--round", ROUND).exit_code == 0
    results = (plan.round_dir(planned, ROUND) / "report" / "results.csv").read_text()
    # results.csv: material, measurand, lab, trial, code, value, ...
    by_code = {ln.split(",")[4]: float(ln.split(",")[5]) for ln in results.splitlines()[1:]
               if ln.split(",")[2] == "kal"}
    fixed = codes.format(codes.compact(get_cell(full, row, "code", "kal")))
    kept = codes.format(codes.compact(get_cell(full, FIRST_ROW, "code", "kal")))
    assert len(by_code) == 18 and by_code[fixed] == 99.75
    assert by_code[kept] == value_of(1)  # a row the correction did not carry stays


def test_an_old_form_sent_again_is_refused_and_says_so(planned, runner, tmp_path):
    first = write(tmp_path, "kal-1.csv", filled(planned, "kal"))
    assert receive(runner, planned, first).exit_code == 0
    lines = filled(planned, "kal")
    set_cell(lines, FIRST_ROW, "value", "99,75", "kal")
    assert receive(runner, planned, write(tmp_path, "kal-2.csv", lines)).exit_code == 0
    again = receive(runner, planned, first)
    assert again.exit_code == 2 and len(again.stderr.strip().splitlines()) == 1
    message = again.stderr.strip()
    assert message.startswith(f"error: {first}: ")
    assert "this file is version 1 of laboratory 'kal', already replaced by version 2" in message
    with Ledger.open(planned) as ledger:
        assert [s.version for s in ledger.submissions(ROUND, "kal")] == [1, 2]
