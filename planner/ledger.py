"""The study's ledger: one SQLite file, append-only, hash-chained, with a versioned schema.

Rows are never updated or deleted: a re-planned round is a new ``rounds`` row
that supersedes the older one, a corrected result form is a new submission
version, and everything that happens to a round is an ``events`` row. The
ledger never holds which material a code belongs to; that lives only in the
sealed key.

Triggers refuse UPDATE and DELETE, but anyone with the sqlite3 shell can drop a
trigger, so the rows are also chained: every transaction that adds rows appends
one ``chain`` link holding the rowid ranges it added per table, the SHA-256 of
those rows (canonical JSON), and a head = SHA-256 of the previous head, the
link's number, time, ranges and digest. Opening the ledger checks the schema,
the guards and the whole chain, and refuses with one line naming what was
altered: a changed row (its range's digest differs), a deleted row (the same),
an added row (outside every link), a removed link (the numbers skip or the
heads no longer follow). A rewrite of the whole chain from the altered row on
still reads as consistent here, which is why the head goes out of the
coordinator's hands: onto each laboratory's receipt when its form is recorded,
and onto the letters. A later ledger whose chain no longer passes through a
head a laboratory holds has been rewritten.
"""

from __future__ import annotations

import hashlib
import json
import os
import sqlite3
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from functools import lru_cache
from pathlib import Path
from typing import Any

from planner.errors import LedgerError, Where

