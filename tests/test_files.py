"""Writing inside a study folder: whole files, no links followed, owner-only where private.

Each test builds a small study folder by hand (``study.yaml`` marks it), writes through
``planner.files`` and looks at the disk with ``os.lstat``: what a careless coordinator or
a hostile participant could have put in the way is refused without a byte going through.
"""

from __future__ import annotations

import errno
import os
import stat
import subprocess
import sys
from pathlib import Path

import pytest

from planner import evaluate, files, plan, returns, seal
from planner.errors import PlannerError
from planner.ledger import LEDGER_NAME

ROUND = "2027-1"


def _mode(path):
    return stat.S_IMODE(os.lstat(path).st_mode)


def _temps(folder):
    return sorted(p.name for p in Path(folder).rglob(f"*{files.TEMP_SUFFIX}"))


def _dead_pid():
    child = subprocess.Popen([sys.executable, "-c", "pass"])
    child.wait()
    return child.pid


# --- writing -----------------------------------------------------------------------------

def test_a_private_file_and_its_folders_are_owner_only(study):
    target = study / "rounds" / ROUND / "host" / "prep-sheet.pdf"
    old = os.umask(0o022)
    try:
        assert files.write_bytes(target, b"%PDF", root=study, private=True) == target
    finally:
        os.umask(old)
    assert target.read_bytes() == b"%PDF"
    assert _mode(target) == 0o600
    assert _mode(target.parent) == 0o700
    # the round folder and rounds/ hold the participants' documents too: not narrowed
    assert _mode(study / "rounds" / ROUND) == _mode(study / "rounds") == 0o755
    assert _temps(study) == []


def test_a_public_file_follows_the_umask_and_is_not_executable(study):
    old = os.umask(0o022)
    try:
        target = files.write_text(study / "rounds" / ROUND / "notes" / "form.csv",
                                  "a;b\n", root=study, private=False)
    finally:
        os.umask(old)
    assert target.read_text(encoding="utf-8") == "a;b\n"
    assert _mode(target) == 0o644


def test_read_only_takes_the_write_bits_away(study):
    target = study / "rounds" / ROUND / ".intake" / "abc.csv"
    files.write_bytes(target, b"x", root=study, private=True, read_only=True)
    assert _mode(target) == 0o400


def test_a_file_is_replaced_whole(study):
    target = study / "manifest.json"
    files.write_text(target, "old\n", root=study, private=False)
    files.write_text(target, "new\n", root=study, private=False)
    assert target.read_text(encoding="utf-8") == "new\n"
    assert sorted(p.name for p in study.iterdir()) == ["manifest.json", "study.yaml"]


def test_a_wider_private_folder_from_before_is_narrowed(study):
    host = study / "rounds" / ROUND / "host"
    host.mkdir(parents=True)
    os.chmod(host, 0o755)
    files.write_bytes(host / "labels.pdf", b"x", root=study, private=True)
    assert _mode(host) == 0o700


def test_a_writer_that_makes_the_file_anew_still_gives_an_owner_only_file(study):
    def write(temp):
        temp.unlink()
        temp.write_bytes(b"made again")
        os.chmod(temp, 0o644)

    target = files.write_atomic(study / "rounds" / ROUND / "report" / "report.pdf", write,
                                root=study, private=True)
    assert (target.read_bytes(), _mode(target)) == (b"made again", 0o600)


def test_a_writer_that_fails_leaves_the_old_file_and_no_temporary_file(study):
    target = files.write_text(study / "key.fingerprint", "abc\n", root=study, private=False)

    def write(temp):
        temp.write_bytes(b"half")
        raise RuntimeError("the writer broke")

    with pytest.raises(RuntimeError):
        files.write_atomic(target, write, root=study, private=False)
    assert target.read_text(encoding="utf-8") == "abc\n"
    assert _temps(study) == []


def test_the_study_folder_itself_may_be_reached_through_a_link(tmp_path, study):
    alias = tmp_path / "alias"
    alias.symlink_to(study)
    files.write_text(alias / "rounds" / ROUND / "manifest.json", "{}", root=alias,
                     private=False)
    assert (study / "rounds" / ROUND / "manifest.json").read_text(encoding="utf-8") == "{}"


def test_a_path_outside_the_study_folder_is_our_bug(study, tmp_path):
    with pytest.raises(ValueError):
        files.write_text(tmp_path / "elsewhere.txt", "x", root=study, private=False)
    with pytest.raises(ValueError):
        files.write_text(study / ".." / "elsewhere.txt", "x", root=study, private=False)
    assert not (tmp_path / "elsewhere.txt").exists()


# --- what stands in the way ----------------------------------------------------------------

