"""Receiving many forms in one call: the same records and guarantees as one form at a time.

A round of hundreds of laboratories is received in one call. ``receive`` then reads the
round's versions once, checks each code once, writes every copy and every receipt with
``files.write_many`` (each file flushed to disk before its rename, the flushes side by
side) and works out each laboratory's state once. These tests hold that nothing of what
one form at a time guaranteed is lost: a bad form among many records nothing, a disk that
fails while the copies are flushed records nothing and leaves no temporary file, a receive
killed before its commit leaves the ledger as it was, and every receipt written in a batch
is the receipt the ledger alone gives. The round is the example study's (conftest); the
values are those the tests write into the forms.
"""

from __future__ import annotations

import errno
import hashlib
import os
import threading

import pytest
from conftest import (
    kill_receive_while_paused,
    ledger_snapshot,
    FIRST_ROW,
    LABS,
    ROUND,
    filled,
    get_cell,
    mistype,
    nothing_recorded,
    receive,
    set_cell,
    write,
)

from planner import codes, files, plan, returns, spec
from planner.errors import PlannerError
from planner.ledger import Ledger

ROWS = 18  # units of each laboratory's form in the example round


def _all_forms(study_dir, tmp_path, *, day="2027-01-25"):
    return [write(tmp_path, f"{lab}.csv", filled(study_dir, lab, day=day)) for lab in LABS]


def _temporary(folder):
    return sorted(p.name for p in folder.rglob(f"*{files.TEMP_SUFFIX}"))


# --- the records of a batch ------------------------------------------------------------

def test_every_form_of_a_round_in_one_call_is_copied_recorded_and_given_its_receipt(
        planned, runner, tmp_path):
    forms = _all_forms(planned, tmp_path)
    result = receive(runner, planned, *forms)
    assert result.exit_code == 0, result.stderr
    folder = plan.round_dir(planned, ROUND)
    for lab, path in zip(LABS, forms, strict=True):
        assert f"{lab}: recorded version 1 from {path}: {ROWS} values, 0 without value" in \
            result.stdout
        stored = folder / "results" / f"{hashlib.sha256(path.read_bytes()).hexdigest()}.csv"
        assert stored.read_bytes() == path.read_bytes()
        assert stored.stat().st_mode & 0o777 == 0o400  # owner-only and read-only, as one
    with Ledger.open(planned) as ledger:
        subs = ledger.submissions(ROUND)
        assert [(s.lab, s.version) for s in subs] == [(lab, 1) for lab in LABS]
        # one transaction: one chain link holds every form of the call
        links = {ledger.link_of("submissions", s.row).seq for s in subs}
        assert len(links) == 1
        for s, path in zip(subs, forms, strict=True):
            lines = path.read_text(encoding="utf-8").splitlines()
            written = {codes.compact(get_cell(lines, n, "code", s.lab))
                       for n in range(FIRST_ROW, FIRST_ROW + ROWS)}
            assert {r.code for r in ledger.result_rows(s.row)} == written
    assert not any((folder / ".intake").iterdir())
    assert _temporary(folder) == []


def test_receipts_written_in_a_batch_are_those_the_ledger_alone_gives(planned, runner,
                                                                      tmp_path):
    # A second version of one laboratory in the same study: its receipt merges versions.
    first = _all_forms(planned, tmp_path)
    assert receive(runner, planned, *first).exit_code == 0
    lines = filled(planned, "tor")
    set_cell(lines, FIRST_ROW, "value", "99,5", "tor")
    corrected = write(tmp_path, "tor-2.csv", lines)
    assert receive(runner, planned, corrected).exit_code == 0
    results = plan.round_dir(planned, ROUND) / "results"
    made = {p.name: p.read_bytes() for p in results.glob("receipt-*")}
    assert sorted(made) == sorted([f"receipt-{lab}-v1.txt" for lab in LABS]
                                  + ["receipt-tor-v2.txt"])
    assert b"in force for the laboratory: 18 results; complete" in made["receipt-kal-v1.txt"]
    for name in made:
        os.chmod(results / name, 0o600)
        (results / name).unlink()
    study = spec.load(planned)
    with Ledger.open(planned) as ledger:
        again = returns.write_receipts(plan.round_dir(planned, ROUND), study.id, ROUND, ledger,
                                       plan.read_manifest(plan.round_dir(planned, ROUND)))
    assert sorted(again) == sorted((name.split("-")[1], int(name[-5])) for name in made)
    assert {p.name: p.read_bytes() for p in results.glob("receipt-*")} == made


