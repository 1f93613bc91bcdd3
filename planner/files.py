"""Files a command writes into a study folder: whole or not at all, and never through a link.

Every file ringplan writes inside a study folder goes through ``write_atomic`` (or
``write_bytes`` / ``write_text``, or ``write_many`` for many files at once, whose flushes to
disk overlap, or ``stage`` and ``settle`` for documents made one by one and put in place
together): the bytes go to a temporary file beside the target,
created new (``O_EXCL``) and never through a link (``O_NOFOLLOW``), are flushed to disk,
and the file is then renamed into place, so a reader finds the old file or the new one,
never half of either. Before anything is made, each part of the path from the study
folder down to the target is looked at without following it (``lstat``): a symbolic
link, a file where a folder should be or a folder where a file should be is refused with
one PlannerError naming it. Missing folders are made one at a time (``mkdir`` does not
follow a link at its last part). The study folder itself may be reached through links:
that part of the path is the user's.

Private files are owner-only (0600) and so are their folders (0700): whatever maps codes
to materials or holds a laboratory's results before the coordinator sends them out.
That is ``host/`` (labels, preparation sheet), ``results/`` and ``.intake/`` (returned
forms, receipts), ``report/`` (statistics, the report, one letter per laboratory),
``labs/`` (each laboratory's documents carry its submission token, for it alone) and the
key files (``key.sealed``, ``key.host.sealed``, ``key.json``). A private folder that an
older version made with wider rights is narrowed when a file is written into it. The
manifest and ``key.fingerprint`` follow the user's umask.

A temporary file is named ``.<name>.<pid>.<random>.ringplan-tmp``. A command killed
part-way leaves it behind; ``remove_stale`` removes the ones in a round folder whose
process has ended and leaves those of a running process alone. Not all of them under the
ledger's lock: ``print`` writes its documents after it has released the lock, so the lock
would not keep a second command from removing a file a running print is writing.

What a user can cause (a read-only or foreign folder, a full disk, a file where a folder
should be) becomes one PlannerError naming the path and what would be right (``explain``);
any other OSError is a bug and keeps its traceback.
"""

from __future__ import annotations

import errno
import os
import secrets
import stat
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass
from pathlib import Path, PurePath

from planner.errors import PlannerError, Where

__all__ = [
    "TEMP_SUFFIX",
    "USER_ERRNOS",
    "Leftover",
    "write_atomic",
    "write_bytes",
    "write_text",
    "write_many",
    "stage",
    "settle",
    "make_folders",
    "check_paths",
    "placement",
    "is_private",
    "explain",
    "find_leftovers",
    "remove_stale",
    "process_alive",
]

TEMP_SUFFIX = ".ringplan-tmp"

USER_ERRNOS = frozenset(code for code in (
    errno.EACCES, errno.EPERM, errno.EROFS, errno.ENOSPC, getattr(errno, "EDQUOT", None),
    errno.ENOTDIR, errno.EEXIST, errno.EISDIR, errno.ELOOP) if code is not None)
"""The errno values of failures a user causes (rights, read-only disk, full disk, a file
or a link in the way); any other OSError is a bug."""

# The round folder's layout, as plan, print, receive, unseal and evaluate write it; the
# names are those of seal, plan, returns, evaluate and ledger (a test holds them equal).
_ROUNDS = "rounds"
_PRIVATE_FOLDERS = frozenset({"host", "labs", "results", ".intake", "report"})
_PRIVATE_FILES = frozenset({"key.sealed", "key.host.sealed", "key.json"})
_STUDY_MARKERS = ("study.yaml", "ledger.sqlite")
_INTAKE = ".intake"  # its leftovers are settled by the next receive (returns.settle_results)

_NOFOLLOW = getattr(os, "O_NOFOLLOW", 0)
_CLOEXEC = getattr(os, "O_CLOEXEC", 0)
_CREATE = os.O_WRONLY | os.O_CREAT | os.O_EXCL | _NOFOLLOW | _CLOEXEC


def is_private(relative: str | PurePath) -> bool:
    """Return whether a file at this path inside a round folder is owner-only."""
    parts = PurePath(relative).parts
    if len(parts) == 1:
        return parts[0] in _PRIVATE_FILES
    return bool(parts) and parts[0] in _PRIVATE_FOLDERS