def test_a_link_to_an_outside_file_is_refused_and_the_file_is_unchanged(study, tmp_path):
    outside = tmp_path / "bashrc"
    outside.write_text("export PATH=/usr/bin\n", encoding="utf-8")
    link = study / "rounds" / ROUND / "labs" / "kal" / "run-sheet.pdf"
    link.parent.mkdir(parents=True)
    link.symlink_to(outside)
    with pytest.raises(PlannerError) as caught:
        files.write_bytes(link, b"%PDF", root=study, private=False)
    assert str(caught.value) == (f"{link}: is a symbolic link; ringplan writes only real files "
                                 "inside the study folder; remove the link")
    assert outside.read_text(encoding="utf-8") == "export PATH=/usr/bin\n"
    assert link.is_symlink() and _temps(study) == []


@pytest.mark.parametrize("linked", ["rounds", f"rounds/{ROUND}", f"rounds/{ROUND}/host"])
def test_a_linked_folder_on_the_way_is_refused_and_nothing_goes_through(study, tmp_path,
                                                                         linked):
    outside = tmp_path / "outside"
    outside.mkdir()
    link = study / linked
    link.parent.mkdir(parents=True, exist_ok=True)
    link.symlink_to(outside, target_is_directory=True)
    target = study / "rounds" / ROUND / "host" / "labels.pdf"
    with pytest.raises(PlannerError, match="is a symbolic link") as caught:
        files.write_bytes(target, b"%PDF", root=study, private=True)
    assert caught.value.where.file == str(link)
    assert list(outside.rglob("*")) == []


def test_a_dangling_link_where_a_folder_goes_is_refused(study, tmp_path):
    link = study / "rounds"
    link.symlink_to(tmp_path / "nowhere")
    with pytest.raises(PlannerError, match="is a symbolic link"):
        files.make_folders(study / "rounds" / ROUND, root=study)
    assert not (tmp_path / "nowhere").exists()


def test_a_file_where_a_folder_goes_is_named(study):
    (study / "rounds").write_text("oops", encoding="utf-8")
    with pytest.raises(PlannerError) as caught:
        files.write_bytes(study / "rounds" / ROUND / "key.sealed", b"x", root=study,
                          private=True)
    assert str(caught.value) == (f"{study / 'rounds'}: is a file where ringplan needs a "
                                 "folder; move it away and run the command again")


def test_a_folder_where_a_file_goes_is_named(study):
    (study / "rounds" / ROUND / "key.json").mkdir(parents=True)
    with pytest.raises(PlannerError, match="is a folder where ringplan writes a file"):
        files.write_bytes(study / "rounds" / ROUND / "key.json", b"{}", root=study,
                          private=True)


def test_check_paths_makes_nothing(study, tmp_path):
    files.check_paths([study / "rounds" / ROUND / "host" / "labels.pdf"], root=study)
    assert sorted(p.name for p in study.iterdir()) == ["study.yaml"]
    (study / "rounds").symlink_to(tmp_path, target_is_directory=True)
    with pytest.raises(PlannerError, match="is a symbolic link"):
        files.check_paths([study / "rounds" / ROUND / "host" / "labels.pdf"], root=study)


# --- what the disk refuses -----------------------------------------------------------------

def test_no_space_left_is_one_error_and_leaves_no_temporary_file(study, monkeypatch):
    target = files.write_text(study / "manifest.json", "old\n", root=study, private=False)

    def full(fd, data):
        raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(os, "write", full)
    with pytest.raises(PlannerError) as caught:
        files.write_text(target, "new\n", root=study, private=False)
    assert str(caught.value) == (f"{target}: no space left on the disk; free some space and "
                                 "run the command again")
    monkeypatch.undo()
    assert target.read_text(encoding="utf-8") == "old\n"
    assert _temps(study) == []


@pytest.mark.parametrize("code,expected", [
    (errno.EACCES, ("permission denied; the study folder and its files must be writable by "
                    "you (or work on a copy of the study folder)")),
    (errno.EROFS, ("the disk is read-only; work on a copy of the study folder on a writable "
                   "disk")),
], ids=["permission", "read-only"])
def test_a_folder_that_refuses_writing_is_one_error(study, monkeypatch, code, expected):
    real_open = os.open

    def refusing(path, flags, mode=0o777, **kw):
        if str(path).endswith(files.TEMP_SUFFIX) and flags & os.O_CREAT:
            raise OSError(code, os.strerror(code), str(path))
        return real_open(path, flags, mode, **kw)

    monkeypatch.setattr(os, "open", refusing)
    target = study / "rounds" / ROUND / "key.sealed"
    with pytest.raises(PlannerError) as caught:
        files.write_bytes(target, b"x", root=study, private=True)
    assert str(caught.value) == f"{target}: {expected}"
    assert not target.exists()


def test_explain_names_the_file_in_the_way(study):
    (study / "rounds").write_text("", encoding="utf-8")
    path = study / "rounds" / ROUND / "manifest.json"
    error = files.explain(OSError(errno.ENOTDIR, "Not a directory", str(path)))
    assert error.where.file == str(study / "rounds")
    assert "is a file where ringplan needs a folder" in error.message


