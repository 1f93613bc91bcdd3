"""Attacks on the ledger, done as a coordinator with the sqlite3 shell would: drop a guard,
change or delete a row, put the guard back; insert an event; remove a chain link; delete
the ledger. Every command that opens the ledger must refuse with one line naming what was
altered, and a laboratory's receipt must stop matching once the chain is rewritten."""

from __future__ import annotations

import hashlib
import json
import sqlite3

import pytest

from conftest import ROUND, filled, ledger_shell, receive, run_cli, write
from planner.errors import LedgerError
from planner.ledger import Ledger


def _received(planned, runner, tmp_path, lab="kal"):
    result = receive(runner, planned, write(tmp_path, f"{lab}.csv", filled(planned, lab)))
    assert result.exit_code == 0, result.stderr
    return result


def _refused(study_dir, runner, needle):
    """Assert status (read-only) and the library refuse the ledger with one line naming it."""
    result = run_cli(runner, "status", study_dir, "--round", ROUND)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("error: ") and needle in lines[0], lines
    assert "Traceback" not in result.output
    with pytest.raises(LedgerError, match="altered outside ringplan|missing"):
        Ledger.open(study_dir)


def test_an_untouched_ledger_opens_and_its_chain_checks(planned, runner, tmp_path):
    _received(planned, runner, tmp_path)
    result = run_cli(runner, "chain", planned)
    assert result.exit_code == 0, result.stderr
    # plan, the homogeneity form (conftest.clear_shipping), the received form
    assert result.stdout.startswith("ledger intact: schema, guards and all 3 links")


def test_a_value_changed_behind_dropped_guards_is_detected(planned, runner, tmp_path):
    _received(planned, runner, tmp_path)
    ledger_shell(planned, "UPDATE result_rows SET value = value + 1 WHERE rowid = 3")
    _refused(planned, runner, "result_rows rows 1-")


def test_a_deleted_unsealed_event_is_detected(planned, runner, tmp_path):
    _received(planned, runner, tmp_path)
    with Ledger.open(planned) as ledger, ledger.transaction():
        ledger.record_event(ROUND, "unsealed", {"forced": True, "reason": "x", "missing": []})
    ledger_shell(planned, "DELETE FROM events WHERE kind = 'unsealed'")
    _refused(planned, runner, "were changed or deleted")


def test_an_inserted_event_is_detected(planned, runner):
    # The forged 'received' event that would let the key open with forced: false.
    ledger_shell(planned, "INSERT INTO events (round, kind, at, detail) VALUES ('2027-1', "
                          "'received', '2027-01-29T10:00:00+00:00', '{\"lab\": \"crx\"}')")
    _refused(planned, runner, "table events has rows that no ringplan command recorded")


def test_an_inserted_planned_event_cannot_clear_the_way_for_replanning(planned, runner):
    ledger_shell(planned, "INSERT INTO events (round, kind, at, detail) VALUES "
                          "('2027-1', 'planned', '2027-01-29T10:00:00+00:00', '{}')")
    result = run_cli(runner, "plan", planned, "--round", ROUND, "--replace",
                     "--passphrase-file", planned / "nope.txt")
    assert result.exit_code == 2 and "altered outside ringplan" in result.stderr


def _raw(study_dir, sql):
    """Run one statement on the ledger file as it is, guards and all."""
    db = sqlite3.connect(study_dir / "ledger.sqlite")
    db.execute(sql)
    db.commit()
    db.close()


def test_a_guard_left_dropped_is_named(planned, runner):
    _raw(planned, "DROP TRIGGER result_rows_no_update")
    _refused(planned, runner, "guard 'result_rows_no_update' is missing")


def test_a_removed_last_link_leaves_rows_outside_the_chain(planned, runner, tmp_path):
    _received(planned, runner, tmp_path)
    ledger_shell(planned, "DELETE FROM chain WHERE seq = (SELECT MAX(seq) FROM chain)")
    _refused(planned, runner, "rows that no ringplan command recorded")


def test_a_removed_middle_link_breaks_the_chain(planned, runner, tmp_path):
    _received(planned, runner, tmp_path, "kal")
    _received(planned, runner, tmp_path, "tor")
    ledger_shell(planned, "DELETE FROM chain WHERE seq = 2")
    _refused(planned, runner, "chain breaks before link 3")


def test_a_deleted_ledger_is_not_silently_started_again(planned, runner):
    (planned / "ledger.sqlite").unlink()
    for args in (("status", planned, "--round", ROUND), ("verify", planned, "--round", ROUND),
                 ("check", planned), ("chain", planned)):
        result = run_cli(runner, *args)
        assert result.exit_code == 2, args
        assert "the ledger is missing, but the folder holds planned rounds (2027-1)" in \
            result.stderr, args
        assert not (planned / "ledger.sqlite").exists(), args