def _private_folder(parts: tuple[str, ...]) -> bool:
    """Return whether a folder (its parts below the study folder) is owner-only."""
    return len(parts) >= 3 and parts[0] == _ROUNDS and parts[2] in _PRIVATE_FOLDERS


def placement(path: Path) -> tuple[Path, bool]:
    """Return the study folder that holds ``path`` and whether the file is private.

    For writers that know only the file they write (the documents): the study folder is
    the one above ``rounds/<round>/`` that holds study.yaml or the ledger (the nearest,
    if the study itself lies below a folder called rounds). Without one, only the file
    itself is checked (its own folder is returned), so that no folder of the user's above
    a study is taken for ours; a path outside any round is not private.
    """
    parts = Path(path).parts
    candidates = [i for i in range(len(parts) - 3, -1, -1) if parts[i] == _ROUNDS]
    if not candidates:
        return Path(path).parent, False
    marked = next((i for i in candidates if any(
        (Path(*parts[:i]) / marker).is_file() for marker in _STUDY_MARKERS)), None)
    if marked is None:
        return Path(path).parent, is_private(PurePath(*parts[candidates[0] + 2:]))
    root = Path(*parts[:marked]) if marked else Path(".")
    return root, is_private(PurePath(*parts[marked + 2:]))


def write_atomic(path: Path, write: Callable[[Path], None], *, root: Path,
                 private: bool, read_only: bool = False) -> Path:
    """Call ``write`` with a new temporary file beside ``path``, then rename it into place.

    ``write`` gets the temporary file's path (it exists, empty) and writes it whole.
    ``private`` makes the file owner-only, ``read_only`` takes away the write bits. Returns
    ``path``; raises PlannerError when a link, a file or a folder is in the way below
    ``root`` or the disk refuses (the temporary file is removed then).
    """
    settle([(Path(path), stage(path, write, root=root, private=private,
                               read_only=read_only))], root=root)
    return Path(path)


def stage(path: Path, write: Callable[[Path], None], *, root: Path, private: bool,
          read_only: bool = False) -> Path:
    """Do the first half of ``write_atomic``: return the temporary file beside ``path``,
    written whole by ``write`` and given its rights, but neither flushed to disk nor
    renamed; ``settle`` does both, for many files together.

    For documents made one by one, perhaps in other processes, whose flushes should
    overlap (letters). A temporary file never settled is a leftover of its process
    (``remove_stale``).
    """
    path, root = Path(path), Path(root)
    check_paths([path], root=root)
    make_folders(path.parent, root=root)
    temp = path.with_name(f".{path.name}.{os.getpid()}.{secrets.token_hex(3)}{TEMP_SUFFIX}")
    made = False
    try:
        os.close(os.open(temp, _CREATE, 0o600 if private else 0o666))
        made = True
        write(temp)
        fd = os.open(temp, os.O_RDONLY | _NOFOLLOW | _CLOEXEC)
        try:
            mode = stat.S_IMODE(os.fstat(fd).st_mode)
            if private:
                mode &= 0o700
            if read_only:
                mode &= ~0o222
            if hasattr(os, "fchmod"):  # a writer that made the file anew: the rights back
                os.fchmod(fd, mode)
        finally:
            os.close(fd)
    except BaseException as exc:
        if made:
            _discard(temp)
        if isinstance(exc, OSError) and exc.errno in USER_ERRNOS:
            raise explain(exc, path) from None
        raise
    return temp


def settle(staged: Sequence[tuple[Path, Path]], *, root: Path) -> list[Path]:
    """Put each (target, temporary file of ``stage``) in place: flush every temporary file
    to disk (the flushes side by side), then rename each onto its target and flush each
    folder once. Every target is then whole or as it was.

    Returns the targets; raises PlannerError as ``write_atomic`` does, after removing
    every temporary file not yet renamed (the targets renamed by then stay, each whole).
    """
    root = Path(root)
    paths = [Path(path) for path, _ in staged]
    current = paths[0] if paths else root
    renamed = 0
    try:
        fds: list[int] = []
        try:
            for path, temp in staged:
                current = path
                fds.append(os.open(temp, os.O_RDONLY | _NOFOLLOW | _CLOEXEC))
            flushed = _flush_together(fds)
        finally:
            for fd in fds:
                os.close(fd)
        for path, failure in zip(paths, flushed, strict=True):
            if failure is not None:
                current = path
                raise failure
        _check_many(paths, root=root)  # again, right before the renames
        for path, temp in staged:
            current = Path(path)
            os.replace(temp, path)
            renamed += 1
    except BaseException as exc:
        for _, temp in staged[renamed:]:
            _discard(Path(temp))
        if isinstance(exc, OSError) and exc.errno in USER_ERRNOS:
            raise explain(exc, current) from None
        raise
    for folder in dict.fromkeys(path.parent for path in paths):
        _sync_folder(folder)
    return paths


