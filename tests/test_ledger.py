"""The ledger: a real SQLite file, append-only, schema versioned, transactional."""

from __future__ import annotations

import sqlite3
from datetime import UTC, datetime

import pytest

from planner.errors import LedgerError
from planner.ledger import SCHEMA_VERSION, Ledger


def _clock():
    return datetime(2027, 1, 5, 9, 30, tzinfo=UTC)


def _add(ledger, round_id="2027-1", codes=("AAAAAAAA0",)):
    with ledger.transaction():
        row = ledger.add_round(study="s", round_id=round_id, host="kal", fingerprint="f" * 64,
                               dates={"test_start": "2027-01-20"},
                               units=[(c, "kal", "test", 1, 1) for c in codes])
        ledger.record_event(round_id, "planned", {"units": len(codes)})
    return row


def test_schema_version_and_real_sqlite_file(tmp_path):
    with Ledger.open(tmp_path, clock=_clock) as ledger:
        _add(ledger)
    db = sqlite3.connect(tmp_path / "ledger.sqlite")
    assert db.execute("PRAGMA user_version").fetchone()[0] == SCHEMA_VERSION
    assert db.execute("SELECT round, host FROM rounds").fetchall() == [("2027-1", "kal")]


def test_rows_cannot_be_changed_or_deleted(tmp_path):
    with Ledger.open(tmp_path, clock=_clock) as ledger:
        _add(ledger)
        for sql in ("UPDATE rounds SET host = 'x'", "DELETE FROM events", "DELETE FROM units",
                    "UPDATE units SET lab = 'x'"):
            with pytest.raises(sqlite3.DatabaseError, match="never"):
                ledger.db.execute(sql)


def test_code_issued_twice_is_refused_and_rolled_back(tmp_path):
    with Ledger.open(tmp_path, clock=_clock) as ledger:
        _add(ledger, "2027-1", ("AAAAAAAA0",))
        with pytest.raises(LedgerError, match="already issued"):
            _add(ledger, "2027-2", ("BBBBBBBB0", "AAAAAAAA0"))
        assert [r.round for r in ledger.rounds()] == ["2027-1"]
        assert ledger.codes() == {"AAAAAAAA0"}
        assert ledger.events("2027-2") == []


def test_status_follows_events_and_replanning(tmp_path):
    with Ledger.open(tmp_path, clock=_clock) as ledger:
        first = _add(ledger)
        assert ledger.round_status("2027-1") == "planned"
        with ledger.transaction():
            ledger.record_event("2027-1", "printed", {})
        assert ledger.round_status("2027-1") == "printed"
        second = _add(ledger, codes=("CCCCCCCC0",))
        assert ledger.current_round("2027-1").row == second != first
        assert ledger.round_status("2027-1") == "planned"
        assert ledger.codes(before_row=second) == {"AAAAAAAA0"}
        assert ledger.events("2027-1", "printed")[0].at == "2027-01-05T09:30:00+00:00"
        assert ledger.round_status("nope") is None


def test_newer_schema_is_refused(tmp_path):
    db = sqlite3.connect(tmp_path / "ledger.sqlite")
    db.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    db.close()
    with pytest.raises(LedgerError, match="newer than this ringplan knows"):
        Ledger.open(tmp_path)


def test_not_a_database(tmp_path):
    (tmp_path / "ledger.sqlite").write_text("this is not sqlite, just text" * 20)
    with pytest.raises(LedgerError, match="not a ringplan ledger"):
        Ledger.open(tmp_path)
