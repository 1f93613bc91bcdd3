"""`ringplan print` through the CLI runner: files, the ledger's "printed" status, one-line errors."""

from __future__ import annotations

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
