"""Planning a round: units, determinism, no leakage, and all-or-nothing writing."""

from __future__ import annotations

import json
import os
from collections import Counter
from pathlib import Path

import pytest

from conftest import EXAMPLE, PASSPHRASE, ROOT, SECRET
from planner import calendar, codes, plan, seal, spec
from planner.errors import LedgerError
from planner.ledger import Ledger

SMALL = """
study: {id: tiny, title: Tiny study, measurand: mass, unit: g}
laboratories:
  - {id: a, name: Lab A, address: [Street 1], contact: {name: A}, country: SE, can_host: true}
  - {id: b, name: Lab B, address: [Street 2], contact: {name: B}, country: SE, decimal: comma}
materials:
  - {id: M1, description: first, amount: 5, amount_unit: g, storage: dry, stability_days: 90}
  - {id: M2, description: second, amount: 5, amount_unit: g, storage: dry, stability_days: 90}
  - {id: M3, description: third, amount: 5, amount_unit: g, storage: dry, stability_days: 90}
design: {trials: 2, spares_per_lab: 1, retained_by_host: 1, homogeneity_units: 2, run_order: random}
schedule: {receive_by: 2027-03-10, test_window_days: 5, reporting_days: 3}
"""


def _plan(study, secret=SECRET, round_id="R1", host=None):
    host = host or study.hosts[0].id
    return plan.plan_round(study, round_id=round_id, host=host,
                           dates=calendar.schedule_round(study, host), secret=secret)


def test_unit_counts_and_kinds():
    study = spec.parse(SMALL)
    result = _plan(study)
    kinds = Counter((u.material, u.kind) for u in result.units)
    for m in ("M1", "M2", "M3"):
        # one unit per laboratory per trial, plus spares, retained and homogeneity units
        assert kinds[(m, "test")] == 2 * 2 and kinds[(m, "spare")] == 2
        assert kinds[(m, "retained")] == 1 and kinds[(m, "homogeneity")] == 2
    assert len({u.code for u in result.units}) == len(result.units)
    assert all(codes.is_valid(u.code) for u in result.units)
    for lab in ("a", "b"):
        for trial in (1, 2):
            run = sorted(u.position for u in result.units
                         if u.kind == "test" and u.lab == lab and u.trial == trial)
            assert run == [1, 2, 3]


def test_same_spec_and_secret_rebuild_identical_bytes():
    study = spec.parse(SMALL)
    first, second = _plan(study), _plan(study)
    assert seal.canonical(plan.key_of(first)) == seal.canonical(plan.key_of(second))
    assert plan.manifest_of(study, first) == plan.manifest_of(study, second)
    other = _plan(study, secret=bytes(32))
    assert {u.code for u in other.units}.isdisjoint({u.code for u in first.units})


def test_golden_manifest():
    """Regression pin of the deterministic stream: the bytes of a small round must never change
    between machines or library versions (the file is our own earlier output on purpose: its job
    is to catch a change, not to prove correctness)."""
    golden = json.loads((ROOT / "tests" / "data" / "golden_small_round.json").read_text())
    study = spec.parse(SMALL)
    result = _plan(study)
    manifest = plan.manifest_of(study, result)
    assert manifest["fingerprint"] == golden["fingerprint"]
    assert {lab: v["trials"] for lab, v in manifest["labs"].items()} == golden["trials"]
    assert manifest["host_units"]["spare"] == golden["host_spares"]
    # a round planned while parcels carried spares rebuilds with each spare where it was
    before = plan.build_units(study, host=result.host, secret=SECRET, spares_in_parcels=True)
    assert {lab: sorted(u.code for u in before if u.kind == "spare" and u.lab == lab)
            for lab in ("a", "b")} == golden["parcel_spares"]
    assert [(u.code, u.kind) for u in before] == [(u.code, u.kind) for u in result.units]


def test_codes_avoid_every_code_issued_before():
    study = spec.parse(SMALL)
    first = _plan(study)
    taken = {u.code for u in first.units}
    again = plan.plan_round(study, round_id="R2", host="a",
                            dates=calendar.schedule_round(study, "a"), secret=SECRET, taken=taken)
    assert taken.isdisjoint(u.code for u in again.units)


