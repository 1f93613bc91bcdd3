"""files.stage and files.settle: documents made one by one (perhaps in other processes) and
put in place together, each whole or as it was.

The attacks are a careless run's: a disk that fails while the files are flushed, and a
link planted at a target between the making and the renaming.
"""

from __future__ import annotations

import errno
import os
import stat

import pytest

from planner import files
from planner.errors import PlannerError


def _targets(study, count=5):
    folder = study / "rounds" / "R1" / "report"
    return [folder / f"letter-L{i}.pdf" for i in range(count)]


def _stage_all(study, paths, text):
    def writer(body):
        return lambda temp: temp.write_bytes(body)
    return [(p, files.stage(p, writer(f"{text} {p.name}\n".encode()), root=study, private=True))
            for p in paths]


def _temporary(folder):
    return sorted(p.name for p in folder.rglob(f"*{files.TEMP_SUFFIX}"))


def test_staged_files_change_nothing_until_they_are_settled(study):
    paths = _targets(study)
    files.write_many([(p, b"old\n") for p in paths[:2]], root=study, private=True)
    staged = _stage_all(study, paths, "new")
    assert [p.read_bytes() for p in paths[:2]] == [b"old\n", b"old\n"]
    assert not any(p.exists() for p in paths[2:])
    assert all(stat.S_IMODE(temp.stat().st_mode) == 0o600 for _, temp in staged)
    assert files.settle(staged, root=study) == paths
    assert [p.read_bytes() for p in paths] == [f"new {p.name}\n".encode() for p in paths]
    assert all(stat.S_IMODE(p.stat().st_mode) == 0o600 for p in paths)
    assert _temporary(study) == []


def test_a_disk_that_fails_during_the_flush_leaves_every_target_as_it_was(study, monkeypatch):
    paths = _targets(study)
    files.write_many([(p, b"old\n") for p in paths], root=study, private=True)
    staged = _stage_all(study, paths, "new")
    real, seen = os.fsync, []

    def failing(fd):
        seen.append(fd)
        if len(seen) == 3:
            raise OSError(errno.ENOSPC, "No space left on device")
        return real(fd)

    monkeypatch.setattr(os, "fsync", failing)
    with pytest.raises(PlannerError) as caught:
        files.settle(staged, root=study)
    monkeypatch.undo()
    # the flushes run side by side: which file's flush was third is not fixed
    assert str(caught.value).endswith(": no space left on the disk; free some space and run "
                                      "the command again")
    assert str(caught.value).split(":")[0] in {str(p) for p in paths}
    assert [p.read_bytes() for p in paths] == [b"old\n"] * len(paths)
    assert _temporary(study) == []


def test_a_link_planted_at_a_target_before_the_renames_is_refused(study, tmp_path):
    paths = _targets(study)
    staged = _stage_all(study, paths, "new")
    outside = tmp_path / "outside.txt"
    outside.write_text("theirs\n", encoding="utf-8")
    paths[3].symlink_to(outside)
    with pytest.raises(PlannerError, match="is a symbolic link"):
        files.settle(staged, root=study)
    assert outside.read_text(encoding="utf-8") == "theirs\n"
    assert not any(p.exists() for i, p in enumerate(paths) if i != 3)
    assert _temporary(study) == []


def test_write_atomic_is_a_stage_and_a_settle(study, monkeypatch):
    # one file: the same guarantees, the flush before the rename
    path = _targets(study, 1)[0]
    order = []
    real_fsync, real_replace = os.fsync, os.replace
    monkeypatch.setattr(os, "fsync", lambda fd: (order.append("fsync"), real_fsync(fd))[1])
    monkeypatch.setattr(os, "replace", lambda a, b: (order.append("rename"), real_replace(a, b))[1])
    files.write_atomic(path, lambda temp: temp.write_bytes(b"x\n"), root=study, private=True)
    monkeypatch.undo()
    assert order[:2] == ["fsync", "rename"]  # then the folder's flush
    assert path.read_bytes() == b"x\n" and _temporary(study) == []
