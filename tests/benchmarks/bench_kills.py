"""Benchmark: kill each writing command at a random moment and check what it leaves behind.

For each of the commands plan, print, receive, unseal and evaluate, every trial copies
the example study (examples/norrvik-mfr) in the state the command needs (fresh;
planned; planned and printed; every form received; unsealed), starts the command as
``python -m planner ...`` and sends SIGKILL after a random delay between 0 and the
command's normal run time (measured once while the states are prepared). Then it checks:

- the ledger opens (schema, guards, every chain link), or is absent only when ``plan``
  was killed before it made one; the round is at the status before or after the command;
- ``ringplan status`` exits 0 once the round is in the ledger;
- no half-written round: the round folder with its manifest, key.sealed, key.fingerprint
  and result forms exists exactly when the ledger has the round, with the same
  fingerprint (``.R.*.staging`` folders are not rounds);
- no half-written file in place: every PDF ends in %%EOF, every XLSX is a whole zip,
  results/<sha256>.csv hashes to its name, key.json to the fingerprint in the ledger;
- the same command run again, not killed, succeeds and leaves the round consistent
  (plan: ``--replace`` when the killed run had already recorded the round; receive:
  each form recorded or found identical, once, with its copy and receipt; unseal:
  done, or "already unsealed" with key.json matching; evaluate: report, letters and
  the statistics.json the ledger's 'evaluated' event names).

Leftover temp files and folders (``.*.ringplan-tmp``, ``.*.tmp``, ``.*.part``, ``.*.staging``,
``.*.replaced``) after the second run are listed and counted as findings, not failures.

The killed command runs in its own session and the whole process group is killed, so that
a worker process (labels and letters may use a pool) cannot go on writing after the
"crash" and make the checks race with it.

Run: python tests/benchmarks/bench_kills.py [--trials N] [--seed S]
(default 25 trials per command, about 3 minutes on a 2-core laptop; most of a
command's run time is Python importing, so many kills land before it writes anything:
the "changed" column counts those that did not).
tests/test_kills.py runs a few trials per command with the same functions.
"""

from __future__ import annotations

import argparse
import fnmatch
import hashlib
import json
import os
import random
import shutil
import signal
import subprocess
import sys
import tempfile
import time
import zipfile
from collections import Counter
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from conftest import EXAMPLE, LABS, PASSPHRASE, ROUND, filled, write  # noqa: E402

from planner.errors import LedgerError  # noqa: E402
from planner.ledger import LEDGER_NAME, Ledger  # noqa: E402

HOST = "kal"
COMMANDS = ("plan", "print", "receive", "unseal", "evaluate")
# The round status a command starts from and the one it brings the round to; the
# prepared study folders are named after the status they are at ("fresh": nothing planned).
BEFORE = {"plan": "fresh", "print": "planned", "receive": "printed", "unseal": "received",
          "evaluate": "unsealed"}
AFTER = {"plan": "planned", "print": "printed", "receive": "received", "unseal": "unsealed",
         "evaluate": "evaluated"}
LEFTOVER_PATTERNS = (".*.ringplan-tmp", ".*.tmp", ".*.part", ".*.staging", ".*.replaced")
_TIMEOUT = 120  # seconds; a command that hangs is a failure, not a stuck benchmark


@dataclass(frozen=True)
class Prepared:
    """The study folders each command starts from, its normal run time, the returned forms."""

    states: dict[str, Path]
    durations: dict[str, float]
    forms: tuple[Path, ...]


@dataclass
class Trial:
    """What one killed run and its second run left: failures break an invariant."""

    command: str
    delay: float
    landed: bool
    changed: bool = False  # the kill left the folder different from its start
    failures: list[str] = field(default_factory=list)
    leftovers: list[str] = field(default_factory=list)
    rerun_seconds: float = 0.0


# --- running the CLI -------------------------------------------------------------------

def _env(extra: Mapping[str, str] | None = None) -> dict[str, str]:
    env = {**os.environ, "PYTHONPATH": str(ROOT), "RINGPLAN_PASSPHRASE": PASSPHRASE}
    env.pop("RINGPLAN_TEST_PAUSE_RECEIVE", None)  # the pause hook would hold receive for 120 s
    return {**env, **(extra or {})}