# --- where a file belongs ------------------------------------------------------------------

@pytest.mark.parametrize("relative,private", [
    ("host/labels.pdf", True), ("host/prep-sheet.pdf", True),
    ("results/abc.csv", True), ("results/receipt-kal-v1.txt", True),
    (".intake/abc.csv", True), ("report/letter-kal.pdf", True),
    ("report/statistics.json", True), ("key.sealed", True), ("key.host.sealed", True),
    ("key.json", True), ("key.fingerprint", False), ("manifest.json", False),
    ("labs/kal/run-sheet.pdf", True), ("labs/kal/result-form.csv", True),
    ("labs/host/labels.pdf", True),
])
def test_what_is_private_in_a_round_folder(relative, private):
    assert files.is_private(relative) is private


def test_placement_finds_the_study_folder_and_the_privacy(study):
    assert files.placement(study / "rounds" / ROUND / "host" / "labels.pdf") == (study, True)
    assert files.placement(study / "rounds" / ROUND / "labs" / "kal" / "x.pdf") == (study, True)
    assert files.placement(study / "rounds" / ROUND / "manifest.json") == (study, False)
    assert files.placement(study / "rounds" / ROUND / "key.json") == (study, True)
    assert files.placement(study / "history.pdf") == (study, False)


def test_placement_with_folders_named_rounds(tmp_path):
    # the study lies below a folder called rounds, and its round is called rounds too
    study = tmp_path / "rounds" / "s"
    study.mkdir(parents=True)
    (study / LEDGER_NAME).write_bytes(b"")
    path = study / "rounds" / "rounds" / "host" / "labels.pdf"
    assert files.placement(path) == (study, True)


def test_the_layout_names_are_the_modules_names():
    from planner import spec, status

    for folder in (returns.RESULTS_DIR, returns.STAGING_DIR, evaluate.REPORT_DIR,
                   status.HOST_FOLDER.rstrip("/")):
        assert files.is_private(f"{folder}/{evaluate.letter_name('kal')}"), folder
    for name in (seal.SEALED_NAME, plan.HOST_SEALED_NAME, seal.KEY_NAME):
        assert files.is_private(name)
    assert not files.is_private(seal.FINGERPRINT_NAME)
    assert not files.is_private(plan.MANIFEST_NAME)
    assert (spec.SPEC_NAME, LEDGER_NAME) == files._STUDY_MARKERS


# --- leftovers -------------------------------------------------------------------------------

def test_leftovers_of_dead_processes_are_removed_and_live_ones_kept(study):
    folder = study / "rounds" / ROUND
    dead, live = _dead_pid(), os.getpid()
    (folder / "host").mkdir(parents=True)
    (folder / "labs" / "kal").mkdir(parents=True)
    (folder / ".intake").mkdir()
    stale = folder / "host" / f".labels.pdf.{dead}.a1b2c3{files.TEMP_SUFFIX}"
    legacy = folder / "labs" / "kal" / f".run-sheet.pdf.{dead}.tmp"
    running = folder / "host" / f".prep-sheet.pdf.{live}.d4e5f6{files.TEMP_SUFFIX}"
    staged = folder / ".intake" / f".abc.csv.{dead}.a1b2c3{files.TEMP_SUFFIX}"
    ours = [folder / "labs" / "kal" / "run-sheet.pdf", folder / ".hidden.txt",
            folder / "labs" / "kal" / ".x.tmp", folder / "labs" / "kal" / ".x.12ab.tmp"]
    for path in (stale, legacy, running, staged, *ours):
        path.write_bytes(b"")
    found = files.find_leftovers(folder)
    assert [(x.path, x.pid) for x in found] == [(stale, dead), (running, live), (legacy, dead)]
    removed, kept = files.remove_stale(folder)
    assert [x.path for x in removed] == [stale, legacy]
    assert [x.path for x in kept] == [running]
    assert not stale.exists() and not legacy.exists()
    assert running.exists() and staged.exists() and all(p.exists() for p in ours)


def test_a_round_folder_that_does_not_exist_has_no_leftovers(study):
    assert files.remove_stale(study / "rounds" / "nothing") == ([], [])


def test_process_alive():
    assert files.process_alive(os.getpid())
    assert not files.process_alive(_dead_pid())
    assert not files.process_alive(0)
    assert not files.process_alive(2**70)


def test_placement_without_a_study_takes_no_folder_above_the_file(tmp_path):
    # no study.yaml or ledger anywhere: the user's folders above are none of ours to judge
    path = tmp_path / "rounds" / "a" / "b" / "calibration-roll.pdf"
    assert files.placement(path) == (path.parent, False)
    host = tmp_path / "rounds" / ROUND / "host" / "labels.pdf"
    assert files.placement(host) == (host.parent, True)
