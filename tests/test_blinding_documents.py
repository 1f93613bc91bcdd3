"""A participant reads its own documents to tie units to materials, and fails.

The attacker is a participating laboratory (tor). It holds what it received: its labels, its
packing list and its run sheet (their PDFs, read back as text with pdfplumber), and it groups
its units by everything those documents print beside a code, leaving out only the code and
the unit's place (trial and run, or "spare"). A unit is *tied* when every unit printed like it
holds the same material and some other unit is printed differently: the laboratory then knows
that unit's group from its paper alone. The key, opened in the test, says who was right.

The study is the example with the tells the issue found put back: RE-MIX is 40 g and kept away
from light, PP-FR is IRRITANT, and no ``parcel.storage`` is written. When every label printed
its material's storage and hazard word (emulated here by the old label function), a third of
the units were tied; now none is, and ``check`` names what the documents cannot hide.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest
import yaml
from conftest import EXAMPLE, PASSPHRASE, ROUND, plan_example_round, run_cli

from planner import codes, language, seal
from planner.render import _sheets, labels

LAB = "tor"
MM = 72 / 25.4
_PLACE = re.compile(r"trial \d+ · run \d+|\bspare\b|\btest\b|\bretained by host\b")


def _study_with_tells(base: Path) -> Path:
    target = base / "norrvik-mfr"
    shutil.copytree(EXAMPLE, target)
    path = target / "study.yaml"
    data = yaml.safe_load(path.read_text(encoding="utf-8"))
    data.pop("parcel", None)
    for material in data["materials"]:
        if material["id"] == "RE-MIX":
            material["amount"] = 40
            assert "away from light" in material["storage"]
    path.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return target


def _old_label(study, manifest, unit, expiry):
    """The label as it was printed before: the unit's own material's hazard word and storage."""
    material = study.material(unit["material"])
    lab = study.lab(unit["lab"])
    return labels.Label(code=unit["code"], hazard=material.hazard.word if material.hazard else "",
                        trial=labels._kind_text(unit, language.texts()),
                        lab=(f"for {lab.name}", f"for {lab.id}"),
                        use_by=f"use by {expiry}" if expiry else "",
                        study=f"{study.id} · round {manifest['round']}", storage=material.storage)


_CODE = re.compile(r"\b[0-9A-Z]{4}-[0-9A-Z]{5}\b")


def _feature(text: str) -> str:
    """Return a text without codes (a line may list several), places and bare numbers."""
    text = _PLACE.sub("", _CODE.sub("", " ".join(text.split())))
    return " ".join(w for w in text.replace(" ,", "").split() if not w.isdigit())


def _label_features(path: Path, sheet: _sheets.Geometry, mine: set[str]) -> dict[str, str]:
    """Return code -> what its label prints besides the code and its place, cell by cell."""
    import pdfplumber

    out: dict[str, str] = {}
    with pdfplumber.open(path) as pdf:
        for page in pdf.pages:
            for i in range(sheet.per_page):
                left, top, w, h = sheet.cell_mm(i)
                text = page.crop((left * MM, top * MM, (left + w) * MM,
                                  (top + h) * MM)).extract_text() or ""
                found = [c for c in mine if codes.format(c) in text]
                if found:
                    out[found[0]] = _feature(text)
    return out


def _line_features(path: Path, mine: set[str]) -> dict[str, str]:
    """Return code -> the rest of every line that prints the code (tables of lists, sheets)."""
    import pdfplumber

    out: dict[str, list[str]] = {}
    with pdfplumber.open(path) as pdf:
        for page in pdf.pages:
            for line in (page.extract_text() or "").splitlines():
                for code in mine:
                    if codes.format(code) in line:
                        out.setdefault(code, []).append(_feature(line))
    return {code: " | ".join(parts) for code, parts in out.items()}


def tied_share(features: dict[str, str], truth: dict[str, str]) -> float:
    """Return the share of units the documents tie to their material group (see module doc)."""
    groups: dict[str, set[str]] = {}
    for code, text in features.items():
        groups.setdefault(text, set()).add(truth[code])
    if len(groups) < 2:
        return 0.0
    tied = sum(1 for text in features.values() if len(groups[text]) == 1)
    return tied / len(features)


def _attack(folder: Path, study, truth: dict[str, str]) -> tuple[float, dict[str, str]]:
    mine = {c for c, _ in truth.items()}
    sheet = _sheets.load(study.study.label_sheet)
    parts = [_label_features(folder / "labels.pdf", sheet, mine),
             _line_features(folder / "packing-list.pdf", mine),
             _line_features(folder / "run-sheet.pdf", mine)]
    assert all(set(p) == mine for p in parts[:2]), "every unit is on its label and the list"
    features = {c: " || ".join(p.get(c, "") for p in parts) for c in mine}
    return tied_share(features, truth), features


@pytest.fixture(scope="module")
def attacked(tmp_path_factory):
    from planner import spec
    from typer.testing import CliRunner

    base = tmp_path_factory.mktemp("blinding")
    study_dir = _study_with_tells(base)
    runner = CliRunner()
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("RINGPLAN_PASSPHRASE", PASSPHRASE)
        plan_example_round(study_dir)
        done = run_cli(runner, "print", study_dir, "--round", ROUND, "--lab", LAB)
        assert done.exit_code == 0, done.stderr
        printed = study_dir / "rounds" / ROUND / "labs" / LAB
        now, before = base / "now", base / "before"
        shutil.copytree(printed, now)
        shutil.copytree(printed, before)
        mp.setattr(labels, "_label", _old_label)
        done = run_cli(runner, "print", study_dir, "--round", ROUND, "--lab", LAB, "--only",
                       "labels")
        assert done.exit_code == 0, done.stderr
        shutil.copy(printed / "labels.pdf", before / "labels.pdf")
        mp.undo()
        checked = run_cli(runner, "check", study_dir)
    folder = study_dir / "rounds" / ROUND
    key = seal.open_key(folder, PASSPHRASE)
    truth = {u["code"]: u["material"] for u in key["units"] if u["lab"] == LAB
             and u["kind"] in ("test", "spare")}
    return {"study": spec.load(study_dir), "now": now, "before": before, "truth": truth,
            "check": checked}


def test_before_a_third_of_the_units_were_tied_by_their_labels(attacked):
    # 6 materials, 3 trials: PP-FR's 3 units (IRRITANT) and RE-MIX's 3 (away from light) of
    # the parcel's 18 (spares stay with the host).
    share, _ = _attack(attacked["before"], attacked["study"], attacked["truth"])
    assert share == pytest.approx(6 / 18)


def test_now_no_unit_is_tied_by_what_its_laboratory_reads(attacked):
    share, features = _attack(attacked["now"], attacked["study"], attacked["truth"])
    assert share == 0.0
    # and not because the attack read nothing: every label carries the round's hazard word
    assert all("IRRITANT" in text for text in features.values())


def test_every_label_prints_the_joined_storage_and_every_hazard_word(attacked):
    from planner import parcel

    study = attacked["study"]
    assert parcel.storage(study) == "dry, 15-25 °C, sealed bag, away from light"
    assert parcel.hazard_word(study) == "IRRITANT"


def test_check_names_the_materials_and_what_a_participant_could_infer(attacked):
    done = attacked["check"]
    assert done.exit_code == 0, done.stderr
    lines = [x for x in done.stderr.splitlines() if x.startswith("warning: ")]
    amounts = next(x for x in lines if "amounts per unit differ" in x)
    assert "RE-MIX: 40 g" in amounts and "weighs" in amounts
    storage = next(x for x in lines if "storage conditions differ" in x)
    assert "RE-MIX" in storage and "parcel.storage" in storage
    hazard = next(x for x in done.stderr.splitlines() if x.startswith("note: hazard"))
    assert "PP-FR: IRRITANT" in hazard


def test_the_example_study_has_nothing_that_tells_materials_apart(tmp_path):
    from planner import overview, spec

    study = spec.load(EXAMPLE)
    assert overview.warnings(study) == []
    hazard, balance = overview.notes(study)
    assert hazard.startswith("hazard words differ")
    assert balance.startswith("balanced run orders: 5 laboratories are fewer than the 6 rows")
