"""Spares: the host sends one for a damaged unit, the refusals, and intake expecting it.

The round is planned from the example study with the fixed secret of conftest (host kal,
5 laboratories, 1 spare per laboratory and 2 retained units per material); forms are the
CSV that ``plan`` wrote, filled in by editing lines. The key is decrypted independently
(``seal.open_key``) to check what the host sent.
"""

from __future__ import annotations

import json
import re
from datetime import date

import pytest
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

from planner import audit, codes, plan, seal, spares, spec, status
from planner.errors import IntakeError
from planner.ledger import Ledger
from planner.render import labels


def _key(study_dir):
    return seal.open_key(plan.round_dir(study_dir, ROUND), PASSPHRASE)


def _sent(result):
    """Return the compact code of the unit the host is told to send."""
    return codes.compact(re.search(r"send unit (\S+) to laboratory", result.stdout).group(1))


def _pdf_text(path):
    """Return the text of a PDF as pdfplumber extracts it, white space collapsed."""
    import pdfplumber

    with pdfplumber.open(str(path)) as pdf:
        return " ".join(" ".join(page.extract_text() or "" for page in pdf.pages).split())


def _spare(runner, study_dir, lab, damaged):
    return run_cli(runner, "spare", study_dir, "--round", ROUND, "--lab", lab,
                   "--damaged", codes.format(damaged))


def test_the_host_sends_a_spare_of_the_damaged_units_material(planned, runner, passphrase):
    manifest = manifest_of(planned)
    damaged = manifest["labs"]["crx"]["trials"][0][0]
    result = run_cli(runner, "spare", planned, "--round", ROUND, "--lab", "crx",
                     "--damaged", codes.format(damaged).lower())
    assert result.exit_code == 0, result.stderr
    units = {u["code"]: u for u in _key(planned)["units"]}
    spare = _sent(result)
    # the key, decrypted independently, says the unit is a spare the host kept, of the
    # damaged unit's material
    assert (units[spare]["kind"], units[spare]["lab"]) == ("spare", "kal")
    assert units[spare]["material"] == units[damaged]["material"]
    assert result.stdout.splitlines() == [
        "for the coordinator and the host only:",
        f"  host kal: send unit {codes.format(spare)} to laboratory crx (a spare)",
        f"  its label says 'spare' and no laboratory; to print it: ringplan print {planned} "
        f"--round {ROUND} --codes {codes.format(spare)}",
        f"tell laboratory crx: a replacement for unit {codes.format(damaged)} is on its way "
        "from the host; test it in that unit's place (trial 1, run 1) and report its result "
        "under the code on its label"]
    study = spec.load(planned)
    for m in study.materials:
        assert m.id not in result.stdout and m.description not in result.stdout
    with Ledger.open(planned) as ledger:
        assert [e.detail for e in ledger.events(ROUND, "spare-swap")] == [
            {"lab": "crx", "damaged": damaged, "spare": spare, "source": "spare"}]
    again = _spare(runner, planned, "crx", damaged)
    assert again.exit_code == 2
    assert again.stderr == (f"error: unit {codes.format(damaged)} was already replaced by unit "
                            f"{codes.format(spare)}\n")


def test_a_second_unit_of_the_same_material_gets_the_next_spare(planned, runner, passphrase):
    # With spares in the parcels (one per material) this request was refused: "no unused
    # spare left" told the laboratory that both units held one material.
    manifest = manifest_of(planned)
    units = {u["code"]: u for u in _key(planned)["units"]}
    first = manifest["labs"]["crx"]["trials"][0][0]
    twin = next(c for run in manifest["labs"]["crx"]["trials"][1:] for c in run
                if units[c]["material"] == units[first]["material"])
    a, b = _spare(runner, planned, "crx", first), _spare(runner, planned, "crx", twin)
    assert (a.exit_code, b.exit_code) == (0, 0), (a.stderr, b.stderr)
    assert _sent(a) != _sent(b)
    assert units[_sent(b)]["material"] == units[twin]["material"]


def test_the_spare_sent_is_drawn_at_random_from_the_pool(planned, runner, passphrase):
    # Sending the lowest unused code first would rank a laboratory's replacements: the
    # codes of its second and third replacement of one material would come in order,
    # linking its units across trials. Over repeated first requests every spare of the
    # pool comes up (5 spares; 60 draws miss one with probability 5 * 0.8**60 < 1e-5).
    import shutil

    manifest = manifest_of(planned)
    first = manifest["labs"]["crx"]["trials"][0][0]
    units = {u["code"]: u for u in _key(planned)["units"]}
    pool = {c for c, u in units.items() if u["kind"] == "spare"
            and u["material"] == units[first]["material"]}
    seen = set()
    for i in range(60):
        copy = planned.parent / f"copy{i}"
        shutil.copytree(planned, copy)
        done = _spare(runner, copy, "crx", first)
        assert done.exit_code == 0, done.stderr
        seen.add(_sent(done))
        shutil.rmtree(copy)
    assert seen == pool


