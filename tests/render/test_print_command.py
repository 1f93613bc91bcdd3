"""`ringplan print` through the CLI runner: files, the ledger's "printed" status, one-line errors."""

from __future__ import annotations

from pathlib import Path

from planner.ledger import Ledger
from tests.conftest import run_cli
from tests.render.conftest import PASSPHRASE, ROUND, plan_example


def test_print_writes_the_documents_and_marks_the_round_printed(tmp_path, runner):
    study_dir = tmp_path / "norrvik-mfr"
    plan_example(study_dir)
    secret = tmp_path / "pass.txt"
    secret.write_text(PASSPHRASE + "\n", encoding="utf-8")
    result = run_cli(runner, "print", study_dir, "--round", ROUND, "--only", "packing",
                     "--lab", "crx", "--passphrase-file", secret)
    assert result.exit_code == 0, result.output
    assert (study_dir / "rounds" / ROUND / "labs" / "crx" / "packing-list.pdf").is_file()
    with Ledger.open(study_dir) as ledger:
        assert ledger.round_status(ROUND) == "printed"
        (event,) = ledger.events(ROUND, "printed")
    assert event.detail["documents"] == ["labs/crx/packing-list.pdf"]


def test_print_mistakes_are_one_line_and_exit_2(tmp_path, runner):
    study_dir = tmp_path / "norrvik-mfr"
    plan_example(study_dir)
    secret = tmp_path / "pass.txt"
    secret.write_text(PASSPHRASE + "\n", encoding="utf-8")
    result = run_cli(runner, "print", study_dir, "--round", ROUND, "--only", "letters",
                     "--passphrase-file", secret)
    assert result.exit_code == 2
    assert result.stderr.strip() == ("error: --only: 'letters' is not a kind of document; use "
                                     "one of labels, prep, packing, runsheets, forms")
    with Ledger.open(study_dir) as ledger:
        assert ledger.round_status(ROUND) == "planned"


def test_calibration_page_needs_no_round(tmp_path, runner):
    study_dir = tmp_path / "norrvik-mfr"
    plan_example(study_dir)
    result = run_cli(runner, "print", study_dir, "--calibration", "--sheet", "roll-57x32",
                     "--offset-x", "0.5")
    assert result.exit_code == 0, result.output
    assert (study_dir / "calibration-roll-57x32.pdf").is_file()


def test_option_mistakes_are_named_before_the_passphrase(tmp_path, monkeypatch):
    """With no passphrase anywhere, a wrong --sheet or --only is still the one line shown."""
    import shutil

    from typer.testing import CliRunner

    from planner import calendar, plan, spec
    from planner.cli import app
    from planner.ledger import Ledger

    root = Path(__file__).resolve().parents[2]
    folder = tmp_path / "s"
    shutil.copytree(root / "examples" / "norrvik-mfr", folder)
    study = spec.load(folder)
    result = plan.plan_round(study, round_id="R1", host="kal",
                             dates=calendar.schedule_round(study, "kal"), secret=bytes(32))
    with Ledger.open(folder) as ledger:
        plan.write_round(study, folder, result, ledger, passphrase="a long test passphrase")
    monkeypatch.delenv("RINGPLAN_PASSPHRASE", raising=False)
    for args, expected in ((["--sheet", "nope"], "error: --sheet: no label sheet called 'nope'"),
                           (["--only", "lables"], "error: --only: 'lables' is not a kind")):
        run = CliRunner().invoke(app, ["print", str(folder), "--round", "R1", *args])
        assert run.exit_code == 2 and run.stderr.startswith(expected), run.stderr