def test_code_does_not_predict_material():
    """Contingency chi-square of code-rank bins against material over a large plan (no leakage)."""
    from scipy.stats import chi2_contingency

    text = SMALL.replace("trials: 2", "trials: 3")
    labs = "\n".join(f"  - {{id: l{i}, name: Lab {i}, address: [x], contact: {{name: X}}, "
                     f"country: SE, can_host: true}}" for i in range(120))
    text = text.replace(text[text.index("laboratories:"):text.index("materials:")],
                        "laboratories:\n" + labs + "\n")
    study = spec.parse(text)
    result = _plan(study, host="l0")
    tests = sorted((u for u in result.units if u.kind == "test"), key=lambda u: u.code)
    bins = 8
    table = [[0] * 3 for _ in range(bins)]
    for rank, unit in enumerate(tests):
        table[rank * bins // len(tests)][int(unit.material[1]) - 1] += 1
    assert chi2_contingency(table).pvalue > 0.001
    first_char = [[0] * 3 for _ in range(32)]
    for unit in tests:
        first_char[codes.ALPHABET.index(unit.code[0])][int(unit.material[1]) - 1] += 1
    assert chi2_contingency(first_char).pvalue > 0.001


def _write(study, folder, result, **kwargs):
    with Ledger.open(folder) as ledger:
        return plan.write_round(study, folder, result, ledger, passphrase=PASSPHRASE, **kwargs)


def test_round_folder_reveals_no_material(example_dir):
    study = spec.load(example_dir)
    result = _plan(study, host="kal")
    folder = _write(study, example_dir, result)
    names = [m.id for m in study.materials] + [m.description for m in study.materials]
    for path in folder.rglob("*"):
        if path.is_file():
            data = path.read_bytes()
            for name in names:
                assert name.encode() not in data, (path, name)
    manifest = plan.read_manifest(folder)
    assert manifest["fingerprint"] == (folder / "key.fingerprint").read_text().strip()
    assert not (folder / "key.json").exists()
    assert oct((folder / "key.sealed").stat().st_mode & 0o777) == "0o600"
    key = seal.open_key(folder, PASSPHRASE)
    assert {u.code for u in plan.units_from_key(key)} == {u.code for u in result.units}


def test_result_form_lists_run_order_and_uses_the_lab_decimal(example_dir):
    study = spec.load(example_dir)
    result = _plan(study, host="kal")
    folder = _write(study, example_dir, result)
    manifest = plan.read_manifest(folder)
    text = (folder / "labs" / "tor" / "result-form.csv").read_text()
    assert "# fingerprint: " + result.fingerprint in text
    assert "trial;position;code;value" in text  # 'tor' writes a decimal comma: ';' separates
    rows = [line.split(";") for line in text.splitlines() if line[:1].isdigit()]
    assert [r[2] for r in rows] == [codes.format(c) for run in manifest["labs"]["tor"]["trials"]
                                    for c in run]
    assert "trial,position,code" in (folder / "labs" / "crx" / "result-form.csv").read_text()


def test_failure_after_files_leaves_nothing(example_dir):
    study = spec.load(example_dir)
    result = _plan(study, host="kal")
    with pytest.raises(RuntimeError, match="injected"):
        _write(study, example_dir, result, _fail_after_files=True)
    assert list((example_dir / "rounds").iterdir()) == []
    with Ledger.open(example_dir) as ledger:
        assert ledger.rounds() == [] and ledger.codes() == set() and ledger.events("R1") == []


def test_replanning_is_refused_unless_replace_and_untouched(example_dir):
    study = spec.load(example_dir)
    _write(study, example_dir, _plan(study, host="kal"))
    with pytest.raises(LedgerError, match="already planned"):
        _write(study, example_dir, _plan(study, secret=bytes(32), host="kal"))
    again = _plan(study, secret=bytes(32), host="kal")
    folder = _write(study, example_dir, again, replace=True)
    assert plan.read_manifest(folder)["fingerprint"] == again.fingerprint
    assert sorted(p.name for p in (example_dir / "rounds").iterdir()) == ["R1"]
    with Ledger.open(example_dir) as ledger:
        with ledger.transaction():
            ledger.record_event("R1", "printed", {})
    with pytest.raises(LedgerError, match="has been printed"):
        _write(study, example_dir, _plan(study, secret=bytes([7]) * 32, host="kal"), replace=True)


def test_compare_units_names_each_difference():
    study = spec.parse(SMALL)
    units = list(_plan(study).units)
    edited = list(units)
    edited[0] = plan.Unit(units[0].code, "M9", units[0].kind, units[0].lab, units[0].trial,
                          units[0].position)
    lines = plan.compare_units(units, edited[1:] + [edited[0]])
    assert lines == [f"unit {codes.format(units[0].code)}: material is 'M9', rebuilt "
                     f"{units[0].material!r}"]


if __name__ == "__main__":  # regenerate the golden pin deliberately, never in a test run
    study = spec.parse(SMALL)
    manifest = plan.manifest_of(study, _plan(study))
    Path(ROOT / "tests" / "data" / "golden_small_round.json").write_text(json.dumps({
        "note": "regression pin of planner.draw/codes/design for the SMALL study in "
                "tests/test_plan.py with secret bytes(range(32)); regenerate only on purpose",
        "fingerprint": manifest["fingerprint"],
        "trials": {lab: v["trials"] for lab, v in manifest["labs"].items()},
        "host_spares": manifest["host_units"]["spare"],
        "parcel_spares": {lab.id: sorted(u.code for u in plan.build_units(
            study, host=manifest["host"], secret=SECRET, spares_in_parcels=True)
            if u.kind == "spare" and u.lab == lab.id) for lab in study.laboratories},
    }, indent=1) + "\n")
    print("wrote golden", os.getcwd(), EXAMPLE.name)
