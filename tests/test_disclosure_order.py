"""The record comes before the act: an opening or a printing of host documents is in the
ledger before the opened key or the first document exists, so that a process stopped in
between cannot leave a decryption nobody disclosed."""

from __future__ import annotations

import pytest

from conftest import LABS, ROUND, filled, receive, run_cli, write
from planner import audit, plan, render, seal, spec
from planner.ledger import Ledger


def test_no_key_json_without_its_recorded_opening(planned, runner, tmp_path, passphrase,
                                                  monkeypatch):
    for lab in LABS[:-1]:
        receive(runner, planned, write(tmp_path, f"{lab}.csv", filled(planned, lab)))

    def refuse(self, round_id, kind, detail=None):
        raise RuntimeError("stopped while recording")

    monkeypatch.setattr(Ledger, "record_event", refuse)
    with Ledger.open(planned) as ledger, pytest.raises(RuntimeError):
        audit.unseal_round(plan.round_study(planned, ROUND, ledger), planned, ROUND, ledger,
                           passphrase=passphrase, force=True, reason="crx late")
    assert not (plan.round_dir(planned, ROUND) / seal.KEY_NAME).exists()


def test_an_opening_recorded_but_not_written_is_completed_without_a_second_event(
        planned, runner, tmp_path, passphrase):
    for lab in LABS:
        receive(runner, planned, write(tmp_path, f"{lab}.csv", filled(planned, lab)))
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    key = plan.round_dir(planned, ROUND) / seal.KEY_NAME
    key.unlink()  # as if the process had stopped after the commit
    again = run_cli(runner, "unseal", planned, "--round", ROUND)
    assert again.exit_code == 0, again.stderr and key.is_file()
    with Ledger.open(planned) as ledger:
        assert len(ledger.events(ROUND, "unsealed")) == 1


def test_a_printing_of_host_documents_is_on_record_before_any_document(planned, passphrase,
                                                                       monkeypatch, runner):
    def stopped(*args, **kwargs):
        raise RuntimeError("stopped before the first page")

    monkeypatch.setattr(render, "print_round", stopped)
    result = run_cli(runner, "print", planned, "--round", ROUND, "--only", "prep")
    assert result.exit_code != 0
    assert not (plan.round_dir(planned, ROUND) / "host" / "prep-sheet.pdf").exists()
    with Ledger.open(planned) as ledger:
        (event,) = ledger.events(ROUND, "printed")
    assert event.detail["documents"] == ["host/prep-sheet.pdf"]
    status = run_cli(runner, "status", planned, "--round", ROUND)
    assert "to print host documents (host/prep-sheet.pdf)" in " ".join(status.stdout.split())


@pytest.mark.parametrize("options", [dict(), dict(lab="tor"), dict(only="labels"),
                                     dict(only="packing", lab="crx")])
def test_the_recorded_documents_are_the_ones_printed(planned, passphrase, options):
    folder = plan.round_dir(planned, ROUND)
    manifest = plan.read_manifest(folder)
    study = spec.load(planned)
    key = seal.open_key(folder, passphrase)
    wanted, geometry = render.check_options(study, planned, manifest, only=options.get("only"),
                                            lab=options.get("lab"))
    expected = render.planned_documents(study, manifest, wanted=wanted,
                                        labels=geometry is not None, lab=options.get("lab"))
    paths = render.print_round(study, planned, ROUND, key=key, workers=1, **options)
    assert sorted(expected) == sorted(p.relative_to(folder).as_posix() for p in paths)
