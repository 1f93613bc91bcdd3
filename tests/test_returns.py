"""Recording returned result forms: copies, versions, late and after-unseal flags, kills.

Every round here is planned from the example study with the fixed secret of
conftest; forms are the CSV that ``plan`` wrote, filled in by editing lines.
Expected values are the numbers the tests write into the forms themselves.
"""

from __future__ import annotations

import hashlib
import os
import sqlite3
from datetime import date

import pytest
from conftest import (
    kill_receive_while_paused,
    ledger_snapshot,
    FIRST_ROW,
    LABS,
    NOW,
    ROUND,
    filled,
    get_cell,
    manifest_of,
    nothing_recorded,
    receive,
    run_cli,
    set_cell,
    value_of,
    write,
)

from planner import codes, plan, seal, spec, status
from planner.ledger import Ledger

# --- checked, not recorded ---------------------------------------------------------

def test_check_only_records_nothing(planned, runner, tmp_path):
    path = write(tmp_path, "kal.csv", filled(planned, "kal"))
    result = receive(runner, planned, path, extra=("--check",))
    assert result.exit_code == 0, result.stderr
    assert "passes every check (18 values, 0 without value); nothing recorded" in result.stdout
    assert nothing_recorded(planned)


# --- accepted forms -----------------------------------------------------------------

def test_good_comma_form_is_copied_hashed_and_recorded(planned, runner, tmp_path):
    path = write(tmp_path, "kal-results.csv", filled(planned, "kal"))
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr
    data = path.read_bytes()
    sha = hashlib.sha256(data).hexdigest()
    stored = plan.round_dir(planned, ROUND) / "results" / f"{sha}.csv"
    assert f"kal: recorded version 1 from {path}: 18 values, 0 without value" in result.stdout
    assert stored.read_bytes() == data
    assert not os.access(stored, os.W_OK) or os.geteuid() == 0   # written read-only
    assert oct(stored.stat().st_mode & 0o777) == "0o400"   # and owner-only: planner.files
    manifest = manifest_of(planned)
    slots = {c: (t, p) for t, run in enumerate(manifest["labs"]["kal"]["trials"], 1)
             for p, c in enumerate(run, 1)}
    with Ledger.open(planned) as ledger:
        (sub,) = ledger.submissions(ROUND)
        assert (sub.lab, sub.version, sub.sha256, sub.file_name, sub.received_at, sub.late,
                sub.after_unseal) == ("kal", 1, sha, "kal-results.csv", NOW, False, False)
        rows = ledger.result_rows(sub.row)
        assert [e.detail for e in ledger.events(ROUND, "received")] == [
            {"lab": "kal", "version": 1, "sha256": sha}]
        assert ledger.round_status(ROUND) == "received"
    lines = filled(planned, "kal")
    written = {codes.compact(get_cell(lines, n, "code", "kal")): value_of(n - FIRST_ROW + 1)
               for n in range(FIRST_ROW, FIRST_ROW + 18)}
    assert {r.code: r.value for r in rows} == written
    assert {r.code: (r.trial, r.position) for r in rows} == slots
    assert {r.date for r in rows} == {"2027-01-25"} and {r.flags for r in rows} == {()}


def test_point_form_with_comma_separator_and_uncertainty(planned, runner, tmp_path):
    lines = filled(planned, "crx")
    set_cell(lines, FIRST_ROW, "uncertainty", "0.35", "crx")
    set_cell(lines, FIRST_ROW + 1, "value", "1.5e1", "crx")
    path = write(tmp_path, "crx.csv", lines)
    assert receive(runner, planned, path).exit_code == 0
    with Ledger.open(planned) as ledger:
        rows = {r.code: r for r in ledger.result_rows(ledger.submissions(ROUND)[0].row)}
    first = codes.compact(get_cell(lines, FIRST_ROW, "code", "crx"))
    second = codes.compact(get_cell(lines, FIRST_ROW + 1, "code", "crx"))
    assert rows[first].uncertainty == 0.35 and rows[second].value == 15.0


