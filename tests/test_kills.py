"""Commands killed part-way: the ledger, the round folder and a second run must stay whole.

Each writing command (plan, print, receive, unseal, evaluate) is killed with SIGKILL
at a moment drawn from a fixed seed, in a copy of the example study brought to the
state it needs, and then run again; the invariants are those of
tests/benchmarks/bench_kills.py, whose functions these tests share (that script runs
many more trials and prints the figures).

Two windows found here once broke the promises of plan.py and returns.py (a round folder
placed before the ledger commit; receipts lost after it); each has a test that kills in
that window on purpose.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent / "benchmarks"))

import bench_kills as kills  # noqa: E402

SEED = 20270130
TRIALS = 2  # per command; the benchmark runs more

@pytest.fixture(scope="module")
def prepared(tmp_path_factory: pytest.TempPathFactory) -> kills.Prepared:
    """The example study planned, printed, received and unsealed once, each state kept."""
    return kills.prepare(tmp_path_factory.mktemp("kill-states"))


@pytest.mark.parametrize("index", range(TRIALS))
@pytest.mark.parametrize("command", kills.COMMANDS)
def test_a_killed_command_leaves_the_study_whole(prepared, tmp_path, command, index):
    trial = kills.kill_trial(command, prepared, tmp_path,
                             kills.trial_rng(SEED, command, index))
    assert trial.failures == [], (f"{command} killed at {trial.delay:.3f} s "
                                  f"({'mid-command' if trial.landed else 'after it ended'})")


def test_a_staging_folder_left_by_a_killed_plan_is_no_round(prepared, tmp_path):
    # Killed once the staging folder holds the manifest: the next plan must not mind it.
    def staged(study: Path) -> bool:
        return any((study / "rounds").glob(".*.staging/manifest.json"))

    trial = kills.kill_and_check("plan", prepared, tmp_path, until=staged)
    assert trial.landed
    assert trial.failures == []


def test_plan_killed_between_placing_the_folder_and_the_commit(prepared, tmp_path):
    # The window is a few milliseconds (the chain link is computed, then COMMIT); polling
    # for the folder hits it nearly every time, and five tries make a miss negligible.
    def placed(study: Path) -> bool:
        return (study / "rounds" / kills.ROUND).exists()

    for attempt in range(5):
        workdir = tmp_path / str(attempt)
        workdir.mkdir()
        trial = kills.kill_and_check("plan", prepared, workdir, until=placed)
        assert trial.failures == []


def test_receive_killed_after_its_commit_is_completed_by_the_next(prepared, tmp_path):
    def committed(study: Path) -> bool:
        log = study.parent / "killed.stderr"
        return "paused after-commit" in log.read_text(encoding="utf-8")

    trial = kills.kill_and_check("receive", prepared, tmp_path, until=committed,
                                 env={"RINGPLAN_TEST_PAUSE_RECEIVE": "after-commit"})
    assert trial.landed
    assert trial.failures == []