def write_bytes(path: Path, data: bytes, *, root: Path, private: bool,
                read_only: bool = False) -> Path:
    """Write ``data`` to ``path`` as ``write_atomic`` does; return ``path``."""
    def write(temp: Path) -> None:
        fd = os.open(temp, os.O_WRONLY | os.O_TRUNC | _NOFOLLOW | _CLOEXEC)
        try:
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
        finally:
            os.close(fd)

    return write_atomic(path, write, root=root, private=private, read_only=read_only)


def write_text(path: Path, text: str, *, root: Path, private: bool) -> Path:
    """Write ``text`` as UTF-8 to ``path`` as ``write_atomic`` does; return ``path``."""
    return write_bytes(path, text.encode("utf-8"), root=root, private=private)


def write_many(items: Sequence[tuple[Path, bytes]], *, root: Path, private: bool,
               read_only: bool = False) -> list[Path]:
    """Write each (path, bytes) as ``write_bytes`` does, flushing them to disk together.

    Every file is whole or absent, as with one ``write_bytes`` each: its bytes go to a
    temporary file beside it, which is flushed (fsync) and renamed into place. The flushes
    run side by side, so that the file system commits them together rather than one after
    the other; each folder is flushed once after the renames. Returns the paths; raises
    PlannerError as ``write_atomic`` does, after removing every temporary file, and the
    files renamed into place by then stay (each whole).
    """
    if len(items) <= 1:
        return [write_bytes(path, data, root=root, private=private, read_only=read_only)
                for path, data in items]
    root = Path(root)
    paths = [Path(path) for path, _ in items]
    folders = list(dict.fromkeys(path.parent for path in paths))
    _check_many(paths, root=root)
    for folder in folders:
        make_folders(folder, root=root)
    temps: dict[str, int | None] = {}  # temporary file -> its descriptor while open
    current = paths[0]
    try:
        for path, (_, data) in zip(paths, items, strict=True):
            current = path
            temp = os.path.join(path.parent, f".{path.name}.{os.getpid()}."
                                f"{secrets.token_hex(3)}{TEMP_SUFFIX}")
            fd = os.open(temp, _CREATE, 0o600 if private else 0o666)
            temps[temp] = fd
            view = memoryview(data)
            while view:
                view = view[os.write(fd, view):]
            mode = stat.S_IMODE(os.fstat(fd).st_mode)
            if private:
                mode &= 0o700
            if read_only:
                mode &= ~0o222
            if hasattr(os, "fchmod"):  # as write_atomic: the rights of a file made anew
                os.fchmod(fd, mode)
        flushed = _flush_together(list(temps.values()))
        for path, failure in zip(paths, flushed, strict=True):
            if failure is not None:
                current = path
                raise failure
        for temp, open_fd in list(temps.items()):
            temps[temp] = None
            if open_fd is not None:
                os.close(open_fd)
        _check_many(paths, root=root)  # again, right before the renames
        for path, temp in zip(paths, list(temps), strict=True):
            current = path
            os.replace(temp, path)
            del temps[temp]
    except BaseException as exc:
        for temp, open_fd in temps.items():
            if open_fd is not None:
                os.close(open_fd)
            _discard(Path(temp))
        if isinstance(exc, OSError) and exc.errno in USER_ERRNOS:
            raise explain(exc, current) from None
        raise
    for folder in folders:
        _sync_folder(folder)
    return paths


def _check_many(paths: Sequence[Path], *, root: Path) -> None:
    """Do what ``check_paths`` does, looking at the way to each folder once."""
    seen: set[Path] = set()
    for path in paths:
        if path.parent not in seen:
            check_paths([path], root=root)
            seen.add(path.parent)
            continue
        try:
            info = os.lstat(path)
        except FileNotFoundError:
            continue
        except OSError as exc:
            if exc.errno in USER_ERRNOS:
                raise explain(exc, path) from None
            raise
        _check_part(path, info, last=True)


_FLUSHERS = 16  # fsync calls at a time in write_many and settle