def test_an_empty_pool_falls_back_to_retained_units_then_to_the_coordinator(planned):
    study = spec.load(planned)
    key = _key(planned)
    units = plan.units_from_key(key)
    material = study.materials[0].id
    pool = sorted(u.code for u in units if u.kind == "spare" and u.material == material)
    kept = sorted(u.code for u in units if u.kind == "retained" and u.material == material)
    assert (len(pool), len(kept)) == (5, 2)  # 5 laboratories x 1 spare; 2 retained
    damaged = [(u.lab, u.code) for u in units if u.kind == "test" and u.material == material]
    with Ledger.open(planned) as ledger:
        swaps = [spares.issue_spare(study, planned, ROUND, ledger, lab=lab, damaged=code,
                                    key=key) for lab, code in damaged[:7]]
        # the whole pool first (in an order drawn at random), then the retained units
        assert sorted(s.spare for s in swaps[:5]) == pool
        assert sorted(s.spare for s in swaps[5:]) == kept
        assert [s.source for s in swaps] == ["spare"] * 5 + ["retained"] * 2
        lab, code = damaged[7]
        with pytest.raises(IntakeError) as caught:
            spares.issue_spare(study, planned, ROUND, ledger, lab=lab, damaged=code, key=key)
        assert str(caught.value) == (
            f"for the coordinator: no unit of the material of {codes.format(code)} is left with "
            "the host (its spares and retained units are all issued), so nothing was recorded; "
            "the host prepares a replacement from its stock; tell laboratory "
            f"{lab!r} only that a replacement is on its way")
        assert len(ledger.events(ROUND, "spare-swap")) == 7
        # another material's pool is untouched
        other = next(u for u in units if u.kind == "test" and u.material != material)
        swap = spares.issue_spare(study, planned, ROUND, ledger, lab=other.lab,
                                  damaged=other.code, key=key)
    assert swap.source == "spare"


def test_intake_expects_the_spare_in_place_of_the_damaged_unit(planned, runner, tmp_path,
                                                             passphrase):
    lines = filled(planned, "crx")
    damaged = get_cell(lines, FIRST_ROW, "code", "crx")
    spare = codes.format(_sent(_spare(runner, planned, "crx", codes.compact(damaged))))
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
    issued = {r["lab"]: r["spares_issued"] for r in table.rows}
    assert issued == {"kal": 0, "tor": 0, "hel": 0, "lin": 0, "crx": 1}
    assert next(r for r in table.rows if r["lab"] == "crx")["missing"] == 0


def test_intake_refuses_a_spare_sent_to_another_laboratory(planned, runner, tmp_path,
                                                          passphrase):
    manifest = manifest_of(planned)
    spare = _sent(_spare(runner, planned, "tor", manifest["labs"]["tor"]["trials"][0][0]))
    lines = filled(planned, "crx")
    set_cell(lines, FIRST_ROW, "code", codes.format(spare), "crx")
    path = write(tmp_path, "crx.csv", lines)
    assert one_error(receive(runner, planned, path), path, FIRST_ROW) == (
        f"code {codes.format(spare)} belongs to laboratory 'tor', not to 'crx'")


def test_a_retained_unit_sent_is_expected_and_labelled_as_a_spare(planned, runner, tmp_path,
                                                                  passphrase):
    study = spec.load(planned)
    key = _key(planned)
    units = plan.units_from_key(key)
    material = next(u.material for u in units if u.kind == "test" and u.lab == "hel")
    others = [u for u in units if u.kind == "test" and u.material == material and u.lab != "hel"]
    with Ledger.open(planned) as ledger:
        for u in others[:5]:  # the host's 5 spares of the material go elsewhere
            spares.issue_spare(study, planned, ROUND, ledger, lab=u.lab, damaged=u.code,
                               key=key)
    hel = next(u.code for u in units if u.kind == "test" and u.material == material
               and u.lab == "hel")
    result = _spare(runner, planned, "hel", hel)
    assert result.exit_code == 0, result.stderr
    retained = _sent(result)
    assert "(a retained unit: the host's spares of this material are all issued)" in (
        result.stdout)
    assert next(u for u in units if u.code == retained).kind == "retained"
    # the label the host prints for it says "spare" and no laboratory, like any spare's
    printed = run_cli(runner, "print", planned, "--round", ROUND, "--codes",
                      codes.format(retained))
    assert printed.exit_code == 0, printed.stderr
    text = _pdf_text(plan.round_dir(planned, ROUND) / "host" / "labels-reprint.pdf")
    assert codes.format(retained) in text and "spare" in text
    assert "retained" not in text and "for " not in text
    # and intake takes its result from hel in place of the damaged unit
    lines = filled(planned, "hel")
    row = next(i for i in range(FIRST_ROW, len(lines) + 1)
               if codes.compact(get_cell(lines, i, "code", "hel")) == hel)
    set_cell(lines, row, "code", codes.format(retained), "hel")
    path = write(tmp_path, "hel.csv", lines)
    done = receive(runner, planned, path)
    assert done.exit_code == 0, done.stderr


