"""A planned round is frozen: editing study.yaml afterwards (a laboratory added or removed,
materials reordered, evaluation settings changed) changes nothing about that round, as a
careless or dishonest coordinator would find when trying."""

from __future__ import annotations

import json

import pytest

from conftest import LABS, ROUND, filled, receive, run_cli, write
from planner import plan, spec
from planner.errors import LedgerError
from planner.ledger import Ledger

NEW_LAB = """  - id: nya
    name: Nya Lab
    address: [Road 1, 123 45 Town]
    contact: {name: A. Person}
    country: SE
"""


def _edit(study_dir, old, new):
    path = study_dir / "study.yaml"
    text = path.read_text(encoding="utf-8")
    assert old in text, old
    path.write_text(text.replace(old, new, 1), encoding="utf-8")


def _all_in(planned, runner, tmp_path):
    for lab in LABS:
        assert receive(runner, planned, write(tmp_path, f"{lab}.csv",
                                              filled(planned, lab))).exit_code == 0


def test_a_laboratory_added_after_planning_is_not_in_the_round(planned, runner, tmp_path,
                                                                 passphrase):
    _all_in(planned, runner, tmp_path)
    _edit(planned, "materials:\n", "")  # put the new laboratory before the materials list
    _edit(planned, "\n  - id: HD-BM5", "\nmaterials:\n  - id: HD-BM5")
    _edit(planned, "laboratories:\n", "laboratories:\n" + NEW_LAB)
    assert "nya" in [lab.id for lab in spec.load(planned).laboratories]
    status = run_cli(runner, "status", planned, "--round", ROUND, "--json")
    assert status.exit_code == 0, status.stderr
    info = json.loads(status.stdout)
    assert info["may_open"] is True and "nya" not in [r["lab"] for r in info["rows"]]
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    verified = run_cli(runner, "verify", planned, "--round", ROUND)
    assert verified.exit_code == 0, verified.stderr
    evaluated = run_cli(runner, "evaluate", planned, "--round", ROUND)
    assert evaluated.exit_code == 0, evaluated.stderr
    report = plan.round_dir(planned, ROUND) / "report"
    assert not (report / "letter-nya.pdf").exists()
    assert sorted(p.name for p in report.glob("letter-*.pdf")) == sorted(
        f"letter-{lab}.pdf" for lab in LABS)


def test_a_laboratory_removed_after_planning_keeps_its_results(planned, runner, tmp_path,
                                                                passphrase):
    _all_in(planned, runner, tmp_path)
    text = (planned / "study.yaml").read_text(encoding="utf-8")
    start = text.index("  - id: crx")
    end = text.index("\n  - id:", start + 5) if "\n  - id:" in text[start + 5:text.index(
        "materials:")] else text.index("materials:")
    (planned / "study.yaml").write_text(text[:start] + text[end:].lstrip("\n"),
                                        encoding="utf-8")
    assert "crx" not in [lab.id for lab in spec.load(planned).laboratories]
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    assert run_cli(runner, "evaluate", planned, "--round", ROUND).exit_code == 0
    stats = json.loads((plan.round_dir(planned, ROUND) / "report" / "statistics.json")
                       .read_text(encoding="utf-8"))
    assert stats["results"]["per_lab"]["crx"] == 6 * 3
    assert (plan.round_dir(planned, ROUND) / "report" / "letter-crx.pdf").is_file()


def test_materials_reordered_and_settings_changed_do_not_touch_the_round(planned, runner,
                                                                          tmp_path, passphrase):
    _all_in(planned, runner, tmp_path)
    _edit(planned, "  sigma_pt: {percent: 5}", "  sigma_pt: 0.001")
    with Ledger.open(planned) as ledger:
        frozen = plan.round_study(planned, ROUND, ledger)
    today = spec.load(planned)
    assert frozen.evaluation.sigma_pt.percent == 5 and today.evaluation.sigma_pt.value == 0.001
    assert run_cli(runner, "unseal", planned, "--round", ROUND).exit_code == 0
    assert run_cli(runner, "verify", planned, "--round", ROUND).exit_code == 0
    assert run_cli(runner, "evaluate", planned, "--round", ROUND).exit_code == 0
    stats = json.loads((plan.round_dir(planned, ROUND) / "report" / "statistics.json")
                       .read_text(encoding="utf-8"))
    settings = stats["measurands"]["value"]["settings"]
    assert set(settings["sigma_pt"].values()) == {"5 % of the assigned value"}


def test_the_definition_is_committed_in_the_fingerprint_and_the_manifest(planned):
    folder = plan.round_dir(planned, ROUND)
    manifest = plan.read_manifest(folder)
    with Ledger.open(planned) as ledger:
        detail = ledger.events(ROUND, "planned")[-1].detail
    from planner import seal

    data = seal.canonical(detail["round"])
    assert seal.fingerprint(data) == detail["definition"] == manifest["definition"]
    key = seal.open_key(folder, "correct horse battery staple"
                        if False else __import__("conftest").PASSPHRASE)
    assert key["definition"] == manifest["definition"]  # so the printed fingerprint covers it
    assert plan.study_of_definition(data, where=None) == spec.load(planned)


def test_a_manifest_pointing_to_another_definition_is_refused(planned, runner):
    path = plan.round_dir(planned, ROUND) / plan.MANIFEST_NAME
    manifest = json.loads(path.read_text(encoding="utf-8"))
    manifest["definition"] = "0" * 64
    path.write_text(json.dumps(manifest), encoding="utf-8")
    result = run_cli(runner, "status", planned, "--round", ROUND)
    assert result.exit_code == 2
    assert "the manifest names another round definition than the ledger" in result.stderr
    with Ledger.open(planned) as ledger, pytest.raises(LedgerError):
        plan.round_study(planned, ROUND, ledger)


def _edit_manifest(study_dir, change):
    path = plan.round_dir(study_dir, ROUND) / plan.MANIFEST_NAME
    manifest = json.loads(path.read_text(encoding="utf-8"))
    change(manifest)
    path.write_text(json.dumps(manifest, indent=1), encoding="utf-8")


def test_dates_edited_in_the_manifest_are_refused(planned, runner, tmp_path):
    # Moving results_due would make a late form look on time.
    _edit_manifest(planned, lambda m: m["dates"].__setitem__("results_due", "2027-12-31"))
    for args in (("status", planned, "--round", ROUND),
                 ("receive", planned, "--round", ROUND,
                  write(tmp_path, "kal.csv", filled(planned, "kal")))):
        result = run_cli(runner, *args)
        assert result.exit_code == 2
        assert "its dates are not the ones the ledger recorded" in result.stderr, args


def test_run_orders_edited_in_the_manifest_are_refused(planned, runner):
    def swap(m):
        run = m["labs"]["kal"]["trials"][0]
        run[0], run[1] = run[1], run[0]

    _edit_manifest(planned, swap)
    result = run_cli(runner, "status", planned, "--round", ROUND)
    assert result.exit_code == 2 and "its run orders are not the ones" in result.stderr
