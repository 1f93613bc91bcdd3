"""A participant asks for spares to learn which of its units share a material, and fails.

The attacker is a participating laboratory (tor) of the example round (5 laboratories, 1
spare per laboratory and 2 retained units per material, host kal). It reports units damaged
and hears only what the coordinator tells it: the "tell laboratory" line of ``ringplan
spare``. The test reads that line with every code and run position masked (the laboratory
knows those from its own run sheet and labels; they say nothing of the material) and opens
the key only to pick the units.

Before, each parcel carried one spare of each material and the laboratory's own spare was
issued: a second request for a unit of the same material was refused ("no unused spare
left") and one for another material was answered, so two requests told the laboratory with
certainty whether two of its units held the same material. Now the host keeps the spares,
and every answer is the same sentence, 7 times in a row for one material (5 spares, then
the 2 retained units), until the host has no unit of that material left; that answer goes to
the coordinator, who tells the laboratory the same thing. Nothing the laboratory receives
lists a spare.
"""

from __future__ import annotations

import re
import shutil

import pytest
from conftest import EXAMPLE, PASSPHRASE, ROUND, plan_example_round, run_cli

from planner import codes, plan, seal

LAB = "tor"
_CODE = re.compile(r"\b[0-9A-Z]{4}-[0-9A-Z]{5}\b")
_PLACE = re.compile(r"\(trial \d+, run \d+\)")


def _round(base, name):
    target = base / name
    shutil.copytree(EXAMPLE, target)
    plan_example_round(target)
    return target


def _units(study_dir):
    key = seal.open_key(plan.round_dir(study_dir, ROUND), PASSPHRASE)
    return {u["code"]: u for u in key["units"]}


def _ask(runner, study_dir, damaged):
    """Ask for a replacement for one of tor's units; return (what tor is told, the result)."""
    result = run_cli(runner, "spare", study_dir, "--round", ROUND, "--lab", LAB,
                     "--damaged", codes.format(damaged))
    told = [line for line in result.stdout.splitlines() if line.startswith("tell laboratory")]
    masked = [_PLACE.sub("(trial T, run P)", _CODE.sub("XXXX-XXXXX", line)) for line in told]
    return masked, result


def _sent(result):
    return codes.compact(re.search(r"send unit (\S+) to laboratory", result.stdout).group(1))


def _tor_units_by_material(study_dir):
    units = _units(study_dir)
    out: dict[str, list[str]] = {}
    for code, u in units.items():
        if u["kind"] == "test" and u["lab"] == LAB:
            out.setdefault(u["material"], []).append(code)
    return out


@pytest.fixture
def two_rounds(tmp_path, clock, passphrase):
    """The same round planned twice (same spec, same secret), in two study folders."""
    return _round(tmp_path, "same"), _round(tmp_path, "different")


def test_two_units_of_one_material_and_of_two_get_the_same_answers(two_rounds, runner):
    same, different = two_rounds
    mine = _tor_units_by_material(same)
    first, second = sorted(mine)[:2]
    # (a) two units of one material; (b) the same first unit, then one of another material
    asked = {"same": [(same, mine[first][0]), (same, mine[first][1])],
             "different": [(different, mine[first][0]), (different, mine[second][0])]}
    heard = {}
    for case, requests in asked.items():
        heard[case] = []
        for folder, damaged in requests:
            told, result = _ask(runner, folder, damaged)
            assert result.exit_code == 0, (case, result.stderr)
            heard[case] += told
    assert len(heard["same"]) == len(heard["different"]) == 2
    assert heard["same"] == heard["different"]
    assert heard["same"][0] == heard["same"][1] == (
        "tell laboratory tor: a replacement for unit XXXX-XXXXX is on its way from the host; "
        "test it in that unit's place (trial T, run P) and report its result under the code "
        "on its label")


def test_every_answer_is_the_same_until_the_host_has_none_of_the_material(planned, runner,
                                                                        passphrase):
    units = _units(planned)
    mine = _tor_units_by_material(planned)
    material = sorted(mine)[0]
    # tor's 3 units of the material, then each replacement as if it arrived broken too
    queue = list(mine[material])
    heard = []
    while True:
        told, result = _ask(runner, planned, queue.pop(0))
        if result.exit_code != 0:
            break
        heard += told
        sent = _sent(result)
        assert units[sent]["material"] == material
        queue.append(sent)
    # 5 laboratories x 1 spare, then the host's 2 retained units of the material
    assert len(heard) == 7
    assert len(set(heard)) == 1
    # the last answer is for the coordinator, and tells tor nothing new
    assert result.exit_code == 2 and "tell laboratory" not in result.stdout
    assert result.stderr.startswith("error: for the coordinator: no unit of the material of ")
    assert result.stderr.rstrip().endswith(
        "tell laboratory 'tor' only that a replacement is on its way")
    # another material is answered with the same sentence
    other = next(m for m in sorted(mine) if m != material)
    told, result = _ask(runner, planned, mine[other][0])
    assert result.exit_code == 0 and told == heard[:1]


def test_a_laboratorys_documents_list_no_spare(planned, runner, passphrase):
    import pdfplumber

    done = run_cli(runner, "print", planned, "--round", ROUND, "--lab", LAB)
    assert done.exit_code == 0, done.stderr
    units = _units(planned)
    tests = {codes.format(c) for c, u in units.items() if u["kind"] == "test" and u["lab"] == LAB}
    spare_codes = {codes.format(c) for c, u in units.items() if u["kind"] == "spare"}
    folder = plan.round_dir(planned, ROUND) / "labs" / LAB
    for name in ("labels.pdf", "packing-list.pdf", "run-sheet.pdf"):
        with pdfplumber.open(str(folder / name)) as pdf:
            text = "\n".join(page.extract_text() or "" for page in pdf.pages)
        found = set(_CODE.findall(text))
        assert found == tests, name
        assert not found & spare_codes, name
    with pdfplumber.open(str(folder / "labels.pdf")) as pdf:
        assert "spare" not in " ".join(page.extract_text() or "" for page in pdf.pages)
    with pdfplumber.open(str(folder / "packing-list.pdf")) as pdf:
        text = " ".join(" ".join(page.extract_text() or "" for page in pdf.pages).split())
    assert f"{len(tests)} units for testing" in text
    assert "Spares stay with the host" in text