def test_corrected_form_is_a_new_version_and_history_stays(planned, runner, tmp_path):
    first = write(tmp_path, "kal-1.csv", filled(planned, "kal"))
    assert receive(runner, planned, first).exit_code == 0
    lines = filled(planned, "kal")
    set_cell(lines, 14, "value", "99,75", "kal")
    second = write(tmp_path, "kal-2.csv", lines)
    result = receive(runner, planned, second)
    assert result.exit_code == 0, result.stderr
    assert "kal: recorded version 2 (supersedes version 1)" in result.stdout
    code = codes.compact(get_cell(lines, 14, "code", "kal"))
    folder = plan.round_dir(planned, ROUND) / "results"
    with Ledger.open(planned) as ledger:
        v1, v2 = ledger.submissions(ROUND, "kal")
        assert (v1.version, v2.version) == (1, 2)
        old = {r.code: r.value for r in ledger.result_rows(v1.row)}
        new = {r.code: r.value for r in ledger.result_rows(v2.row)}
        table = status.round_status_table(spec.load(planned), planned, ROUND, ledger,
                                          today=date(2027, 1, 30))
    assert old[code] == value_of(14 - FIRST_ROW + 1) and new[code] == 99.75
    assert sorted(p.name for p in folder.iterdir() if not p.name.startswith("receipt-")) == sorted(
        f"{hashlib.sha256(p.read_bytes()).hexdigest()}.csv" for p in (first, second))
    assert sorted(p.name for p in folder.glob("receipt-*")) == ["receipt-kal-v1.txt",
                                                                "receipt-kal-v2.txt"]
    assert table.rows[0]["lab"] == "kal" and table.rows[0]["version"] == 2


def test_identical_form_again_changes_nothing(planned, runner, tmp_path):
    path = write(tmp_path, "kal.csv", filled(planned, "kal"))
    assert receive(runner, planned, path).exit_code == 0
    result = receive(runner, planned, path)
    assert result.exit_code == 0
    assert "identical to version 1 already recorded; nothing changed" in result.stdout
    with Ledger.open(planned) as ledger:
        assert len(ledger.submissions(ROUND)) == 1


