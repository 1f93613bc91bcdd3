"""The round folder under a careless coordinator or a hostile participant, through the CLI.

Links planted where ringplan writes, round ids that are paths, a read-only or full disk,
temporary files of a killed command: each is one line on stderr with exit status 2 (or,
for leftovers, a line in ``status``), and nothing is written through a link, outside the
study folder or half-way. After a whole round the key, the host's documents, the returned
forms and the report are the owner's alone.
"""

from __future__ import annotations

import errno
import hashlib
import os
import stat
import subprocess
import sys

import pytest
from conftest import (LABS, ROUND, filled, homogeneity_filled, nothing_recorded, receive, run_cli,
                      write)

from planner import files, plan
from planner.ledger import Ledger

BAD_IDS = ["../../x", "", "a/b", "/abs", ".."]
LINK = "is a symbolic link; ringplan writes only real files inside the study folder; remove the link"


@pytest.fixture
def umask():
    old = os.umask(0o022)
    yield 0o022
    os.umask(old)


def _mode(path):
    return stat.S_IMODE(os.lstat(path).st_mode)


def _tree(folder):
    """Every path under ``folder`` with its kind, mode and content digest."""
    out = {}
    for path in sorted(folder.rglob("*")):
        info = os.lstat(path)
        digest = (hashlib.sha256(path.read_bytes()).hexdigest()
                  if stat.S_ISREG(info.st_mode) else os.readlink(path)
                  if stat.S_ISLNK(info.st_mode) else "")
        out[path.relative_to(folder).as_posix()] = (stat.S_IFMT(info.st_mode),
                                                    stat.S_IMODE(info.st_mode), digest)
    return out


def _one_line(result):
    assert result.exit_code == 2, (result.stdout, result.stderr)
    assert "Traceback" not in result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, lines
    return lines[0]


_CHECK_FORMS = ["homogeneity-form.csv", "homogeneity-form.xlsx", "stability-form.csv",
                "stability-form.xlsx"]  # the host's check forms, written by plan


def _dead_pid():
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


def _events(study_dir, kind):
    with Ledger.open(study_dir) as ledger:
        return ledger.events(ROUND, kind)


def _flat(text):
    return " ".join(text.split())  # the status console wraps long lines


# --- a whole round: who may read what ------------------------------------------------------

def test_after_a_whole_round_the_private_files_are_the_owners_alone(example_dir, runner,
                                                                    passphrase, clock, umask,
                                                                    tmp_path):
    def ok(*args):
        result = run_cli(runner, *args)
        assert result.exit_code == 0, (args, result.stdout, result.stderr)

    ok("plan", example_dir, "--round", ROUND, "--host", "kal")
    ok("homogeneity", example_dir, "--round", ROUND,
       write(tmp_path, "homogeneity.csv", homogeneity_filled(example_dir)))
    ok("print", example_dir, "--round", ROUND)
    forms = [write(tmp_path, f"{lab}.csv", filled(example_dir, lab)) for lab in LABS]
    assert receive(runner, example_dir, *forms).exit_code == 0
    ok("unseal", example_dir, "--round", ROUND)
    ok("evaluate", example_dir, "--round", ROUND)
    folder = plan.round_dir(example_dir, ROUND)

    for name in ("host", "labs", "results", ".intake", "report"):
        assert _mode(folder / name) == 0o700, name
    host = sorted(p.name for p in (folder / "host").iterdir())
    # checks/: the filled check forms as recorded
    assert host == sorted([*_CHECK_FORMS, "checks", "labels.pdf", "prep-sheet.pdf"])
    report = sorted(p.name for p in (folder / "report").iterdir())
    assert {f"letter-{lab}.pdf" for lab in LABS} <= set(report) and "report.pdf" in report
    for path in [*(folder / "host").rglob("*"), *(folder / "report").iterdir(),
                 folder / "key.sealed", folder / "key.json"]:
        assert _mode(path) == (0o700 if path.is_dir() else 0o600), path
    stored = sorted((folder / "results").iterdir())
    assert len([p for p in stored if p.suffix == ".csv"]) == len(LABS)
    for path in stored:  # the forms as received are read-only as well
        assert _mode(path) == (0o400 if path.suffix == ".csv" else 0o600), path

    # labs/: each laboratory's documents carry its submission token, for it alone
    documents = list((folder / "labs").rglob("*"))
    assert len([p for p in documents if p.suffix == ".pdf"]) == 2 * len(LABS)
    for path in documents:
        assert _mode(path) == (0o700 if path.is_dir() else 0o600), path
    for path in (folder / "manifest.json", folder / "key.fingerprint"):
        assert _mode(path) == 0o644, path
    assert not [p for p in example_dir.rglob("*") if p.name.endswith(files.TEMP_SUFFIX)]


