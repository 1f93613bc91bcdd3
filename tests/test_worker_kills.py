"""kill -9 of a command that draws in worker processes leaves no worker behind.

A 25-laboratory round (the example study with 20 invented laboratories added) is printed and
evaluated by ``python -m planner`` in its own session; as soon as the command has worker
processes it is killed with SIGKILL, and within a few seconds no process of its session may
be left (before, the workers lived on and kept writing letters). Linux only: the processes
are found in /proc.
"""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import pytest
import yaml
from conftest import EXAMPLE, NOW, PASSPHRASE, ROUND, filled, run_cli, write

pytestmark = pytest.mark.skipif(not Path("/proc/self/stat").exists(),
                                reason="finds processes in /proc (Linux)")

LABS = 25


def _session(sid: int) -> list[int]:
    """Return the pids of live (not zombie) processes of session ``sid``."""
    out = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            stat = (entry / "stat").read_text()
        except OSError:
            continue
        fields = stat[stat.rindex(")") + 2:].split()
        state, session = fields[0], int(fields[3])
        if session == sid and state != "Z":
            out.append(int(entry.name))
    return out


def _study(base: Path) -> Path:
    target = base / "big"
    shutil.copytree(EXAMPLE, target)
    path = target / "study.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    for i in range(len(data["laboratories"]) + 1, LABS + 1):
        data["laboratories"].append({
            "id": f"l{i:02d}", "name": f"Invented Test Laboratory {i}",
            "address": [f"Testvej {i}", "7400 Varnes", "Denmark"],
            "contact": {"name": f"Analyst {i}"}, "country": "DK", "can_host": False,
            "decimal": "comma"})
    data["evaluation"]["sigma_pt"] = "participants"
    path.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return target


@pytest.fixture(scope="module")
def big_round(tmp_path_factory):
    """The 25-laboratory round planned, every form received, the key opened."""
    from typer.testing import CliRunner

    base = tmp_path_factory.mktemp("workers")
    study_dir = _study(base)
    runner = CliRunner()
    with pytest.MonkeyPatch.context() as mp:
        from planner.ledger import Ledger

        mp.setenv("RINGPLAN_PASSPHRASE", PASSPHRASE)
        mp.setattr(Ledger, "now", lambda self: NOW)  # after the test window
        done = run_cli(runner, "plan", study_dir, "--round", ROUND, "--host", "kal")
        assert done.exit_code == 0, done.stderr
        forms = [write(base, f"{lab}.csv", filled(study_dir, lab)) for lab in
                 [x["id"] for x in yaml.safe_load((study_dir / "study.yaml").read_text(
                     encoding="utf-8"))["laboratories"]]]
        done = run_cli(runner, "receive", study_dir, "--round", ROUND, *forms)
        assert done.exit_code == 0, done.stderr
        done = run_cli(runner, "unseal", study_dir, "--round", ROUND)
        assert done.exit_code == 0, done.stderr
    return study_dir


def _kill_when_workers_run(study_dir: Path, *args: str) -> tuple[int, list[int]]:
    env = dict(os.environ, RINGPLAN_PASSPHRASE=PASSPHRASE)
    proc = subprocess.Popen([sys.executable, "-m", "planner", *args, str(study_dir), "--round",
                             ROUND], env=env, start_new_session=True,
                            stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 60
    seen: list[int] = []
    try:
        while time.monotonic() < deadline and proc.poll() is None:
            seen = [p for p in _session(proc.pid) if p != proc.pid]
            if seen:
                break
            time.sleep(0.01)
        assert seen, f"{args[0]} ended before it started a worker"
        os.kill(proc.pid, signal.SIGKILL)
        proc.wait()
    finally:
        if proc.poll() is None:
            proc.kill()
    left = _session(proc.pid)
    for _ in range(50):  # up to 5 s
        if not left:
            break
        time.sleep(0.1)
        left = _session(proc.pid)
    for pid in left:  # do not leave them to the next test
        os.kill(pid, signal.SIGKILL)
    return len(seen), left


@pytest.mark.parametrize("command", ["print", "evaluate"])
def test_no_worker_outlives_a_killed_command(big_round, command):
    workers, left = _kill_when_workers_run(big_round, command)
    assert workers >= 1
    assert left == [], f"{len(left)} worker(s) of a killed {command} still running"