def command_args(command: str, study: Path, forms: tuple[Path, ...], *,
                 replace: bool = False) -> list[str]:
    """Return the CLI arguments of ``command`` on round ROUND of the study folder."""
    args = [command, str(study), "--round", ROUND]
    if command == "plan":
        args += ["--host", HOST] + (["--replace"] if replace else [])
    elif command == "receive":
        args += [str(f) for f in forms]
    return args


def run_cli(args: list[str]) -> tuple[subprocess.CompletedProcess[str], float]:
    """Run ``python -m planner ARGS`` to the end; return the result and its wall time."""
    t0 = time.perf_counter()
    result = subprocess.run([sys.executable, "-m", "planner", *args], capture_output=True,
                            text=True, env=_env(), stdin=subprocess.DEVNULL, timeout=_TIMEOUT)
    return result, time.perf_counter() - t0


def run_and_kill(args: list[str], log: Path, *, delay: float = 0.0,
                 until: Callable[[], bool] | None = None,
                 env: Mapping[str, str] | None = None) -> tuple[bool, int]:
    """Start the CLI (stderr to ``log``), SIGKILL its process group after ``delay`` s, or as
    soon as ``until()`` is true; return (still running at the kill, exit status)."""
    with open(log, "w", encoding="utf-8") as err:
        proc = subprocess.Popen([sys.executable, "-m", "planner", *args], env=_env(env),
                                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL,
                                stderr=err, start_new_session=True)
        landed = False
        try:
            time.sleep(delay)
            # No sleep in this loop: the windows worth hitting last a few milliseconds.
            while until is not None and proc.poll() is None and not until():
                pass
            landed = proc.poll() is None
        finally:
            try:
                os.killpg(proc.pid, signal.SIGKILL)
            except ProcessLookupError:
                pass  # it had finished and been reaped, group and all
            proc.wait(timeout=_TIMEOUT)
    return landed, proc.returncode


# --- preparing the states --------------------------------------------------------------

def prepare(root: Path) -> Prepared:
    """Bring copies of the example study through every command once, timing each run."""
    states = {"fresh": root / "fresh"}
    shutil.copytree(EXAMPLE, states["fresh"])
    forms_dir = root / "forms"
    forms_dir.mkdir()
    forms: tuple[Path, ...] = ()
    durations: dict[str, float] = {}
    for command in COMMANDS:
        folder = root / AFTER[command]
        shutil.copytree(states[BEFORE[command]], folder)
        if command == "receive":
            # Empty test dates: the CLI runs on the real clock, and an empty date is never
            # outside the test window.
            forms = tuple(write(forms_dir, f"{lab}.csv", filled(folder, lab, day=""))
                          for lab in LABS)
        result, durations[command] = run_cli(command_args(command, folder, forms))
        if result.returncode != 0:
            raise RuntimeError(f"preparing: {command} failed with {result.returncode}:\n"
                               f"{result.stderr}")
        states[AFTER[command]] = folder
    return Prepared(states, durations, forms)


# --- what a folder must look like ------------------------------------------------------

@dataclass(frozen=True)
class LedgerView:
    status: str | None
    fingerprint: str | None
    events: dict[str, list[dict[str, object]]]
    submissions: dict[str, list[str]]  # laboratory -> SHA-256 of each version, oldest first


def read_ledger(study: Path) -> LedgerView | None:
    """Open the ledger as any command would (checking it); None when there is no file.

    Raises LedgerError when the schema, a guard or the chain does not check.
    """
    if not (study / LEDGER_NAME).exists():
        return None
    with Ledger.open(study, create=False) as ledger:
        current = ledger.current_round(ROUND)
        events: dict[str, list[dict[str, object]]] = {}
        for event in ledger.events(ROUND):
            events.setdefault(event.kind, []).append(event.detail)
        subs: dict[str, list[str]] = {}
        for s in ledger.submissions(ROUND):
            subs.setdefault(s.lab, []).append(s.sha256)
        return LedgerView(ledger.round_status(ROUND), current.fingerprint if current else None,
                          events, subs)