# --- links planted in the round folder ------------------------------------------------------

def test_print_refuses_a_host_folder_that_is_a_link(planned, runner, passphrase, tmp_path):
    outside = tmp_path / "outside"
    host = plan.round_dir(planned, ROUND) / "host"
    host.rename(outside)  # plan's check forms move with it: only a link is left
    host.symlink_to(outside, target_is_directory=True)
    inside = sorted(p.name for p in outside.iterdir())
    before = _tree(planned)
    line = _one_line(run_cli(runner, "print", planned, "--round", ROUND))
    assert line == f"error: {host}: {LINK}"
    assert sorted(p.name for p in outside.iterdir()) == inside
    assert _tree(planned) == before
    assert _events(planned, "printed") == []  # refused before the key was used


@pytest.mark.parametrize("args", [[], ["--only", "runsheets", "--lab", "kal"]],
                         ids=["everything", "one-run-sheet"])
def test_print_refuses_a_document_that_is_a_link_to_an_outside_file(planned, runner,
                                                                     passphrase, tmp_path,
                                                                     args):
    outside = tmp_path / "bashrc"
    outside.write_text("alias ls='ls -F'\n", encoding="utf-8")
    link = plan.round_dir(planned, ROUND) / "labs" / "kal" / "run-sheet.pdf"
    link.symlink_to(outside)
    before = _tree(planned)
    line = _one_line(run_cli(runner, "print", planned, "--round", ROUND, *args))
    assert line == f"error: {link}: {LINK}"
    assert outside.read_text(encoding="utf-8") == "alias ls='ls -F'\n"
    assert _tree(planned) == before


def test_receive_refuses_a_results_folder_that_is_a_link(planned, runner, tmp_path):
    outside = tmp_path / "outside"
    outside.mkdir()
    results = plan.round_dir(planned, ROUND) / "results"
    results.symlink_to(outside, target_is_directory=True)
    form = write(tmp_path, "kal.csv", filled(planned, "kal"))
    line = _one_line(receive(runner, planned, form))
    assert line == f"error: {results}: {LINK}"
    assert list(outside.iterdir()) == []
    assert nothing_recorded(planned)


def test_unseal_refuses_a_key_file_that_is_a_link(planned, runner, passphrase, tmp_path):
    outside = tmp_path / "published.json"
    outside.write_text("{}\n", encoding="utf-8")
    key = plan.round_dir(planned, ROUND) / "key.json"
    key.symlink_to(outside)
    line = _one_line(run_cli(runner, "unseal", planned, "--round", ROUND, "--force",
                             "--reason", "drill"))
    assert line == f"error: {key}: {LINK}"
    assert outside.read_text(encoding="utf-8") == "{}\n"
    assert _events(planned, "unsealed") == []  # the opening was not recorded either


# --- round ids that are paths ---------------------------------------------------------------

COMMANDS = {
    "status": [], "print": [], "unseal": [], "verify": [], "evaluate": [],
    "receive": ["{form}"], "spare": ["--lab", "kal", "--damaged", "K7QM-4X9PA"],
    "plan": ["--host", "kal"],
}


@pytest.mark.parametrize("bad", BAD_IDS, ids=["dotdot", "empty", "slash", "absolute", "up"])
@pytest.mark.parametrize("command", sorted(COMMANDS))
def test_a_round_id_that_is_a_path_is_one_line(planned, runner, passphrase, tmp_path,
                                                command, bad):
    form = write(tmp_path, "kal.csv", filled(planned, "kal"))
    before = _tree(tmp_path)
    extra = [a.format(form=form) for a in COMMANDS[command]]
    line = _one_line(run_cli(runner, command, planned, "--round", bad, *extra))
    assert line == (f"error: --round {bad!r} is not a usable round id; use letters, digits, "
                    "'-', '_' or '.', e.g. 2027-1")
    assert _tree(tmp_path) == before


