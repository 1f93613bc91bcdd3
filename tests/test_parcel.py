"""planner.parcel: one storage text, every hazard word and one use-by date for every unit, and
the warnings that name what the documents cannot hide. Expected texts are written out by hand
from the study fragments below."""

from __future__ import annotations

from datetime import date
from pathlib import Path

import pytest
import yaml
from conftest import EXAMPLE

from planner import parcel, spec


def _study(tmp_path: Path, materials: list[dict], parcel_section: dict | None = None):
    data = yaml.safe_load((EXAMPLE / "study.yaml").read_text(encoding="utf-8"))
    data["materials"] = materials
    data.pop("parcel", None)
    data.pop("evaluation", None)
    if parcel_section is not None:
        data["parcel"] = parcel_section
    path = tmp_path / "study.yaml"
    path.write_text(yaml.safe_dump(data, allow_unicode=True, sort_keys=False), encoding="utf-8")
    return spec.load(path)


def _m(id_: str, storage: str = "dry, 15-25 °C", amount: float = 30, unit: str = "g",
       days: int = 180, hazard: tuple[str, str] | None = None) -> dict:
    out = {"id": id_, "description": f"material {id_}", "amount": amount, "amount_unit": unit,
           "storage": storage, "stability_days": days}
    if hazard:
        out["hazard"] = {"word": hazard[0], "note": hazard[1]}
    return out


def test_alike_materials_give_their_own_texts_and_no_warning(tmp_path):
    study = _study(tmp_path, [_m("A"), _m("B")])
    assert parcel.storage(study) == "dry, 15-25 °C"
    assert parcel.hazard_word(study) == "" and parcel.cautions(study) == {}
    assert parcel.tells(study) == [] and parcel.notes(study) == []


def test_storage_parts_are_joined_once_each_in_order_of_first_appearance(tmp_path):
    study = _study(tmp_path, [_m("A", "dry, 15-25 °C, sealed bag"),
                              _m("B", "Dry, 15-25 °C, away from light"), _m("C", "sealed bag")])
    assert parcel.storage(study) == "dry, 15-25 °C, sealed bag, away from light"
    (warning,) = parcel.tells(study)
    assert warning.startswith("storage conditions differ (A: dry, 15-25 °C, sealed bag; ")
    assert "'dry, 15-25 °C, sealed bag, away from light'" in warning


def test_a_storage_text_for_the_parcel_wins_and_silences_the_warning(tmp_path):
    study = _study(tmp_path, [_m("A"), _m("B", "2-8 °C")], {"storage": "2-8 °C, dark"})
    assert parcel.storage(study) == "2-8 °C, dark"
    assert parcel.tells(study) == []


def test_every_hazard_word_is_on_every_unit_and_notes_of_one_word_are_joined(tmp_path):
    study = _study(tmp_path, [_m("A", hazard=("IRRITANT", "eyes")),
                              _m("B", hazard=("FLAMMABLE", "keep from flames")),
                              _m("C", hazard=("IRRITANT", "airways")), _m("D")])
    assert parcel.cautions(study) == {"IRRITANT": "eyes; airways",
                                      "FLAMMABLE": "keep from flames"}
    assert parcel.hazard_word(study) == "IRRITANT · FLAMMABLE"
    assert parcel.tells(study) == []
    (warning,) = parcel.notes(study)
    assert "A, C: IRRITANT" in warning and "D: no hazard word" in warning


def test_the_same_hazard_on_every_material_is_no_tell(tmp_path):
    study = _study(tmp_path, [_m("A", hazard=("TOXIC", "n")), _m("B", hazard=("TOXIC", "n"))])
    assert parcel.tells(study) == [] and parcel.notes(study) == []


@pytest.mark.parametrize(("b", "expected"), [
    ({"amount": 40}, "A: 30 g; B: 40 g"), ({"unit": "pellets"}, "A: 30 g; B: 30 pellets")])
def test_a_different_amount_or_unit_of_amount_is_named(tmp_path, b, expected):
    study = _study(tmp_path, [_m("A"), _m("B", **b)])
    (warning,) = parcel.tells(study)
    assert warning.startswith(f"amounts per unit differ ({expected})")
    assert "weighs or counts" in warning


def test_use_by_is_preparation_plus_the_shortest_stability(tmp_path):
    study = _study(tmp_path, [_m("A", days=365), _m("B", days=120)])
    assert parcel.use_by(study, date(2027, 1, 11)) == date(2027, 5, 11)
    assert parcel.use_by(study, None) is None


def test_an_empty_or_overlong_parcel_storage_is_one_spec_error(tmp_path):
    from planner.errors import SpecError

    with pytest.raises(SpecError, match="parcel.storage"):
        _study(tmp_path, [_m("A"), _m("B")], {"storage": ""})
    with pytest.raises(SpecError, match="parcel"):
        _study(tmp_path, [_m("A"), _m("B")], {"storage": "x", "colour": "red"})
