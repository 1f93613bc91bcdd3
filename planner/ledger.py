"""The study's ledger: one SQLite file, append-only, with a versioned schema.

Rows are never updated or deleted: a re-planned round is a new ``rounds`` row
that supersedes the older one, a corrected result form is a new submission
version, and everything that happens to a round is an ``events`` row. The
ledger never holds which material a code belongs to; that lives only in the
sealed key.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from planner.errors import LedgerError, Where

__all__ = ["Ledger", "RoundRow", "Event", "Submission", "ResultRow", "LEDGER_NAME",
           "SCHEMA_VERSION", "STATUS_ORDER"]

LEDGER_NAME = "ledger.sqlite"

_TABLES = """
CREATE TABLE rounds (
    id INTEGER PRIMARY KEY,
    study TEXT NOT NULL,
    round TEXT NOT NULL,
    host TEXT NOT NULL,
    fingerprint TEXT NOT NULL,
    dates TEXT NOT NULL,
    planned_at TEXT NOT NULL,
    replaces INTEGER REFERENCES rounds(id)
);
CREATE TABLE units (
    code TEXT PRIMARY KEY,
    round_row INTEGER NOT NULL REFERENCES rounds(id),
    lab TEXT NOT NULL,
    kind TEXT NOT NULL,
    trial INTEGER,
    position INTEGER
);
CREATE INDEX units_round ON units(round_row);
CREATE TABLE events (
    id INTEGER PRIMARY KEY,
    round TEXT NOT NULL,
    kind TEXT NOT NULL,
    at TEXT NOT NULL,
    detail TEXT NOT NULL
);
CREATE INDEX events_round ON events(round, kind);
-- returned result forms (planner.returns), a corrected form is a new version
CREATE TABLE submissions (
    id INTEGER PRIMARY KEY,
    round TEXT NOT NULL,
    lab TEXT NOT NULL,
    version INTEGER NOT NULL,
    sha256 TEXT NOT NULL,
    file_name TEXT NOT NULL,
    received_at TEXT NOT NULL,
    late INTEGER NOT NULL,
    after_unseal INTEGER NOT NULL,
    reason TEXT,
    UNIQUE (round, lab, version)
);
-- one row per code and trial: a circulating artefact is measured once in every trial
CREATE TABLE result_rows (
    submission INTEGER NOT NULL REFERENCES submissions(id),
    code TEXT NOT NULL,
    trial INTEGER,
    position INTEGER,
    value REAL,
    uncertainty REAL,
    date TEXT,
    analyst TEXT NOT NULL,
    remarks TEXT NOT NULL,
    flags TEXT NOT NULL,
    PRIMARY KEY (submission, code, trial)
);
"""


def _append_only(*tables: str) -> str:
    """Return triggers that make every row of ``tables`` permanent."""
    return "".join(
        f"CREATE TRIGGER {t}_no_{verb.lower()} BEFORE {verb} ON {t} "
        f"BEGIN SELECT RAISE(ABORT, 'ledger rows are never {done}'); END;\n"
        for t in tables for verb, done in (("UPDATE", "changed"), ("DELETE", "deleted")))


# Each entry brings the schema from version i to i + 1; never edit one that has shipped.
_MIGRATIONS: tuple[str, ...] = (
    _TABLES + _append_only("rounds", "units", "events", "submissions", "result_rows"),
)
SCHEMA_VERSION = len(_MIGRATIONS)

# The life of a round; an event of one of these kinds moves it forward.
STATUS_ORDER = ("planned", "printed", "received", "unsealed", "evaluated")


@dataclass(frozen=True, slots=True)
class RoundRow:
    row: int
    study: str
    round: str
    host: str
    fingerprint: str
    dates: dict[str, Any]
    planned_at: str


@dataclass(frozen=True, slots=True)
class Submission:
    row: int
    round: str
    lab: str
    version: int
    sha256: str
    file_name: str
    received_at: str
    late: bool
    after_unseal: bool
    reason: str | None


@dataclass(frozen=True, slots=True)
class ResultRow:
    code: str
    trial: int | None
    position: int | None
    value: float | None
    uncertainty: float | None
    date: str | None
    analyst: str
    remarks: str
    flags: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Event:
    round: str
    kind: str
    at: str
    detail: dict[str, Any]


def _utc_now() -> datetime:
    return datetime.now(UTC)


class Ledger:
    """An open ledger file. Use as a context manager, or call close()."""

    def __init__(self, path: Path, *, clock: Callable[[], datetime] = _utc_now) -> None:
        self.path = path
        self._clock = clock
        self.db = sqlite3.connect(path, isolation_level=None)
        self.db.execute("PRAGMA foreign_keys = ON")
        self._migrate()

    @classmethod
    def open(cls, study_dir: Path, *, clock: Callable[[], datetime] = _utc_now) -> Ledger:
        """Open (or create) the ledger of a study folder."""
        return cls(Path(study_dir) / LEDGER_NAME, clock=clock)

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self.db.close()

    def now(self) -> str:
        """Return the ledger clock's time as ISO 8601 UTC with seconds."""
        return self._clock().astimezone(UTC).isoformat(timespec="seconds")

    def _migrate(self) -> None:
        try:
            version = self.db.execute("PRAGMA user_version").fetchone()[0]
        except sqlite3.DatabaseError:
            raise LedgerError("this file is not a ringplan ledger (not SQLite)",
                              Where(str(self.path))) from None
        if version > SCHEMA_VERSION:
            raise LedgerError(f"the ledger has schema version {version}, newer than this "
                              f"ringplan knows ({SCHEMA_VERSION}); upgrade ringplan",
                              Where(str(self.path)))
        for i in range(version, SCHEMA_VERSION):
            with self.transaction():
                for statement in _split_sql(_MIGRATIONS[i]):
                    self.db.execute(statement)
                self.db.execute(f"PRAGMA user_version = {i + 1}")

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """Run a block in one transaction: all of it is recorded, or nothing."""
        self.db.execute("BEGIN IMMEDIATE")
        try:
            yield self.db
        except BaseException:
            self.db.execute("ROLLBACK")
            raise
        else:
            self.db.execute("COMMIT")

    # --- rounds and units --------------------------------------------------

    def add_round(self, *, study: str, round_id: str, host: str, fingerprint: str,
                  dates: dict[str, Any], units: Iterable[tuple[str, str, str, int | None, int | None]],
                  replaces: int | None = None) -> int:
        """Insert a round and its units (code, lab, kind, trial, position); return the row id.

        Call inside ``transaction()``; raises LedgerError if a code was issued before.
        """
        cur = self.db.execute(
            "INSERT INTO rounds (study, round, host, fingerprint, dates, planned_at, replaces) "
            "VALUES (?, ?, ?, ?, ?, ?, ?)",
            (study, round_id, host, fingerprint, json.dumps(dates, sort_keys=True), self.now(),
             replaces))
        row = int(cur.lastrowid or 0)
        try:
            self.db.executemany(
                "INSERT INTO units (code, round_row, lab, kind, trial, position) "
                "VALUES (?, ?, ?, ?, ?, ?)", ((c, row, lab, kind, t, p) for c, lab, kind, t, p in units))
        except sqlite3.IntegrityError:
            raise LedgerError("a code of this round was already issued in this study; plan "
                              "again to draw new codes", Where(str(self.path))) from None
        return row

    def current_round(self, round_id: str) -> RoundRow | None:
        """Return the newest row of a round (the one in force), or None."""
        rec = self.db.execute(
            "SELECT id, study, round, host, fingerprint, dates, planned_at FROM rounds "
            "WHERE round = ? ORDER BY id DESC LIMIT 1", (round_id,)).fetchone()
        return _round(rec) if rec else None

    def rounds(self) -> list[RoundRow]:
        """Return the round rows in force, oldest first."""
        recs = self.db.execute(
            "SELECT id, study, round, host, fingerprint, dates, planned_at FROM rounds r "
            "WHERE id = (SELECT MAX(id) FROM rounds WHERE round = r.round) ORDER BY id").fetchall()
        return [_round(rec) for rec in recs]

    def codes(self, *, before_row: int | None = None) -> set[str]:
        """Return every code ever issued in this study (optionally only before a round row)."""
        if before_row is None:
            return {c for (c,) in self.db.execute("SELECT code FROM units")}
        return {c for (c,) in self.db.execute("SELECT code FROM units WHERE round_row < ?",
                                              (before_row,))}

    def units(self, round_row: int) -> list[tuple[str, str, str, int | None, int | None]]:
        """Return (code, lab, kind, trial, position) of a round row."""
        return list(self.db.execute(
            "SELECT code, lab, kind, trial, position FROM units WHERE round_row = ? ORDER BY code",
            (round_row,)))

    # --- returned results ----------------------------------------------------

    def add_submission(self, *, round_id: str, lab: str, sha256: str, file_name: str,
                       late: bool, after_unseal: bool, reason: str | None,
                       rows: Iterable[ResultRow]) -> int:
        """Insert the next version of a laboratory's results with its rows; return the version.

        Call inside ``transaction()``; the time received is the ledger clock's.
        """
        (last,) = self.db.execute("SELECT COALESCE(MAX(version), 0) FROM submissions "
                                  "WHERE round = ? AND lab = ?", (round_id, lab)).fetchone()
        cur = self.db.execute(
            "INSERT INTO submissions (round, lab, version, sha256, file_name, received_at, late, "
            "after_unseal, reason) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (round_id, lab, last + 1, sha256, file_name, self.now(), int(late),
             int(after_unseal), reason))
        self.db.executemany(
            "INSERT INTO result_rows (submission, code, trial, position, value, uncertainty, "
            "date, analyst, remarks, flags) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            ((cur.lastrowid, r.code, r.trial, r.position, r.value, r.uncertainty, r.date,
              r.analyst, r.remarks, " ".join(r.flags)) for r in rows))
        return int(last + 1)

    def submissions(self, round_id: str, lab: str | None = None) -> list[Submission]:
        """Return every version received for a round (optionally one laboratory), oldest first."""
        query = ("SELECT id, round, lab, version, sha256, file_name, received_at, late, "
                 "after_unseal, reason FROM submissions WHERE round = ?")
        args: tuple[Any, ...] = (round_id,)
        if lab is not None:
            query += " AND lab = ?"
            args += (lab,)
        return [Submission(r[0], r[1], r[2], r[3], r[4], r[5], r[6], bool(r[7]), bool(r[8]), r[9])
                for r in self.db.execute(query + " ORDER BY id", args)]

    def result_rows(self, submission_row: int) -> list[ResultRow]:
        """Return the result rows of one submission, in run order."""
        return [ResultRow(c, t, p, v, u, d, a, rem, tuple(f.split()))
                for c, t, p, v, u, d, a, rem, f in self.db.execute(
                    "SELECT code, trial, position, value, uncertainty, date, analyst, remarks, "
                    "flags FROM result_rows WHERE submission = ? ORDER BY trial, position, code",
                    (submission_row,))]

    # --- events ------------------------------------------------------------

    def record_event(self, round_id: str, kind: str, detail: dict[str, Any] | None = None) -> None:
        """Append an event (printed, received, unsealed, spare-swap, ...) to a round's history."""
        self.db.execute("INSERT INTO events (round, kind, at, detail) VALUES (?, ?, ?, ?)",
                        (round_id, kind, self.now(), json.dumps(detail or {}, sort_keys=True)))

    def events(self, round_id: str, kind: str | None = None) -> list[Event]:
        """Return a round's events, oldest first, optionally of one kind."""
        query = "SELECT round, kind, at, detail FROM events WHERE round = ?"
        args: tuple[Any, ...] = (round_id,)
        if kind is not None:
            query += " AND kind = ?"
            args += (kind,)
        return [Event(r, k, at, json.loads(d))
                for r, k, at, d in self.db.execute(query + " ORDER BY id", args)]

    def round_status(self, round_id: str) -> str | None:
        """Return how far a round has come (see STATUS_ORDER), or None if never planned."""
        current = self.current_round(round_id)
        if current is None:
            return None
        kinds = {k for (k,) in self.db.execute(
            "SELECT kind FROM events WHERE round = ? AND id > COALESCE("
            "(SELECT MAX(id) FROM events WHERE round = ? AND kind = 'planned'), 0)",
            (round_id, round_id))}
        status = "planned"
        for step in STATUS_ORDER:
            if step in kinds:
                status = step
        return status


def _round(rec: tuple[Any, ...]) -> RoundRow:
    return RoundRow(rec[0], rec[1], rec[2], rec[3], rec[4], json.loads(rec[5]), rec[6])


def _split_sql(script: str) -> list[str]:
    """Split a migration into statements, keeping trigger bodies whole."""
    out, buf = [], ""
    for piece in script.split(";"):
        buf += piece + ";"
        if "BEGIN" in buf.upper() and "END;" not in buf.upper():
            continue
        if buf.strip(" \n;"):
            out.append(buf.strip())
        buf = ""
    return out