def test_the_library_refuses_a_round_id_that_is_a_path(planned):
    from planner.errors import PlannerError

    with pytest.raises(PlannerError, match="'../x' is not a usable round id"):
        plan.round_dir(planned, "../x")


# --- a disk that refuses ----------------------------------------------------------------------

@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_plan_in_a_read_only_study_folder_is_one_line(example_dir, runner, passphrase):
    os.chmod(example_dir, 0o555)
    try:
        line = _one_line(run_cli(runner, "plan", example_dir, "--round", ROUND, "--host", "kal"))
    finally:
        os.chmod(example_dir, 0o755)
    assert line.startswith(f"error: {example_dir / 'ledger.sqlite'}: the ledger cannot be "
                           "written here")
    assert sorted(p.name for p in example_dir.iterdir()) == ["study.yaml"]


@pytest.mark.skipif(os.geteuid() == 0, reason="root writes into read-only folders")
def test_print_in_a_read_only_study_folder_is_one_line(planned, runner, passphrase):
    before = _tree(planned)
    folders = [planned, *(p for p in planned.rglob("*") if p.is_dir())]
    for folder in folders:
        os.chmod(folder, 0o555)
    try:
        line = _one_line(run_cli(runner, "print", planned, "--round", ROUND))
    finally:
        for folder in folders:
            os.chmod(folder, 0o755)
    assert line.startswith("error: ")
    assert _tree(planned) == before


def _refuse_mkdir(monkeypatch, target, code: int, text: str) -> None:
    """Make os.mkdir of ``target`` fail as the disk would, with errno ``code``."""
    real_mkdir = os.mkdir

    def refused(path, mode=0o777, **kw):
        if os.fspath(path) == os.fspath(target):
            raise OSError(code, text, os.fspath(path))
        return real_mkdir(path, mode, **kw)

    monkeypatch.setattr(os, "mkdir", refused)


def test_print_where_the_host_folder_cannot_be_made_is_one_line(planned, runner, passphrase,
                                                                monkeypatch):
    # what a read-only round folder does to print, for root as well: mkdir is refused
    folder = plan.round_dir(planned, ROUND)
    _refuse_mkdir(monkeypatch, folder / "host", errno.EACCES, "Permission denied")
    before = _tree(folder)
    line = _one_line(run_cli(runner, "print", planned, "--round", ROUND))
    assert line == (f"error: {folder / 'host'}: permission denied; the study folder and its "
                    "files must be writable by you (or work on a copy of the study folder)")
    assert _tree(folder) == before


def test_plan_where_rounds_cannot_be_made_records_nothing(example_dir, runner, passphrase,
                                                          monkeypatch):
    _refuse_mkdir(monkeypatch, example_dir / "rounds", errno.EROFS, "Read-only file system")
    line = _one_line(run_cli(runner, "plan", example_dir, "--round", ROUND, "--host", "kal"))
    assert line == (f"error: {example_dir / 'rounds'}: the disk is read-only; work on a copy "
                    "of the study folder on a writable disk")
    with Ledger.open(example_dir) as ledger:
        assert ledger.current_round(ROUND) is None
    assert not (example_dir / "rounds").exists()


def _full_disk(monkeypatch, name):
    def full(*args):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, name, full)


def test_plan_on_a_full_disk_leaves_no_round_and_no_temporary_file(example_dir, runner,
                                                                   passphrase, monkeypatch):
    _full_disk(monkeypatch, "write")
    result = run_cli(runner, "plan", example_dir, "--round", ROUND, "--host", "kal")
    monkeypatch.undo()
    line = _one_line(result)
    assert line.startswith(f"error: {example_dir / 'rounds'}/.{ROUND}.")
    assert line.endswith("/manifest.json: no space left on the disk; free some space and run "
                         "the command again")
    assert sorted(p.name for p in (example_dir / "rounds").iterdir()) == []
    with Ledger.open(example_dir) as ledger:
        assert ledger.current_round(ROUND) is None


