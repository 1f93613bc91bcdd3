"""study.yaml with several measurands: the shorthand means what it meant, the list form is
checked field by field, and every mistake is one located line."""

from __future__ import annotations

import re

import pytest

from conftest import EXAMPLE
from planner import spec
from planner.errors import SpecError

SHORT = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")

MEASURANDS = """measurands:
  - id: mfr
    name: melt mass-flow rate, 190 °C / 2.16 kg
    unit: g/10 min
    resolution: 0.01
    method: ISO 1133-1, procedure A
    evaluation:
      tolerance: 4.0
      sigma_pt: {percent: 5}
      by_material:
        PP-H12:
          known_value: {value: 12.05, u: 0.08, source: certificate of the reference batch}
  - id: density
    name: density, immersion method
    unit: g/cm3
    uncertainty: required
    evaluation:
      sigma_pt: 0.002
      by_material:
        PP-FR: {sigma_pt: 0.004, tolerance: 0.02}
  - id: ash
    name: ash content, 600 °C
    unit: "%"
    materials: [RE-MIX, PP-FR]
    uncertainty: none
"""


def _multi(text: str = SHORT, block: str = MEASURANDS) -> str:
    """Turn the shorthand example into a three-measurand study: drop study.measurand, unit and
    the evaluation section, add ``block`` before the laboratories."""
    text = re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", text)
    text = re.sub(r"\nevaluation:\n(  .*\n|\s*\n)*", "\n", text)
    return text.replace("\nlaboratories:", "\n" + block + "\nlaboratories:")


def test_shorthand_is_one_measurand_with_the_study_settings():
    study = spec.parse(SHORT)
    assert study.shorthand
    (only,) = study.all_measurands
    assert only.id == spec.SHORTHAND_ID == "value"
    assert (only.name, only.unit) == (study.study.measurand, study.study.unit)
    assert only.evaluation is study.evaluation
    assert only.materials is None and only.uncertainty == "optional"
    assert all(study.measurands_of(m.id) == (only,) for m in study.materials)


def test_three_measurands_with_overrides_and_a_known_value():
    study = spec.parse(_multi())
    assert not study.shorthand
    assert [m.id for m in study.all_measurands] == ["mfr", "density", "ash"]
    mfr, density, ash = study.all_measurands
    assert mfr.resolution == 0.01 and mfr.method.startswith("ISO 1133")
    assert mfr.evaluation.assigned_for("PP-H12") == "known"
    assert mfr.evaluation.assigned_for("PP-C8") == "consensus"
    kv = mfr.evaluation.known_value_for("PP-H12")
    assert kv is not None and (kv.value, kv.u) == (12.05, 0.08)
    assert mfr.evaluation.tolerance_for("PP-H12") == 4.0
    assert density.evaluation.tolerance_for("PP-FR") == 0.02
    assert density.evaluation.tolerance_for("PP-C8") is None
    assert density.evaluation.sigma_pt_for("PP-FR").value == 0.004
    assert density.evaluation.sigma_pt_for("HD-BM5").value == 0.002
    assert density.uncertainty == "required" and ash.uncertainty == "none"
    assert [m.id for m in study.measurands_of("PP-FR")] == ["mfr", "density", "ash"]
    assert [m.id for m in study.measurands_of("HD-BM5")] == ["mfr", "density"]
    assert study.measurand("ash").applies_to("RE-MIX")
    with pytest.raises(KeyError):
        study.measurand("nosuch")


def _problem(text: str) -> str:
    with pytest.raises(SpecError) as info:
        spec.parse(text, name="study.yaml")
    return str(info.value)


def _line(text: str, needle: str, nth: int = 1) -> int:
    hits = [i for i, line in enumerate(text.splitlines(), start=1) if needle in line]
    return hits[nth - 1]


@pytest.mark.parametrize("edit,expected,needle", [
    (lambda t: t.replace("  - id: density", "  - id: mfr"),
     "measurands[1].id: 'mfr' is used twice (first at measurands[0])", ("  - id: mfr", 2)),
    (lambda t: t.replace("  - id: ash", "  - id: remarks"),
     "measurands[2].id: 'remarks' is a column name of the result form", "id: remarks"),
    (lambda t: t.replace("materials: [RE-MIX, PP-FR]", "materials: [RE-MIX, PP-XX]"),
     "measurands[2].materials[1]: 'PP-XX' is not a material of this study", "PP-XX"),
    (lambda t: t.replace("materials: [RE-MIX, PP-FR]", "materials: [RE-MIX, RE-MIX]"),
     "measurands[2].materials[1]: 'RE-MIX' is listed twice", "[RE-MIX, RE-MIX]"),
    (lambda t: t.replace("uncertainty: none", "uncertainty: never"),
     "measurands[2].uncertainty: 'never' is not allowed", "uncertainty: never"),
    (lambda t: t.replace("resolution: 0.01", "resolution: 0"),
     "measurands[0].resolution: 0 is out of range; it must be > 0", "resolution: 0"),
    (lambda t: t.replace("u: 0.08", "u: -1"),
     "known_value.u: -1 is out of range; it must be > 0", "u: -1"),
    (lambda t: t.replace("        PP-FR: {sigma_pt: 0.004", "        HD-BM5: {sigma_pt: 0.004")
     .replace("materials: [RE-MIX, PP-FR]\n    uncertainty: none",
              "materials: [RE-MIX, PP-FR]\n    uncertainty: none\n    evaluation:\n"
              "      by_material:\n        HD-BM5: {tolerance: 1}"),
     "measurands[2].evaluation.by_material.HD-BM5: 'HD-BM5' is not measured for 'ash'",
     "HD-BM5: {tolerance: 1}"),
    (lambda t: t.replace("      sigma_pt: 0.002\n", "      sigma_pt: 0.002\n      assigned_value: known\n"),
     "measurands[1].evaluation.assigned_value: is 'known' but 'HD-BM5' has no known_value",
     "assigned_value: known"),
    (lambda t: t.replace("materials: [RE-MIX, PP-FR]", "materials: [RE-MIX]").replace(
        "  - id: mfr\n", "  - id: mfr\n    materials: [HD-BM5, LL-F1, PP-H12, PP-C8, RE-MIX]\n").replace(
        "  - id: density\n", "  - id: density\n    materials: [HD-BM5]\n").replace(
        "      by_material:\n        PP-FR: {sigma_pt: 0.004, tolerance: 0.02}\n", ""),
     "materials[5].id: 'PP-FR' is measured by no measurand", "id: PP-FR"),
    (lambda t: t.replace("  title:", "  measurand: melt flow rate\n  title:"),
     "study.measurand: is given with 'measurands:'", "measurand: melt flow rate"),
    (lambda t: t + "\nevaluation:\n  tolerance: 4\n",
     "evaluation: is given with 'measurands:'", ("evaluation:", 3)),
])
def test_measurand_mistakes_are_one_located_line(edit, expected, needle):
    text = edit(_multi())
    message = _problem(text)
    assert expected in message
    line = int(message.split(":")[1])
    needle, nth = needle if isinstance(needle, tuple) else (needle, 1)
    assert line == _line(text, needle, nth), message


def test_shorthand_without_measurand_names_both_ways_out():
    text = SHORT.replace("  unit: g/10 min\n", "")
    assert "study.unit: is required but missing; give it, or list the properties under " \
           "'measurands:'" in _problem(text)


def test_bundled_specs_still_read():
    for name in ("norrvik-mfr", "norrvik-hardness"):
        study = spec.load(EXAMPLE.parent / name)
        assert study.shorthand and len(study.all_measurands) == 1