def test_the_round_is_read_once_whatever_the_number_of_forms(planned, tmp_path, monkeypatch):
    # What grows with the forms is the forms' own work, not reading the round again.
    calls = {"submissions": 0, "validate": 0}
    real_submissions, real_validate = Ledger.submissions, codes.validate

    def submissions(self, *args, **kwargs):
        calls["submissions"] += 1
        return real_submissions(self, *args, **kwargs)

    def validate(*args, **kwargs):
        calls["validate"] += 1
        return real_validate(*args, **kwargs)

    monkeypatch.setattr(Ledger, "submissions", submissions)
    monkeypatch.setattr(codes, "validate", validate)
    study = spec.load(planned)
    counts = []
    for labs in (LABS[:1], LABS[1:]):
        forms = [write(tmp_path, f"{lab}.csv", filled(planned, lab)) for lab in labs]
        calls.update(submissions=0, validate=0)
        with Ledger.open(planned) as ledger:
            got = returns.receive(study, planned, ROUND, forms, ledger)
        assert [r.version for r in got] == [1] * len(labs)
        counts.append(dict(calls))
    assert counts[0]["submissions"] == counts[1]["submissions"]
    # each code of each form is checked once (18 rows a form)
    assert [c["validate"] for c in counts] == [ROWS, ROWS * (len(LABS) - 1)]


# --- nothing recorded when anything fails ------------------------------------------------

def test_one_bad_form_among_many_records_nothing_and_says_which(planned, runner, tmp_path):
    forms = _all_forms(planned, tmp_path)
    lines = filled(planned, "hel")
    code = get_cell(lines, FIRST_ROW + 3, "code", "hel")
    set_cell(lines, FIRST_ROW + 3, "code", mistype(code), "hel")
    forms[2] = write(tmp_path, "hel.csv", lines)
    result = receive(runner, planned, *forms)
    assert result.exit_code == 2
    errors = result.stderr.strip().splitlines()
    assert len(errors) == 2 and errors[0].startswith(f"error: {forms[2]}:{FIRST_ROW + 3}: ")
    assert "check character does not match" in errors[0]
    assert errors[1] == (f"error: nothing was recorded: the {len(LABS)} forms are recorded "
                         "together or not at all; fix the forms named above and receive them "
                         "again (or receive the good ones on their own)")
    assert nothing_recorded(planned)


def test_a_disk_that_fails_while_the_copies_are_flushed_records_nothing(planned, runner,
                                                                        tmp_path, monkeypatch):
    forms = _all_forms(planned, tmp_path)
    real_fsync = os.fsync
    lock, seen = threading.Lock(), []

    def failing(fd):
        with lock:
            seen.append(fd)
            third = len(seen) == 3
        if third:  # a full disk may say so only when the data is flushed
            raise OSError(errno.ENOSPC, "No space left on device")
        return real_fsync(fd)

    monkeypatch.setattr(os, "fsync", failing)
    result = receive(runner, planned, *forms)
    monkeypatch.setattr(os, "fsync", real_fsync)  # (undo would also reset the clock)
    assert len(seen) >= 3
    assert result.exit_code == 2
    line, said = result.stderr.strip().splitlines()
    assert said.startswith(f"error: nothing was recorded: the {len(LABS)} forms are recorded")
    staging = plan.round_dir(planned, ROUND) / returns.STAGING_DIR
    assert line.startswith(f"error: {staging}/")
    assert line.endswith(".csv: no space left on the disk; free some space and run the "
                         "command again")
    assert nothing_recorded(planned)
    assert _temporary(plan.round_dir(planned, ROUND)) == []
    # and the same forms go in whole afterwards
    result = receive(runner, planned, *forms)
    assert result.exit_code == 0, result.stderr
    assert result.stdout.count("recorded version 1") == len(LABS)


