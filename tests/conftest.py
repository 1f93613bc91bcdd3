"""What many test modules share: the example study, a fixed secret, a CLI runner."""

from __future__ import annotations

import shutil
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
EXAMPLE = ROOT / "examples" / "norrvik-mfr"
SECRET = bytes(range(32))
PASSPHRASE = "correct-horse-battery"


@pytest.fixture
def example_dir(tmp_path: Path) -> Path:
    """A fresh copy of the example study folder."""
    target = tmp_path / "norrvik-mfr"
    shutil.copytree(EXAMPLE, target)
    return target


@pytest.fixture
def passphrase(monkeypatch: pytest.MonkeyPatch) -> str:
    monkeypatch.setenv("RINGPLAN_PASSPHRASE", PASSPHRASE)
    return PASSPHRASE


@pytest.fixture
def runner():
    from typer.testing import CliRunner

    return CliRunner()


def run_cli(runner, *args: str):
    """Invoke the CLI in-process; return the click Result (exit_code, stdout, stderr)."""
    from planner.cli import app

    return runner.invoke(app, [str(a) for a in args])