def test_late_test_date_is_accepted_and_flagged(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    set_cell(lines, 20, "date", "2027-01-29", "kal")   # the window ends 2027-01-28
    path = write(tmp_path, "kal.csv", lines)
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr
    code = get_cell(lines, 20, "code", "kal")
    assert f"late: tested after the test window: {code}" in result.stdout
    with Ledger.open(planned) as ledger:
        (sub,) = ledger.submissions(ROUND)
        flags = {r.code: r.flags for r in ledger.result_rows(sub.row)}
    assert sub.late and flags[codes.compact(code)] == ("late-date",)
    assert sum(1 for f in flags.values() if f) == 1


def test_form_received_after_the_due_date_is_flagged_late(planned, runner, tmp_path, clock):
    clock["now"] = "2027-02-10T08:00:00+00:00"   # results were due 2027-02-04
    path = write(tmp_path, "kal.csv", filled(planned, "kal"))
    result = receive(runner, planned, path)
    assert result.exit_code == 0
    assert "late: received after the results were due" in result.stdout
    with Ledger.open(planned) as ledger:
        assert ledger.submissions(ROUND)[0].late


def test_empty_value_with_a_remark_and_a_missing_row(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    set_cell(lines, 16, "value", "", "kal")
    set_cell(lines, 16, "remarks", '"die blocked; no result"', "kal")   # quoted: ';' separates
    dropped = lines.pop(FIRST_ROW + 16)                 # the last data row
    path = write(tmp_path, "kal.csv", lines)
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr
    assert "17 values" not in result.stdout and "16 values, 1 without value" in result.stdout
    missing = dropped.split(";")[2]
    assert f"outstanding: 1 codes have neither a value nor a remark yet: {missing}" in \
        result.stdout
    with Ledger.open(planned) as ledger:
        rows = {r.code: r for r in ledger.result_rows(ledger.submissions(ROUND)[0].row)}
    blank = rows[codes.compact(get_cell(lines, 16, "code", "kal"))]
    assert blank.value is None and blank.flags == ("no-value",)
    assert blank.remarks == "die blocked; no result"


# --- after the key was opened ------------------------------------------------------------

def test_unseal_opens_without_force_once_every_lab_is_in(planned, runner, tmp_path, passphrase):
    for lab in LABS[:-1]:
        assert receive(runner, planned, write(tmp_path, f"{lab}.csv",
                                              filled(planned, lab))).exit_code == 0
    early = run_cli(runner, "unseal", planned, "--round", ROUND)
    assert early.exit_code == 2 and "results are still missing or incomplete from crx" in early.stderr
    status = run_cli(runner, "status", planned, "--round", ROUND)
    assert "the key stays sealed: waiting for crx" in status.stdout
    assert receive(runner, planned, write(tmp_path, "crx.csv",
                                          filled(planned, "crx"))).exit_code == 0
    status = run_cli(runner, "status", planned, "--round", ROUND)
    assert "the key may be opened" in status.stdout
    opened = run_cli(runner, "unseal", planned, "--round", ROUND)
    assert opened.exit_code == 0, opened.stderr
    key = plan.round_dir(planned, ROUND) / seal.KEY_NAME
    assert seal.fingerprint(key.read_bytes()) == manifest_of(planned)["fingerprint"]


def test_results_after_unseal_need_the_flag_and_a_reason(planned, runner, tmp_path, passphrase):
    for lab in LABS:
        receive(runner, planned, write(tmp_path, f"{lab}.csv", filled(planned, lab)))
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    lines = filled(planned, "tor")
    set_cell(lines, FIRST_ROW, "value", "11,11", "tor")
    late = write(tmp_path, "tor-2.csv", lines)
    refused = receive(runner, planned, late)
    assert refused.exit_code == 2 and len(refused.stderr.strip().splitlines()) == 1
    assert "has been opened; results that arrive after unsealing are refused" in refused.stderr
    no_reason = receive(runner, planned, late, extra=("--after-unseal",))
    assert no_reason.exit_code == 2 and "needs --reason TEXT" in no_reason.stderr
    with Ledger.open(planned) as ledger:
        assert len(ledger.submissions(ROUND, "tor")) == 1
    taken = receive(runner, planned, late,
                    extra=("--after-unseal", "--reason", "transcription error found by tor"))
    assert taken.exit_code == 0, taken.stderr
    assert "AFTER UNSEAL" in taken.stdout
    with Ledger.open(planned) as ledger:
        last = ledger.submissions(ROUND, "tor")[-1]
        flags = {r.flags for r in ledger.result_rows(last.row)}
    assert (last.version, last.after_unseal, last.reason) == (
        2, True, "transcription error found by tor")
    assert flags == {("after-unseal",)}
    status = run_cli(runner, "status", planned, "--round", ROUND)
    tor_line = next(ln for ln in status.stdout.splitlines() if " tor " in ln)
    assert "AFTER-UNSEAL" in tor_line
    assert "the key has been opened" in status.stdout


def test_after_unseal_flag_is_refused_while_sealed(planned, runner, tmp_path):
    path = write(tmp_path, "kal.csv", filled(planned, "kal"))
    result = receive(runner, planned, path, extra=("--after-unseal", "--reason", "x"))
    assert result.exit_code == 2 and "is still sealed" in result.stderr
    assert nothing_recorded(planned)


# --- killed in the middle of receive -----------------------------------------------------

def _undated(study_dir, lab):
    # The subprocess uses the real clock, so leave the test dates empty.
    return filled(study_dir, lab, day="")


def test_kill_before_commit_leaves_ledger_and_results_as_before(planned, runner, tmp_path):
    assert receive(runner, planned, write(tmp_path, "crx.csv",
                                          _undated(planned, "crx"))).exit_code == 0
    before = ledger_snapshot(planned)
    form = write(tmp_path, "kal.csv", _undated(planned, "kal"))
    kill_receive_while_paused(planned, [form], "before-commit")
    assert ledger_snapshot(planned) == before
    # the next receive clears the stale staged copy and records the form as version 1
    result = receive(runner, planned, form)
    assert result.exit_code == 0, result.stderr
    assert "kal: recorded version 1" in result.stdout
    assert not any((plan.round_dir(planned, ROUND) / ".intake").iterdir())


def test_kill_after_commit_is_completed_by_the_next_receive(planned, runner, tmp_path):
    form = write(tmp_path, "kal.csv", _undated(planned, "kal"))
    kill_receive_while_paused(planned, [form], "after-commit")
    name = f"{hashlib.sha256(form.read_bytes()).hexdigest()}.csv"
    results = plan.round_dir(planned, ROUND) / "results"
    with Ledger.open(planned) as ledger:
        assert [s.sha256 + ".csv" for s in ledger.submissions(ROUND)] == [name]
    assert not (results / name).exists()
    assert receive(runner, planned, write(tmp_path, "crx.csv",
                                          _undated(planned, "crx"))).exit_code == 0
    assert (results / name).read_bytes() == form.read_bytes()


# --- the ledger tables ----------------------------------------------------------------

def test_received_rows_cannot_be_changed(planned, runner, tmp_path):
    receive(runner, planned, write(tmp_path, "kal.csv", filled(planned, "kal")))
    with Ledger.open(planned) as ledger:
        for sql in ("UPDATE submissions SET lab = 'x'", "DELETE FROM submissions",
                    "UPDATE result_rows SET value = 0", "DELETE FROM result_rows"):
            with pytest.raises(sqlite3.DatabaseError, match="never"):
                ledger.db.execute(sql)