def _flush_together(fds: Sequence[int | None]) -> list[OSError | None]:
    """Flush files to disk side by side (fsync lets other threads run while it waits, so
    the file system commits them together); return each one's error, or None."""
    if len(fds) <= 1:
        return _flush(fds)
    from concurrent.futures import ThreadPoolExecutor

    share = -(-len(fds) // _FLUSHERS)
    with ThreadPoolExecutor(max_workers=_FLUSHERS) as pool:
        return [failure for part in pool.map(
            _flush, [fds[i:i + share] for i in range(0, len(fds), share)]) for failure in part]


def _flush(fds: Sequence[int | None]) -> list[OSError | None]:
    """Flush files to disk one after the other; return each one's error instead of raising it."""
    out: list[OSError | None] = []
    for fd in fds:
        try:
            if fd is not None:
                os.fsync(fd)
        except OSError as exc:
            out.append(exc)
            continue
        out.append(None)
    return out


def make_folders(folder: Path, *, root: Path) -> Path:
    """Make ``folder`` and each missing folder between ``root`` and it; return ``folder``.

    Private folders of the round layout are made owner-only, and narrowed to it when
    found wider. Raises PlannerError when a link or a file is in the way or the disk
    refuses.
    """
    folder, root = Path(folder), Path(root)
    parts = _below(folder, root)
    current = root
    if root.exists() and not root.is_dir():
        raise _file_error(root)
    try:
        if not root.is_dir():
            os.makedirs(root, exist_ok=True)  # the study folder: the user's own path
        for depth, name in enumerate(parts, start=1):
            current = current / name
            private = _private_folder(parts[:depth])
            try:
                os.mkdir(current, 0o700 if private else 0o777)
                continue
            except FileExistsError:
                pass
            info = os.lstat(current)
            _check_part(current, info, last=False)
            if private and stat.S_IMODE(info.st_mode) & 0o077 and _owned(info):
                os.chmod(current, 0o700)
    except OSError as exc:
        if exc.errno in USER_ERRNOS:
            raise explain(exc, current) from None
        raise
    return folder


def check_paths(paths: Iterable[Path], *, root: Path) -> None:
    """Raise PlannerError if a link, or a file or folder in the wrong place, lies on the way
    from ``root`` to any of ``paths``; what does not exist yet is fine. Nothing is made."""
    root = Path(root)
    for path in paths:
        parts = _below(Path(path), root)
        current = root
        for depth, name in enumerate(parts, start=1):
            current = current / name
            try:
                info = os.lstat(current)
            except FileNotFoundError:
                break
            except OSError as exc:
                if exc.errno in USER_ERRNOS:
                    raise explain(exc, current) from None
                raise
            _check_part(current, info, last=depth == len(parts))


def explain(exc: OSError, path: Path | None = None) -> PlannerError:
    """Return the one-line PlannerError for an OSError a user caused, naming ``path`` (or the
    file the error names) and what would be right."""
    named = path if path is not None else (Path(os.fsdecode(exc.filename))
                                           if exc.filename is not None else None)
    where = Where(str(named)) if named is not None else None
    code = exc.errno
    if code in (errno.EACCES, errno.EPERM):
        return PlannerError("permission denied; the study folder and its files must be "
                            "writable by you (or work on a copy of the study folder)", where)
    if code == errno.EROFS:
        return PlannerError("the disk is read-only; work on a copy of the study folder on a "
                            "writable disk", where)
    if code in (errno.ENOSPC, getattr(errno, "EDQUOT", errno.ENOSPC)):
        return PlannerError("no space left on the disk; free some space and run the command "
                            "again", where)
    if code == errno.ELOOP and named is not None:
        return _link_error(named)
    if code == errno.EISDIR and named is not None:
        return _folder_error(named)
    if code in (errno.ENOTDIR, errno.EEXIST) and named is not None:
        blocker = next((p for p in reversed((named, *named.parents))
                        if p.exists() and not p.is_dir()), None)
        if blocker is not None and blocker != named:
            return _file_error(blocker)
        if code == errno.EEXIST:
            return PlannerError("exists already; move it away and run the command again", where)
    return PlannerError(f"{(exc.strerror or 'the system refused').lower()}; check the study "
                        "folder and run the command again", where)


# --- leftovers of commands that were stopped ----------------------------------------------

@dataclass(frozen=True, slots=True)
class Leftover:
    """A temporary file a stopped command left in a round folder, and its process id."""

    path: Path
    pid: int


def find_leftovers(folder: Path) -> list[Leftover]:
    """Return the temporary files under a round folder, in path order (``.intake/`` aside:
    the next receive settles it). Links are not followed."""
    out = []
    for top, dirs, names in os.walk(folder, followlinks=False):
        dirs[:] = sorted(d for d in dirs if d != _INTAKE)
        for name in sorted(names):
            pid = _pid_of(name)
            if pid is not None:
                out.append(Leftover(Path(top) / name, pid))
    return out


def remove_stale(folder: Path, *, alive: Callable[[int], bool] | None = None
                 ) -> tuple[list[Leftover], list[Leftover]]:
    """Remove the temporary files under a round folder whose process has ended.

    Returns (removed, kept): kept are those of a running process (``alive``, by default
    ``process_alive``) and any that could not be removed.
    """
    alive = alive or process_alive
    removed: list[Leftover] = []
    kept: list[Leftover] = []
    for item in find_leftovers(folder):
        if alive(item.pid):
            kept.append(item)
            continue
        try:
            os.unlink(item.path)
        except FileNotFoundError:
            continue  # another command removed it, or its writer renamed it into place
        except OSError:
            kept.append(item)
            continue
        removed.append(item)
    return removed, kept


def process_alive(pid: int) -> bool:
    """Return whether a process with this id runs on this machine (True when it cannot tell)."""
    if pid == os.getpid():
        return True
    if pid <= 0:
        return False
    if os.name != "posix":
        return True  # no harmless probe: keep the file
    try:
        os.kill(pid, 0)
    except (ProcessLookupError, OverflowError):
        return False
    except OSError:
        return True  # another user's process
    return True


def _pid_of(name: str) -> int | None:
    """Return the process id in a temporary file's name, or None if it is not one of ours.

    ``.<name>.<pid>.<random>.ringplan-tmp``; and ``.<name>.<pid>.tmp``, which the documents
    were staged as before.
    """
    if not name.startswith("."):
        return None
    if name.endswith(TEMP_SUFFIX):
        fields = name[:-len(TEMP_SUFFIX)].rsplit(".", 2)
        pid = fields[1] if len(fields) == 3 else ""
    elif name.endswith(".tmp"):
        fields = name[:-len(".tmp")].rsplit(".", 1)
        pid = fields[1] if len(fields) == 2 and fields[0] not in ("", ".") else ""
    else:
        return None
    return int(pid) if pid.isascii() and pid.isdigit() else None


# --- helpers -------------------------------------------------------------------------------

def _below(path: Path, root: Path) -> tuple[str, ...]:
    try:
        parts = path.relative_to(root).parts
    except ValueError:
        raise ValueError(f"{path} is not inside the study folder {root}") from None
    if ".." in parts:
        raise ValueError(f"{path} leaves the study folder {root}")
    return parts


def _check_part(path: Path, info: os.stat_result, *, last: bool) -> None:
    if stat.S_ISLNK(info.st_mode):
        raise _link_error(path)
    if last and stat.S_ISDIR(info.st_mode):
        raise _folder_error(path)
    if not last and not stat.S_ISDIR(info.st_mode):
        raise _file_error(path)


def _link_error(path: Path) -> PlannerError:
    return PlannerError("is a symbolic link; ringplan writes only real files inside the study "
                        "folder; remove the link", Where(str(path)))


def _file_error(path: Path) -> PlannerError:
    return PlannerError("is a file where ringplan needs a folder; move it away and run the "
                        "command again", Where(str(path)))


def _folder_error(path: Path) -> PlannerError:
    return PlannerError("is a folder where ringplan writes a file; move it away and run the "
                        "command again", Where(str(path)))


def _owned(info: os.stat_result) -> bool:
    return not hasattr(os, "geteuid") or info.st_uid == os.geteuid()


def _discard(temp: Path) -> None:
    try:
        os.unlink(temp)
    except OSError:
        pass  # a leftover: the next command on the round removes it


def _sync_folder(folder: Path) -> None:
    """Flush the folder's entry of the renamed file, so a power cut keeps the new file."""
    try:
        fd = os.open(folder, os.O_RDONLY | _CLOEXEC)
    except OSError:
        return
    try:
        os.fsync(fd)
    except OSError:
        pass  # some file systems cannot sync a folder; the rename itself is atomic
    finally:
        os.close(fd)