__all__ = ["Ledger", "RoundRow", "Event", "Submission", "ResultRow", "ChainHead", "LEDGER_NAME",
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


_FIRST = ("rounds", "units", "events", "submissions", "result_rows")  # schema version 1
_CHAINED = (*_FIRST, "result_values")

_CHAIN = """
CREATE TABLE chain (
    seq INTEGER PRIMARY KEY,
    at TEXT NOT NULL,
    covers TEXT NOT NULL,
    digest TEXT NOT NULL,
    prev TEXT NOT NULL,
    head TEXT NOT NULL
);
"""

# A study with several measurands: one row per measurand reported on a unit. The row of
# result_rows with the same submission, code and trial holds the cells they share (date,
# analyst, remarks, flags) and no value; a blank value (NULL) was explained in its remarks.
_VALUES = """
CREATE TABLE result_values (
    submission INTEGER NOT NULL REFERENCES submissions(id),
    code TEXT NOT NULL,
    trial INTEGER,
    measurand TEXT NOT NULL,
    value REAL,
    uncertainty REAL,
    PRIMARY KEY (submission, code, trial, measurand)
);
"""

# Each entry brings the schema from version i to i + 1; never edit one that has shipped.
_MIGRATIONS: tuple[str, ...] = (
    _TABLES + _append_only(*_FIRST),
    _CHAIN + _append_only("chain"),
    _VALUES + _append_only("result_values"),
)
SCHEMA_VERSION = len(_MIGRATIONS)
_GENESIS = "0" * 64

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
    """One row of a result form; with several measurands ``value`` and ``uncertainty`` are
    None and ``measurements`` holds (measurand id, value, uncertainty) per measurand reported,
    value None for a blank explained in ``remarks``."""

    code: str
    trial: int | None
    position: int | None
    value: float | None
    uncertainty: float | None
    date: str | None
    analyst: str
    remarks: str
    flags: tuple[str, ...]
    measurements: tuple[tuple[str, float | None, float | None], ...] = ()


@dataclass(frozen=True, slots=True)
class ChainHead:
    """The newest link of the ledger's chain: its number, time and head (64 hex digits)."""

    seq: int
    at: str
    head: str

    def __str__(self) -> str:
        return f"{self.seq}:{self.head}"


@dataclass(frozen=True, slots=True)
class Event:
    round: str
    kind: str
    at: str
    detail: dict[str, Any]


def _utc_now() -> datetime:
    return datetime.now(UTC)


# SQLite's primary result codes of a disk that will not take the write.
_SQLITE_PERM, _SQLITE_READONLY, _SQLITE_FULL, _SQLITE_CANTOPEN = 3, 8, 13, 14


def _storage_problem(exc: BaseException, path: Path) -> LedgerError | None:
    """Return the LedgerError for a ledger the disk will not let us write, else None."""
    if not isinstance(exc, sqlite3.OperationalError):
        return None
    code = (getattr(exc, "sqlite_errorcode", 0) or 0) & 0xFF
    if code in (_SQLITE_PERM, _SQLITE_READONLY, _SQLITE_CANTOPEN):
        return LedgerError("the ledger cannot be written here (a read-only disk or folder, or "
                           "not yours); make the study folder and the ledger writable by you, "
                           "or work on a copy; nothing was recorded", Where(str(path)))
    if code == _SQLITE_FULL:
        return LedgerError("no space left on the disk for the ledger; free some space and run "
                           "the command again; nothing was recorded", Where(str(path)))
    return None


def _keep_private(path: Path) -> None:
    """Narrow a ledger file made wider (by an older version or a copy) to its owner: it
    holds every laboratory's results before they are sent out. SQLite gives its journal the
    database file's permissions."""
    try:
        info = os.stat(path)
        if info.st_mode & 0o077 and info.st_uid == os.geteuid():
            os.chmod(path, 0o600)
    except OSError:
        pass  # sqlite3.connect reports what is wrong with the place in one line


def _stale_starts(path: Path) -> None:
    """Remove ledgers begun by a command that was killed before it put them in place."""
    from planner import files

    for temp in path.parent.glob(f".{path.name}.*{files.TEMP_SUFFIX}*"):
        parts = temp.name.split(".")
        pid = next((int(p) for p in parts if p.isdigit()), 0)
        if not files.process_alive(pid):
            temp.unlink(missing_ok=True)


class Ledger:
    """An open ledger file. Use as a context manager, or call close()."""

    def __init__(self, path: Path, *, clock: Callable[[], datetime] = _utc_now,
                 create: bool = True) -> None:
        self.path = path
        self._clock = clock
        if create and not os.path.lexists(path):
            self._start(path)
        _keep_private(path)
        try:
            self.db = sqlite3.connect(path, isolation_level=None, timeout=10.0)
        except sqlite3.OperationalError as exc:
            problem = _storage_problem(exc, path)
            if problem is not None:
                raise problem from None
            raise
        try:
            self.db.execute("PRAGMA foreign_keys = ON")
            self._migrate(create=create)
            self.check()
        except BaseException as exc:
            self.db.close()
            problem = _storage_problem(exc, path)
            if problem is not None:
                raise problem from None
            raise

    def _start(self, path: Path) -> None:
        """Build a new ledger beside ``path``, owner-only, and put it in place whole: a
        command killed while starting the ledger leaves no empty or half-made one behind."""
        import secrets

        from planner import files

        _stale_starts(path)
        temp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(4)}"
                              f"{files.TEMP_SUFFIX}")
        try:
            os.close(os.open(temp, os.O_WRONLY | os.O_CREAT | os.O_EXCL | os.O_NOFOLLOW, 0o600))
            self.db = sqlite3.connect(temp, isolation_level=None)
            try:
                self.db.execute("PRAGMA foreign_keys = ON")
                self._migrate(create=True)
            finally:
                self.db.close()
            try:
                os.link(temp, path)  # never replaces a ledger another command put there
            except FileExistsError:
                pass
            except OSError:  # a file system without hard links
                if not os.path.lexists(path):
                    os.replace(temp, path)
        except (OSError, sqlite3.OperationalError) as exc:
            problem = _storage_problem(exc, path) if isinstance(exc, sqlite3.Error) else None
            if problem is not None:
                raise problem from None
            if isinstance(exc, OSError) and exc.errno in files.USER_ERRNOS:
                raise files.explain(exc, path) from None
            raise
        finally:
            for leftover in (temp, Path(f"{temp}-journal")):
                leftover.unlink(missing_ok=True)

    @classmethod
    def open(cls, study_dir: Path, *, clock: Callable[[], datetime] = _utc_now,
             create: bool = True) -> Ledger:
        """Open the ledger of a study folder; create it only when ``create`` and no round exists.

        Raises LedgerError when the file is missing but the folder holds planned rounds
        (the ledger was lost or removed), when it is missing and ``create`` is False,
        and when its schema, guards or chain were altered (see ``check``).
        """
        folder = Path(study_dir)
        path = folder / LEDGER_NAME
        rounds = folder / "rounds"
        planned = sorted(p.name for p in rounds.iterdir()
                         if (p / "manifest.json").is_file()) if rounds.is_dir() else []
        if not path.exists():
            if planned:
                raise LedgerError(f"the ledger is missing, but the folder holds planned rounds "
                                  f"({', '.join(planned[:3])}); restore {LEDGER_NAME} from a "
                                  "backup, a new one would have no record of them",
                                  Where(str(path)))
            if not create:
                raise LedgerError("no ledger here yet: no round has been planned in this "
                                  "study folder ('ringplan plan' starts one)", Where(str(path)))
        # A ledger is started only where no round exists: an emptied file beside planned
        # rounds is refused like a missing one.
        return cls(path, clock=clock, create=create and not planned)

    def __enter__(self) -> Ledger:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        self.db.close()

    def now(self) -> str:
        """Return the ledger clock's time as ISO 8601 UTC with seconds."""
        return self._clock().astimezone(UTC).isoformat(timespec="seconds")

    def _migrate(self, *, create: bool) -> None:
        where = Where(str(self.path))
        try:
            version = self.db.execute("PRAGMA user_version").fetchone()[0]
        except sqlite3.DatabaseError:
            raise LedgerError("this file is not a ringplan ledger (not SQLite)", where) from None
        if version > SCHEMA_VERSION:
            raise LedgerError(f"the ledger has schema version {version}, newer than this "
                              f"ringplan knows ({SCHEMA_VERSION}); upgrade ringplan", where)
        if version == 0 and not create:
            # An empty file where the ledger was: it is not started anew by a reading command.
            raise LedgerError("the ledger file is empty; restore ledger.sqlite from a backup "
                              "(a new ledger would have no record of the rounds)", where)
        # Version 2 brings the chain: its commit (see ``transaction``) links the rows the
        # ledger held before, as the first link.
        for i in range(version, SCHEMA_VERSION):
            try:
                with self.transaction():
                    for statement in _split_sql(_MIGRATIONS[i]):
                        self.db.execute(statement)
                    self.db.execute(f"PRAGMA user_version = {i + 1}")
            except sqlite3.OperationalError:
                raise LedgerError(f"the ledger's schema version ({version}) was altered: its "
                                  "tables do not match it; restore ledger.sqlite from a backup",
                                  where) from None

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """Run a block in one transaction: all of it is recorded, or nothing.

        The rows the block added are chained (one link) before the commit.
        """
        try:
            self.db.execute("BEGIN IMMEDIATE")
        except sqlite3.OperationalError as exc:
            problem = _storage_problem(exc, self.path)
            if problem is not None:
                raise problem from None
            raise LedgerError(f"the ledger is busy ({exc}); another ringplan command is "
                              "writing to it, try again when it has finished",
                              Where(str(self.path))) from None
        try:
            yield self.db
            if self._has_chain():
                self._link()
            self.db.execute("COMMIT")
        except BaseException as exc:
            if self.db.in_transaction:  # SQLite ends some failed transactions itself
                self.db.execute("ROLLBACK")
            problem = _storage_problem(exc, self.path)
            if problem is not None:
                raise problem from None
            raise

    # --- the chain -----------------------------------------------------------

    def _writing(self) -> None:
        # A row written outside a transaction would miss its chain link and read as tampering.
        if not self.db.in_transaction:
            raise RuntimeError("ledger rows are written inside Ledger.transaction() only")

    def _has_chain(self) -> bool:
        return self.db.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' "
                               "AND name = 'chain'").fetchone() is not None

    def _rows_digest(self, covers: dict[str, list[int]]) -> str:
        digest = hashlib.sha256()
        for table in _CHAINED:
            if table not in covers:
                continue
            lo, hi = covers[table]
            rows = self.db.execute(f"SELECT rowid, * FROM {table} WHERE rowid BETWEEN ? AND ? "
                                   "ORDER BY rowid", (lo, hi)).fetchall()
            digest.update(json.dumps([table, rows], separators=(",", ":"),
                                     ensure_ascii=False).encode("utf-8"))
        return digest.hexdigest()

    def _links(self) -> list[tuple[int, str, str, str, str, str]]:
        return self.db.execute(
            "SELECT seq, at, covers, digest, prev, head FROM chain ORDER BY seq").fetchall()

    def _upto(self) -> dict[str, int]:
        upto = {t: 0 for t in _CHAINED}
        for _, _, covers, _, _, _ in self._links():
            for table, (_, hi) in json.loads(covers).items():
                upto[table] = max(upto[table], hi)
        return upto

    def _link(self) -> None:
        """Append a chain link for the rows added since the last one (none: no link)."""
        upto = self._upto()
        covers: dict[str, list[int]] = {}
        # While a ledger is migrated, the tables of later versions do not exist yet.
        made = {name for (name,) in self.db.execute(
            "SELECT name FROM sqlite_master WHERE type = 'table'")}
        for table in _CHAINED:
            if table not in made:
                continue
            (hi,) = self.db.execute(f"SELECT COALESCE(MAX(rowid), 0) FROM {table}").fetchone()
            if hi > upto[table]:
                covers[table] = [upto[table] + 1, int(hi)]
        if not covers:
            return
        last = self.db.execute("SELECT seq, head FROM chain ORDER BY seq DESC LIMIT 1").fetchone()
        seq, prev = (last[0] + 1, last[1]) if last else (1, _GENESIS)
        at = self.now()
        covers_text = json.dumps(covers, sort_keys=True, separators=(",", ":"))
        digest = self._rows_digest(covers)
        self.db.execute("INSERT INTO chain (seq, at, covers, digest, prev, head) "
                        "VALUES (?, ?, ?, ?, ?, ?)",
                        (seq, at, covers_text, digest, prev,
                         _head(prev, seq, at, covers_text, digest)))

    def head(self) -> ChainHead:
        """Return the newest link of the chain (number 0 and the genesis head when empty)."""
        last = self.db.execute("SELECT seq, at, head FROM chain ORDER BY seq DESC LIMIT 1"
                               ).fetchone()
        return ChainHead(*last) if last else ChainHead(0, "", _GENESIS)

    def link_of(self, table: str, rowid: int) -> ChainHead:
        """Return the chain link that recorded row ``rowid`` of ``table`` (KeyError if none)."""
        for seq, at, covers, _, _, head in self._links():
            span = json.loads(covers).get(table)
            if span and span[0] <= rowid <= span[1]:
                return ChainHead(seq, at, head)
        raise KeyError((table, rowid))

    def heads(self) -> list[ChainHead]:
        """Return every link of the chain, oldest first."""
        return [ChainHead(seq, at, head) for seq, at, _, _, _, head in self._links()]

    def check(self) -> None:
        """Check the schema, the guards and the chain; raise LedgerError naming what was altered."""
        where = Where(str(self.path))
        expected = _expected_schema()
        # Every object but SQLite's own (autoindexes, sqlite_sequence): an added trigger or
        # view could rewrite rows as they are written. startswith, not LIKE, whose '_' is a
        # wildcard that would let 'sqlitex_...' through.
        found = {(kind, name): sql for kind, name, sql in self.db.execute(
            "SELECT type, name, sql FROM sqlite_master") if not name.startswith("sqlite_")}
        for (kind, name), sql in expected.items():
            if (kind, name) not in found:
                what = "guard" if kind == "trigger" else kind
                raise LedgerError(f"the ledger was altered outside ringplan: its {what} "
                                  f"{name!r} is missing; restore {LEDGER_NAME} from a backup",
                                  where)
            if _normal(found[(kind, name)]) != _normal(sql):
                raise LedgerError(f"the ledger was altered outside ringplan: the definition of "
                                  f"its {kind} {name!r} was changed; restore {LEDGER_NAME} from "
                                  "a backup", where)
        extra = sorted(name for kind, name in found if (kind, name) not in expected)
        if extra:
            raise LedgerError(f"the ledger was altered outside ringplan: it has {extra[0]!r}, "
                              f"which ringplan never made; restore {LEDGER_NAME} from a backup",
                              where)
        prev, last, upto = _GENESIS, 0, {t: 0 for t in _CHAINED}
        for seq, at, covers_text, digest, link_prev, head in self._links():
            if seq != last + 1 or link_prev != prev:
                raise LedgerError(f"the ledger was altered outside ringplan: its chain breaks "
                                  f"before link {seq} (a link was removed or rewritten); "
                                  f"restore {LEDGER_NAME} from a backup", where)
            covers = json.loads(covers_text)
            for table, (lo, hi) in covers.items():
                if lo != upto[table] + 1:
                    raise LedgerError(f"the ledger was altered outside ringplan: link {seq} "
                                      f"does not follow on in table {table}", where)
                upto[table] = hi
            if _head(prev, seq, at, covers_text, digest) != head:
                raise LedgerError(f"the ledger was altered outside ringplan: link {seq} of its "
                                  "chain was rewritten", where)
            if self._rows_digest(covers) != digest:
                spans = ", ".join(f"{t} rows {lo}-{hi}" for t, (lo, hi) in covers.items())
                raise LedgerError(f"the ledger was altered outside ringplan: rows recorded at "
                                  f"{at} (chain link {seq}: {spans}) were changed or deleted "
                                  f"since; restore {LEDGER_NAME} from a backup", where)
            prev, last = head, seq
        for table in _CHAINED:
            lo, hi, count = self.db.execute(
                f"SELECT COALESCE(MIN(rowid), 1), COALESCE(MAX(rowid), 0), COUNT(*) "
                f"FROM {table}").fetchone()
            # The chain covers rowids 1..upto without gaps: anything else was added by hand.
            if lo < 1 or hi > upto[table] or count != upto[table]:
                raise LedgerError(f"the ledger was altered outside ringplan: table {table} has "
                                  "rows that no ringplan command recorded; restore "
                                  f"{LEDGER_NAME} from a backup", where)

    # --- rounds and units --------------------------------------------------

    def add_round(self, *, study: str, round_id: str, host: str, fingerprint: str,
                  dates: dict[str, Any], units: Iterable[tuple[str, str, str, int | None, int | None]],
                  replaces: int | None = None) -> int:
        """Insert a round and its units (code, lab, kind, trial, position); return the row id.

        Call inside ``transaction()``; raises LedgerError if a code was issued before.
        """
        self._writing()
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
        self._writing()
        (last,) = self.db.execute("SELECT COALESCE(MAX(version), 0) FROM submissions "
                                  "WHERE round = ? AND lab = ?", (round_id, lab)).fetchone()
        cur = self.db.execute(
            "INSERT INTO submissions (round, lab, version, sha256, file_name, received_at, late, "
            "after_unseal, reason) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
            (round_id, lab, last + 1, sha256, file_name, self.now(), int(late),
             int(after_unseal), reason))
        rows = list(rows)
        self.db.executemany(
            "INSERT INTO result_rows (submission, code, trial, position, value, uncertainty, "
            "date, analyst, remarks, flags) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
            ((cur.lastrowid, r.code, r.trial, r.position, r.value, r.uncertainty, r.date,
              r.analyst, r.remarks, " ".join(r.flags)) for r in rows))
        measured = [(cur.lastrowid, r.code, r.trial, m, v, u) for r in rows
                    for m, v, u in r.measurements]
        if measured:  # a study in the single-measurand form writes what it always wrote
            self.db.executemany(
                "INSERT INTO result_values (submission, code, trial, measurand, value, "
                "uncertainty) VALUES (?, ?, ?, ?, ?, ?)", measured)
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
        """Return the result rows of one submission, in run order, each with its measurements
        (in the order recorded, which is the spec's)."""
        measured: dict[tuple[str, int | None], list[tuple[str, float | None, float | None]]] = {}
        for c, t, m, v, u in self.db.execute(
                "SELECT code, trial, measurand, value, uncertainty FROM result_values "
                "WHERE submission = ? ORDER BY rowid", (submission_row,)):
            measured.setdefault((c, t), []).append((m, v, u))
        return [ResultRow(c, t, p, v, u, d, a, rem, tuple(f.split()),
                          tuple(measured.get((c, t), ())))
                for c, t, p, v, u, d, a, rem, f in self.db.execute(
                    "SELECT code, trial, position, value, uncertainty, date, analyst, remarks, "
                    "flags FROM result_rows WHERE submission = ? ORDER BY trial, position, code",
                    (submission_row,))]

    # --- events ------------------------------------------------------------

    def record_event(self, round_id: str, kind: str, detail: dict[str, Any] | None = None) -> None:
        """Append an event (printed, received, unsealed, spare-swap, ...) to a round's history."""
        self._writing()
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


def _head(prev: str, seq: int, at: str, covers: str, digest: str) -> str:
    text = f"ringplan-ledger-chain/1\n{prev}\n{seq}\n{at}\n{covers}\n{digest}"
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _normal(sql: str | None) -> str:
    return " ".join((sql or "").split())


@lru_cache(maxsize=1)
def _expected_schema() -> dict[tuple[str, str], str]:
    """Return (type, name) -> SQL of the tables, indexes and guards the migrations make."""
    db = sqlite3.connect(":memory:")
    try:
        for migration in _MIGRATIONS:
            for statement in _split_sql(migration):
                db.execute(statement)
        return {(kind, name): sql for kind, name, sql in db.execute(
            "SELECT type, name, sql FROM sqlite_master") if not name.startswith("sqlite_")}
    finally:
        db.close()


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