def test_host_labels_hold_the_spares_without_a_destination(planned):
    study = spec.load(planned)
    key = _key(planned)
    manifest = manifest_of(planned)
    items = labels.host_labels(study, manifest, key)
    kinds = {u["code"]: u["kind"] for u in key["units"]}
    material_of = {u["code"]: u["material"] for u in key["units"]}
    spare_labels = [i for i in items if isinstance(i, labels.Label) and kinds[i.code] == "spare"]
    assert len(spare_labels) == 5 * len(study.materials)
    assert all(i.trial == "spare" and i.lab == () for i in spare_labels)
    # under each material: its test units first, then the spares, retained, homogeneity
    order = {"test": 0, "spare": 1, "retained": 2, "homogeneity": 3}
    current: list[int] = []
    for item in items + [labels.Separator("", "", 0, "")]:
        if isinstance(item, labels.Separator):
            assert current == sorted(current)
            current = []
        else:
            current.append(order[kinds[item.code]])
    assert len({material_of[i.code] for i in spare_labels}) == len(study.materials)
    for lab in ("kal", "tor"):
        mine = labels.lab_labels(study, manifest, key, lab)
        assert not any(kinds[i.code] == "spare" for i in mine)


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


# --- a round planned while every parcel carried spares -------------------------------


def _as_planned_with_parcel_spares(study_dir):
    """Give the round's manifest the per-laboratory spare lists such a round had."""
    manifest = manifest_of(study_dir)
    pool = manifest["host_units"].pop("spare")
    for i, entry in enumerate(manifest["labs"].values()):
        entry["spares"] = pool[6 * i:6 * i + 6]
    path = plan.round_dir(study_dir, ROUND) / plan.MANIFEST_NAME
    path.write_text(json.dumps(manifest, indent=1) + "\n", encoding="utf-8")
    return manifest


def test_intake_still_reads_a_round_planned_with_parcel_spares(planned, runner, tmp_path):
    manifest = _as_planned_with_parcel_spares(planned)
    tor = manifest["labs"]["tor"]
    damaged, spare = tor["trials"][0][0], tor["spares"][0]
    lines = filled(planned, "tor")
    set_cell(lines, FIRST_ROW, "code", codes.format(spare), "tor")
    path = write(tmp_path, "tor.csv", lines)
    assert one_error(receive(runner, planned, path), path, FIRST_ROW) == (
        f"{codes.format(spare)} is a spare of this laboratory that was not issued; run "
        "'ringplan spare' for the damaged unit first, or correct the code")
    with Ledger.open(planned) as ledger, ledger.transaction():
        # the event as such a round recorded it: no source
        ledger.record_event(ROUND, "spare-swap", {"lab": "tor", "damaged": damaged,
                                                  "spare": spare})
    done = receive(runner, planned, path)
    assert done.exit_code == 0, done.stderr
    with Ledger.open(planned) as ledger:
        table = status.round_status_table(spec.load(planned), planned, ROUND, ledger,
                                          today=date(2027, 1, 30))
    assert next(r for r in table.rows if r["lab"] == "tor")["spares_issued"] == 1


def test_a_key_with_parcel_spares_still_verifies(planned):
    key = _key(planned)
    study = spec.load(planned)
    frame = plan.frame_from_key(key)
    secret = bytes.fromhex(key["secret"])
    before = plan.build_units(frame, host=key["host"], secret=secret, spares_in_parcels=True)
    old = {**key, "format": "ringplan-key/2",
           "units": [{"code": u.code, "material": u.material, "kind": u.kind, "lab": u.lab,
                      "trial": u.trial, "position": u.position}
                     for u in sorted(before, key=lambda u: u.code)]}
    assert {u["lab"] for u in old["units"] if u["kind"] == "spare"} == {
        lab.id for lab in study.laboratories}
    old_json = seal.canonical(old)
    manifest = {**manifest_of(planned), "fingerprint": seal.fingerprint(old_json)}
    verdict = audit.verify_key(old_json, manifest, fingerprint=seal.fingerprint(old_json),
                               path=plan.round_dir(planned, ROUND) / "key.json")
    assert verdict.ok, verdict
    # and a new key is rebuilt with the host keeping the spares, not the old way
    new = seal.canonical(key)
    assert audit.verify_key(new, manifest_of(planned), fingerprint=None,
                            path=plan.round_dir(planned, ROUND) / "key.json").ok
    relabelled = {**key, "units": old["units"]}
    wrong = seal.canonical(relabelled)
    verdict = audit.verify_key(wrong, {**manifest_of(planned),
                                       "fingerprint": seal.fingerprint(wrong)},
                               fingerprint=None, path=plan.round_dir(planned, ROUND) / "key.json")
    assert any("lab is 'tor', rebuilt 'kal'" in d for d in verdict.differences)
