"""Usage errors of the console script are one line on stderr with exit status 2.

Run as a user runs it, ``python -m planner`` in a subprocess (the in-process test runner
would bypass the entry point that shapes these messages).
"""

from __future__ import annotations

import subprocess
import sys

import pytest


def _run(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "planner", *args], capture_output=True,
                          text=True, timeout=60)


@pytest.mark.parametrize(("args", "expected"), [
    (("nosuchcommand",), "error: No such command 'nosuchcommand'; see 'ringplan --help'"),
    (("plan",), "error: Missing argument 'STUDY_DIR'; see 'ringplan plan --help'"),
    (("status", "x", "--round"), "error: Option '--round' requires an argument"),
    (("print", "x", "--round", "1", "--offset-x", "abc"),
     "error: Invalid value for '--offset-x'"),
    (("rotate", "x", "--rounds", "0"), "error: Invalid value for '--rounds'"),
], ids=["command", "argument", "option-value", "number", "range"])
def test_a_usage_error_is_one_line_and_exit_2(args, expected):
    done = _run(*args)
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(expected), lines
    assert "Usage:" not in done.stderr and "Traceback" not in done.stderr
    assert done.stdout == ""


def test_plain_ringplan_shows_the_help():
    done = _run()
    assert done.returncode == 0 and "Commands" in done.stdout and done.stderr == ""


def test_help_is_unchanged_and_exit_0():
    done = _run("plan", "--help")
    assert done.returncode == 0 and "--round" in done.stdout