def _rechain(study_dir):
    """What an attacker who knows the construction does after changing a row: recompute
    every link from the first, so that the ledger checks again."""
    from planner import ledger as ledger_module

    db = sqlite3.connect(study_dir / "ledger.sqlite", isolation_level=None)
    links = db.execute("SELECT seq, at, covers FROM chain ORDER BY seq").fetchall()
    db.execute("DROP TRIGGER chain_no_update")
    prev = "0" * 64
    for seq, at, covers in links:
        digest = hashlib.sha256()
        for table in ledger_module._CHAINED:
            span = json.loads(covers).get(table)
            if span:
                rows = db.execute(f"SELECT rowid, * FROM {table} WHERE rowid BETWEEN ? AND ? "
                                  "ORDER BY rowid", span).fetchall()
                digest.update(json.dumps([table, rows], separators=(",", ":"),
                                         ensure_ascii=False).encode("utf-8"))
        head = ledger_module._head(prev, seq, at, covers, digest.hexdigest())
        db.execute("UPDATE chain SET digest = ?, prev = ?, head = ? WHERE seq = ?",
                   (digest.hexdigest(), prev, head, seq))
        prev = head
    db.execute(ledger_module._expected_schema()[("trigger", "chain_no_update")])
    db.close()


def test_a_rewritten_chain_no_longer_matches_the_receipt(planned, runner, tmp_path):
    result = _received(planned, runner, tmp_path)
    receipt = (planned / "rounds" / ROUND / "results" / "receipt-kal-v1.txt").read_text()
    line = next(ln for ln in receipt.splitlines() if ln.startswith("ledger chain after"))
    link, head = int(line.split("link ")[1].split(",")[0]), line.rsplit(" ", 1)[1]
    assert f"{link}:{head}" in result.stdout
    assert run_cli(runner, "chain", planned, "--link", link).stdout.strip().endswith(head)
    ledger_shell(planned, "UPDATE result_rows SET value = value + 1 WHERE rowid = 3")
    _rechain(planned)
    # The rewritten ledger checks again, but its chain no longer passes through the head
    # the laboratory holds: the rewrite shows against the receipt.
    shown = run_cli(runner, "chain", planned, "--link", link)
    assert shown.exit_code == 0
    assert not shown.stdout.strip().endswith(head)


def test_writes_outside_a_transaction_are_refused(planned):
    with Ledger.open(planned) as ledger, pytest.raises(RuntimeError, match="transaction"):
        ledger.record_event(ROUND, "printed", {})


def test_a_ledger_of_schema_1_is_chained_when_opened(tmp_path):
    from planner import ledger as ledger_module

    db = sqlite3.connect(tmp_path / "ledger.sqlite", isolation_level=None)
    for statement in ledger_module._split_sql(ledger_module._MIGRATIONS[0]):
        db.execute(statement)
    db.execute("PRAGMA user_version = 1")
    db.execute("INSERT INTO events (round, kind, at, detail) VALUES ('r', 'planned', 't', '{}')")
    db.close()
    with Ledger.open(tmp_path) as ledger:
        assert [h.seq for h in ledger.heads()] == [1]
        assert [e.kind for e in ledger.events("r")] == ["planned"]


def test_an_added_trigger_with_a_name_like_sqlites_own_is_found(planned, runner):
    # LIKE 'sqlite_%' would let 'sqlitex_...' through ('_' is a wildcard); such a trigger
    # could rewrite every forced opening as it is recorded.
    _raw(planned, "CREATE TRIGGER sqlitex_quiet BEFORE INSERT ON events BEGIN SELECT 1; END")
    _refused(planned, runner, "'sqlitex_quiet', which ringplan never made")


def test_rows_with_rowids_below_one_are_outside_the_chain_and_found(planned, runner, tmp_path):
    _received(planned, runner, tmp_path)
    ledger_shell(planned, "INSERT INTO events (id, round, kind, at, detail) VALUES "
                          "(-1, '2027-1', 'received', 't', '{\"lab\": \"crx\"}')")
    _refused(planned, runner, "table events has rows that no ringplan command recorded")


def test_an_emptied_ledger_beside_planned_rounds_is_refused_not_started_again(planned, runner):
    (planned / "ledger.sqlite").write_bytes(b"")
    result = run_cli(runner, "chain", planned)
    assert result.exit_code == 2 and "the ledger file is empty" in result.stderr
    assert (planned / "ledger.sqlite").stat().st_size == 0


def test_a_schema_version_set_back_by_hand_is_one_line(planned, runner):
    _raw(planned, "PRAGMA user_version = 1")
    result = run_cli(runner, "status", planned, "--round", ROUND)
    assert result.exit_code == 2 and "schema version (1) was altered" in result.stderr
    assert "Traceback" not in result.output