def test_many_forms_killed_before_the_commit_leave_the_ledger_as_it_was(planned, runner,
                                                                         tmp_path):
    # The subprocess runs on the real clock: the test dates stay empty.
    forms = _all_forms(planned, tmp_path, day="")
    before, _ = ledger_snapshot(planned)
    kill_receive_while_paused(planned, forms, "before-commit")
    after, stored = ledger_snapshot(planned)
    assert after == before and not stored  # (receive makes results/ before it records)
    staging = plan.round_dir(planned, ROUND) / returns.STAGING_DIR
    # the copies were whole on disk before the commit would have come
    assert sorted(p.read_bytes() for p in staging.iterdir()) == sorted(
        p.read_bytes() for p in forms)
    result = receive(runner, planned, *forms)
    assert result.exit_code == 0, result.stderr
    assert result.stdout.count("recorded version 1") == len(LABS)
    assert not any(staging.iterdir())


def test_many_forms_killed_after_the_commit_are_completed_by_the_next_receive(
        planned, runner, tmp_path):
    forms = _all_forms(planned, tmp_path, day="")
    kill_receive_while_paused(planned, forms[:-1], "after-commit")
    results = plan.round_dir(planned, ROUND) / "results"
    assert not results.exists() or not any(results.glob("receipt-*"))
    assert receive(runner, planned, forms[-1]).exit_code == 0
    for path in forms:
        sha = hashlib.sha256(path.read_bytes()).hexdigest()
        assert (results / f"{sha}.csv").read_bytes() == path.read_bytes()
    assert sorted(p.name for p in results.glob("receipt-*")) == sorted(
        f"receipt-{lab}-v1.txt" for lab in LABS)


# --- files.write_many ----------------------------------------------------------------------

def _targets(study, count=6):
    folder = study / "rounds" / ROUND / "results"
    return [(folder / f"f{i}.txt", f"file {i}\n".encode() * (i + 1)) for i in range(count)]


def test_write_many_writes_each_file_whole_with_its_rights(study):
    items = _targets(study)
    assert files.write_many(items, root=study, private=True, read_only=True) == [
        p for p, _ in items]
    for path, data in items:
        assert path.read_bytes() == data
        assert path.stat().st_mode & 0o777 == 0o400
    assert (study / "rounds" / ROUND / "results").stat().st_mode & 0o777 == 0o700
    assert _temporary(study) == []


def test_write_many_replaces_files_whole(study):
    items = _targets(study, 3)
    files.write_many(items, root=study, private=True)
    again = [(path, b"new " + data) for path, data in items]
    files.write_many(again, root=study, private=True)
    assert [p.read_bytes() for p, _ in items] == [data for _, data in again]


def test_write_many_refuses_a_link_in_the_way_before_writing_anything(study, tmp_path):
    items = _targets(study)
    outside = tmp_path / "outside.txt"
    outside.write_text("theirs\n", encoding="utf-8")
    items[0][0].parent.mkdir(parents=True)
    items[4][0].symlink_to(outside)
    with pytest.raises(PlannerError, match="is a symbolic link"):
        files.write_many(items, root=study, private=True)
    assert outside.read_text(encoding="utf-8") == "theirs\n"
    assert sorted(p.name for p in items[0][0].parent.iterdir()) == ["f4.txt"]


def test_write_many_on_a_full_disk_names_the_file_and_leaves_no_temporary_file(
        study, monkeypatch):
    items = _targets(study)
    files.write_many(items[:2], root=study, private=True)  # files that were there before

    def full(fd):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "fsync", full)
    with pytest.raises(PlannerError) as caught:
        files.write_many([(p, b"changed") for p, _ in items], root=study, private=True)
    monkeypatch.undo()
    assert str(caught.value) == (f"{items[0][0]}: no space left on the disk; free some space "
                                 "and run the command again")
    assert [p.read_bytes() for p, _ in items[:2]] == [d for _, d in items[:2]]
    assert not any(p.exists() for p, _ in items[2:])
    assert _temporary(study) == []