def _sha(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _visible(path: Path, study: Path) -> bool:
    return not any(part.startswith(".") for part in path.relative_to(study).parts)


def half_written(study: Path, fingerprint: str | None) -> list[str]:
    """Return every file in place (not hidden) that is not whole."""
    out = []
    for path in sorted(study.rglob("*")):
        if not path.is_file() or not _visible(path, study):
            continue
        rel = path.relative_to(study).as_posix()
        if path.suffix == ".pdf":
            data = path.read_bytes()
            if not data.startswith(b"%PDF-") or b"%%EOF" not in data[-1024:]:
                out.append(f"{rel} is not a whole PDF ({len(data)} bytes)")
        elif path.suffix == ".xlsx":
            try:
                with zipfile.ZipFile(path) as z:
                    bad = z.testzip()
            except zipfile.BadZipFile:
                bad = "(not a zip)"
            if bad is not None:
                out.append(f"{rel} is not a whole XLSX: {bad}")
        elif path.parent.name == "results" and not path.name.startswith("receipt-"):
            if _sha(path) != path.name.split(".")[0]:
                out.append(f"{rel} does not hash to its name")
        elif path.name == "key.json" and _sha(path) != fingerprint:
            out.append(f"{rel} does not hash to the fingerprint in the ledger")
        elif path.name == "statistics.json":
            try:
                json.loads(path.read_text(encoding="utf-8"))
            except ValueError:
                out.append(f"{rel} is not whole JSON")
    return out


def round_folder_problems(study: Path, fingerprint: str | None) -> list[str]:
    """Return why the round folder and the ledger's round disagree (nothing: they agree)."""
    folder = study / "rounds" / ROUND
    if fingerprint is None:
        return [f"rounds/{ROUND} exists but the ledger has no such round"] if folder.exists() \
            else []
    needed = ["manifest.json", "key.sealed", "key.fingerprint",
              *(f"labs/{lab}/result-form.csv" for lab in LABS)]
    missing = [name for name in needed if not (folder / name).is_file()]
    if missing:
        return [f"the ledger has the round but rounds/{ROUND} lacks " + ", ".join(missing)]
    out = []
    manifest = json.loads((folder / "manifest.json").read_text(encoding="utf-8"))
    if manifest.get("fingerprint") != fingerprint:
        out.append("manifest.json names another fingerprint than the ledger")
    if (folder / "key.fingerprint").read_text(encoding="utf-8").strip() != fingerprint:
        out.append("key.fingerprint differs from the ledger's fingerprint")
    return out


def snapshot(study: Path) -> dict[str, tuple[int, int]]:
    """Return (size, mtime) of every file: enough to tell whether a kill came after the
    command began to write (copytree keeps the times)."""
    return {p.relative_to(study).as_posix(): (p.stat().st_size, p.stat().st_mtime_ns)
            for p in study.rglob("*") if p.is_file()}


def leftovers(study: Path) -> list[str]:
    """Return the temp files and folders a command left (relative paths)."""
    return sorted(p.relative_to(study).as_posix() for p in study.rglob(".*")
                  if any(fnmatch.fnmatch(p.name, pat) for pat in LEFTOVER_PATTERNS))


def check_state(command: str, study: Path, *, done: bool) -> tuple[list[str], LedgerView | None]:
    """Check the invariants every state must keep; ``done``: after the second run.

    Returns the failures and what the ledger holds (None if it is missing or broken).
    """
    stage = "after the second run" if done else "after the kill"
    try:
        view = read_ledger(study)
    except LedgerError as exc:
        return [f"{stage}: the ledger does not open: {exc}"], None
    if view is None:
        if command != "plan" or done:
            return [f"{stage}: the ledger is missing"], None
        if (study / "rounds" / ROUND).exists():
            return [f"{stage}: no ledger, but rounds/{ROUND} exists"], None
        return [], None
    failures = []
    allowed = {AFTER[command]} if done else {AFTER[command], BEFORE[command]}
    shown = "fresh" if view.status is None else view.status
    if shown not in allowed:
        failures.append(f"{stage}: the round is {shown}, expected " + " or ".join(sorted(allowed)))
    failures += [f"{stage}: {p}" for p in round_folder_problems(study, view.fingerprint)]
    failures += [f"{stage}: {p}" for p in half_written(study, view.fingerprint)]
    if view.fingerprint is not None:
        result, _ = run_cli(["status", str(study), "--round", ROUND])
        if result.returncode != 0:
            failures.append(f"{stage}: status exits {result.returncode}: {result.stderr.strip()}")
    return failures, view


def check_rerun(command: str, study: Path, result: subprocess.CompletedProcess[str],
                view: LedgerView | None, forms: tuple[Path, ...]) -> list[str]:
    """Check that the second run did its command's work; ``view``: the ledger after it."""
    out = []
    ok = result.returncode == 0 or (command == "unseal" and result.returncode == 2
                                    and "already unsealed" in result.stderr)
    if not ok:
        out.append(f"second run exits {result.returncode}: {result.stderr.strip()[-400:]}")
    if view is None:
        return out
    folder = study / "rounds" / ROUND
    if command == "print" and not view.events.get("printed"):
        out.append("second print recorded no 'printed' event")
    elif command == "receive":
        for lab, form in zip(LABS, forms, strict=True):
            sha = _sha(form)
            if view.submissions.get(lab) != [sha]:
                out.append(f"{lab}: the ledger holds versions {view.submissions.get(lab)}, "
                           f"expected the one form {sha[:12]}")
            if f"{lab}: recorded version 1" not in result.stdout and \
                    f"{lab}: {form} is identical to version 1" not in result.stdout:
                out.append(f"{lab}: the second receive neither recorded nor found the form")
            stored = folder / "results" / f"{sha}.csv"
            if not stored.is_file() or stored.read_bytes() != form.read_bytes():
                out.append(f"{lab}: results/{sha[:12]}...csv is missing or differs")
            if not (folder / "results" / f"receipt-{lab}-v1.txt").is_file():
                out.append(f"{lab}: results/receipt-{lab}-v1.txt is missing (the form is "
                           "recorded, and receive again says 'nothing changed')")
        staged = sorted(p.name for p in (folder / ".intake").glob("*")) \
            if (folder / ".intake").is_dir() else []
        if staged:
            out.append(f"rounds/{ROUND}/.intake still holds " + ", ".join(staged))
        if len(view.events.get("received", [])) != len(LABS):
            out.append(f"{len(view.events.get('received', []))} 'received' events, "
                       f"expected {len(LABS)}")
    elif command == "unseal":
        if not (folder / "key.json").is_file():
            out.append("key.json is missing after the second unseal")
        if len(view.events.get("unsealed", [])) != 1:
            out.append(f"{len(view.events.get('unsealed', []))} 'unsealed' events, expected 1")
    elif command == "evaluate":
        report = folder / "report"
        names = ["report.pdf", "statistics.json", "results.csv",
                 *(f"letter-{lab}.pdf" for lab in LABS)]
        missing = [n for n in names if not (report / n).is_file()]
        if missing:
            out.append("report/ lacks " + ", ".join(missing))
        evaluated = view.events.get("evaluated", [])
        if not missing and evaluated and \
                evaluated[-1].get("statistics_sha256") != _sha(report / "statistics.json"):
            out.append("statistics.json is not the one the last 'evaluated' event names")
    return out


# --- one trial ---------------------------------------------------------------------------

def kill_trial(command: str, prepared: Prepared, workdir: Path, rng: random.Random) -> Trial:
    """Kill ``command`` once at a random moment of its normal run time, run it again, check."""
    return kill_and_check(command, prepared, workdir,
                          delay=rng.uniform(0.0, prepared.durations[command]))


def kill_and_check(command: str, prepared: Prepared, workdir: Path, *, delay: float = 0.0,
                   until: Callable[[Path], bool] | None = None,
                   env: Mapping[str, str] | None = None) -> Trial:
    """Kill ``command`` in a copy of its state (``workdir/study``) after ``delay`` s or once
    ``until(study)`` holds, check the invariants, run it again unkilled, check again."""
    study = workdir / "study"
    shutil.copytree(prepared.states[BEFORE[command]], study)
    log = workdir / "killed.stderr"
    before = snapshot(study)
    landed, code = run_and_kill(command_args(command, study, prepared.forms), log, delay=delay,
                                until=None if until is None else lambda: until(study), env=env)
    trial = Trial(command, delay, landed, changed=snapshot(study) != before)
    if not landed and code != 0:
        trial.failures.append(f"the run finished before the kill with exit {code}: "
                              + log.read_text(encoding="utf-8").strip()[-400:])
    failures, view = check_state(command, study, done=False)
    trial.failures += failures
    # A plan whose round reached the ledger can only be planned again with --replace.
    replace = command == "plan" and view is not None and view.fingerprint is not None
    result, trial.rerun_seconds = run_cli(command_args(command, study, prepared.forms,
                                                       replace=replace))
    failures, view = check_state(command, study, done=True)
    trial.failures += failures
    trial.failures += check_rerun(command, study, result, view, prepared.forms)
    trial.leftovers = leftovers(study)
    return trial


def trial_rng(seed: int, command: str, index: int) -> random.Random:
    """Return the random stream of one trial, the same for a seed whatever else runs."""
    return random.Random(f"{seed}:{command}:{index}")


# --- the script --------------------------------------------------------------------------

def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--trials", type=int, default=25, help="trials per command (default 25)")
    ap.add_argument("--seed", type=int, default=1, help="seed of the kill delays (default 1)")
    ap.add_argument("--commands", default=",".join(COMMANDS),
                    help="comma-separated subset of " + ", ".join(COMMANDS))
    args = ap.parse_args()
    chosen = [c.strip() for c in args.commands.split(",") if c.strip()]
    unknown = sorted(set(chosen) - set(COMMANDS))
    if unknown:
        ap.error("unknown command(s): " + ", ".join(unknown))

    t_start = time.perf_counter()
    trials: list[Trial] = []
    with tempfile.TemporaryDirectory(prefix="ringplan-kills-") as tmp:
        prepared = prepare(Path(tmp) / "states")
        print(f"{os.cpu_count()} CPUs; normal run times (s): " + ", ".join(
            f"{c} {prepared.durations[c]:.2f}" for c in COMMANDS))
        for command in chosen:
            for i in range(args.trials):
                workdir = Path(tmp) / f"{command}-{i}"
                workdir.mkdir()
                trial = kill_trial(command, prepared, workdir, trial_rng(args.seed, command, i))
                trials.append(trial)
                shutil.rmtree(workdir)
                for failure in trial.failures:
                    print(f"FAIL {command} #{i} (kill at {trial.delay:.3f} s, "
                          f"{'mid-command' if trial.landed else 'after it ended'}): {failure}")

    head = f"{'command':10} {'trials':>6} {'mid-cmd':>8} {'changed':>8} {'failures':>8} " \
           f"{'leftovers':>9} {'normal s':>8} {'mean rerun s':>12}"
    print()
    print(head)
    print("-" * len(head))

    def line(name: str, rows: list[Trial], normal: str) -> None:
        print(f"{name:10} {len(rows):6d} {sum(t.landed for t in rows):8d} "
              f"{sum(t.changed for t in rows):8d} "
              f"{sum(bool(t.failures) for t in rows):8d} "
              f"{sum(len(t.leftovers) for t in rows):9d} {normal:>8} "
              f"{sum(t.rerun_seconds for t in rows) / max(1, len(rows)):12.2f}")

    for command in chosen:
        line(command, [t for t in trials if t.command == command],
             f"{prepared.durations[command]:.2f}")
    print("-" * len(head))
    line("total", trials, "")
    print("mid-cmd: still running at the kill; changed: the kill left the folder different "
          "from its start;\nfailures: trials breaking an invariant; leftovers: temp files and "
          "folders left after the second run")

    found = Counter((t.command, _pattern(name)) for t in trials for name in t.leftovers)
    if found:
        print("\nleftovers after the second run (a finding, not a failure):")
        for (command, pattern), n in sorted(found.items()):
            print(f"  {command:9} {n:3d} x {pattern}")
    print(f"\nwall time: {time.perf_counter() - t_start:.1f} s")


def _pattern(name: str) -> str:
    """Return a leftover's path with its random or process-id part shown as '*'."""
    parts = name.split("/")
    stem = parts[-1].split(".")
    # .NAME.<random or pid>.tmp -> .NAME.*.tmp; .NAME.<pid>.<random>.ringplan-tmp likewise
    if stem[-1] == "ringplan-tmp" and len(stem) >= 5:
        stem[-3:-1] = ["*", "*"]
    elif len(stem) >= 4:
        stem[-2] = "*"
    parts[-1] = ".".join(stem)
    return "/".join(parts)


if __name__ == "__main__":
    main()
