"""Spares: issuing a spare for a damaged unit, the refusals, and intake expecting it.

The round is planned from the example study with the fixed secret of conftest;
forms are the CSV that ``plan`` wrote, filled in by editing lines. The key is
decrypted independently (``seal.open_key``) to check what the spare is.
"""

from __future__ import annotations

from datetime import date

from conftest import (
    FIRST_ROW,
    PASSPHRASE,
    ROUND,
    filled,
    get_cell,
    manifest_of,
    mistype,
    one_error,
    receive,
    run_cli,
    set_cell,
    write,
)

from planner import codes, plan, seal, spec, status
from planner.ledger import Ledger


def _key(study_dir):
    return seal.open_key(plan.round_dir(study_dir, ROUND), PASSPHRASE)


def test_spare_replaces_a_damaged_unit_without_naming_the_material(planned, runner, tmp_path,
                                                                 passphrase):
    manifest = manifest_of(planned)
    damaged = manifest["labs"]["crx"]["trials"][0][0]
    result = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", codes.format(damaged).lower())
    assert result.exit_code == 0, result.stderr
    units = {u["code"]: u for u in _key(planned)["units"]}
    spare = codes.compact(result.stdout.split("use spare ")[1].split()[0])
    # the key, decrypted independently, says the spare is crx's and of the damaged unit's material
    assert units[spare]["kind"] == "spare" and units[spare]["lab"] == "crx"
    assert units[spare]["material"] == units[damaged]["material"]
    study = spec.load(planned)
    for m in study.materials:
        assert m.id not in result.stdout and m.description not in result.stdout
    assert "(trial 1, position 1)" in result.stdout
    with Ledger.open(planned) as ledger:
        assert [e.detail for e in ledger.events(ROUND, "spare-swap")] == [
            {"lab": "crx", "damaged": damaged, "spare": spare}]
    again = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                    "--damaged", codes.format(damaged))
    assert again.exit_code == 2 and "already replaced by spare" in again.stderr
    # the same material in another trial: crx had one spare of it (spares_per_lab: 1)
    twin = next(c for run in manifest["labs"]["crx"]["trials"][1:] for c in run
                if units[c]["material"] == units[damaged]["material"])
    none_left = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                        "--damaged", codes.format(twin))
    assert none_left.exit_code == 2 and "no unused spare left" in none_left.stderr
    for m in study.materials:
        assert m.id not in none_left.stderr


def test_intake_expects_the_spare_in_place_of_the_damaged_unit(planned, runner, tmp_path,
                                                             passphrase):
    lines = filled(planned, "crx")
    damaged = get_cell(lines, FIRST_ROW, "code", "crx")
    issued = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", damaged)
    spare = issued.stdout.split("use spare ")[1].split()[0]
    old = write(tmp_path, "old.csv", lines)
    assert f"unit {damaged} was replaced by spare {spare}" in one_error(
        receive(runner, planned, old), old, FIRST_ROW)
    set_cell(lines, FIRST_ROW, "code", spare, "crx")
    new = write(tmp_path, "new.csv", lines)
    result = receive(runner, planned, new)
    assert result.exit_code == 0, result.stderr
    with Ledger.open(planned) as ledger:
        rows = {r.code: r for r in ledger.result_rows(ledger.submissions(ROUND)[0].row)}
        table = status.round_status_table(spec.load(planned), planned, ROUND, ledger,
                                          today=date(2027, 1, 30))
    row = rows[codes.compact(spare)]
    assert (row.trial, row.position, row.flags) == (1, 1, ("spare",))
    assert codes.compact(damaged) not in rows
    crx = next(r for r in table.rows if r["lab"] == "crx")
    assert (crx["missing"], crx["spares_issued"]) == (0, 1)


def test_spare_refusals(planned, runner, tmp_path, passphrase):
    manifest = manifest_of(planned)
    other = codes.format(manifest["labs"]["tor"]["trials"][0][0])
    result = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", other)
    assert result.exit_code == 2 and "is not a unit that laboratory 'crx' tests" in result.stderr
    mistyped = mistype(codes.format(manifest["labs"]["crx"]["trials"][0][0]))
    result = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", mistyped)
    assert result.exit_code == 2 and "check character does not match" in result.stderr
    wrong = tmp_path / "pass.txt"
    wrong.write_text("not-the-passphrase\n")
    result = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", codes.format(manifest["labs"]["crx"]["trials"][0][0]),
                     "--passphrase-file", wrong)
    assert result.exit_code == 2 and "wrong passphrase" in result.stderr
    with Ledger.open(planned) as ledger:
        assert ledger.events(ROUND, "spare-swap") == []