def test_print_on_a_full_disk_leaves_no_half_document(planned, runner, passphrase, monkeypatch):
    folder = plan.round_dir(planned, ROUND)
    _full_disk(monkeypatch, "fsync")  # a full disk may only say so when the data is flushed
    result = run_cli(runner, "print", planned, "--round", ROUND)
    monkeypatch.undo()
    line = _one_line(result)
    assert line == (f"error: {folder / 'host' / 'labels.pdf'}: no space left on the disk; free "
                    "some space and run the command again")
    assert sorted(p.name for p in (folder / "host").iterdir()) == _CHECK_FORMS  # plan's


def test_receive_on_a_full_disk_records_nothing(planned, runner, tmp_path, monkeypatch):
    form = write(tmp_path, "kal.csv", filled(planned, "kal"))
    _full_disk(monkeypatch, "write")
    result = receive(runner, planned, form)
    monkeypatch.undo()
    assert _one_line(result).endswith(": no space left on the disk; free some space and run "
                                      "the command again")
    assert nothing_recorded(planned)


@pytest.mark.parametrize("code,status", [(errno.EACCES, 2), (errno.EBADF, 1)],
                         ids=["user-cause", "bug"])
def test_only_the_os_errors_a_user_causes_are_one_line(example_dir, runner, monkeypatch,
                                                       code, status):
    from planner import overview

    def failing(*args, **kwargs):
        raise OSError(code, os.strerror(code), str(example_dir / "x"))

    monkeypatch.setattr(overview, "summarize", failing)
    result = run_cli(runner, "check", example_dir)
    assert result.exit_code == status
    if status == 2:
        assert _one_line(result) == (f"error: {example_dir / 'x'}: permission denied; the "
                                     "study folder and its files must be writable by you (or "
                                     "work on a copy of the study folder)")
    else:
        assert isinstance(result.exception, OSError)  # our bug: it keeps its traceback


# --- what a killed command left ---------------------------------------------------------------

def test_status_removes_and_names_the_temporary_files_of_a_killed_print(planned, runner):
    folder = plan.round_dir(planned, ROUND)
    dead = _dead_pid()
    killed = folder / "host" / f".labels.pdf.{dead}.a1b2c3{files.TEMP_SUFFIX}"
    legacy = folder / "labs" / "tor" / f".run-sheet.pdf.{dead}.tmp"
    running = folder / "labs" / "kal" / f".run-sheet.pdf.{os.getpid()}.d4e5f6{files.TEMP_SUFFIX}"
    for path in (killed, legacy, running):
        path.write_bytes(b"%PDF-1.4 half")
    result = run_cli(runner, "status", planned, "--round", ROUND)
    assert result.exit_code == 0, result.stderr
    text = _flat(result.stdout)
    assert (f"removed 2 temporary files left by a stopped command: "
            f"host/{killed.name}, labs/tor/{legacy.name}") in text
    assert ("left in place 1 temporary file (its command is still running, or it cannot be "
            f"removed): labs/kal/{running.name} (process {os.getpid()})") in text
    assert not killed.exists() and not legacy.exists() and running.exists()


def test_status_json_says_what_was_left(planned, runner):
    import json

    folder = plan.round_dir(planned, ROUND)
    staged = folder / ".intake" / "0123abcd.csv"
    staged.parent.mkdir()
    staged.write_bytes(b"form")
    result = run_cli(runner, "status", planned, "--round", ROUND, "--json")
    assert result.exit_code == 0, result.stderr
    assert json.loads(result.stdout)["leftovers"] == {
        "removed": [], "kept": [], "intake": [".intake/0123abcd.csv"]}
    text = _flat(run_cli(runner, "status", planned, "--round", ROUND).stdout)
    assert ("1 form staged by a receive that was stopped or is running: .intake/0123abcd.csv; "
            "the next 'ringplan receive' records or removes them") in text
    assert staged.exists()  # the next receive decides, not status


def test_the_next_print_removes_what_a_killed_print_left(planned, runner, passphrase):
    folder = plan.round_dir(planned, ROUND)
    dead = _dead_pid()
    leftover = folder / "labs" / "tor" / f".run-sheet.pdf.{dead}.a1b2c3{files.TEMP_SUFFIX}"
    leftover.write_bytes(b"%PDF-1.4 half")
    result = run_cli(runner, "print", planned, "--round", ROUND, "--only", "packing",
                     "--lab", "hel")
    assert result.exit_code == 0, result.stderr
    assert not leftover.exists()
    assert (folder / "labs" / "hel" / "packing-list.pdf").is_file()
