"""What every unit a laboratory receives shows, and what could still tell materials apart.

A unit's label and its row on a packing list or hand-over sheet may differ from
another unit's only in the code and the place in the run order. Everything else
is one text for the whole round:

- **storage**: the study's ``parcel.storage`` if it gives one, else the
  conditions of every material joined: the comma-separated parts of each
  material's storage text, each once, in the order they first appear
  (``dry, 15-25 °C, sealed bag`` and ``dry, 15-25 °C, sealed bag, away from
  light`` give ``dry, 15-25 °C, sealed bag, away from light``);
- **hazard**: the hazard words of every material, on every unit, with every
  material's caution on the packing list. A word on some units only would tell a
  laboratory which units hold the hazardous material; so every unit is handled
  as the most hazardous one is;
- **use-by date**: the preparation date plus the shortest stability of the
  round's materials.

What the documents cannot hide, ``tells`` names for ``check`` and ``plan`` to warn
of: a different amount per unit (a laboratory can weigh its units), a different
unit of amount, storage texts that were joined without the coordinator writing
one text for the parcel, a measurand measured on some materials only (its cells
on the forms and run sheets are marked for the other units). ``notes`` says when hazard words some materials do not
carry are printed on every unit.
"""

from __future__ import annotations

from datetime import date, timedelta
from typing import TYPE_CHECKING

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["cautions", "hazard_word", "notes", "storage", "tells", "use_by"]


def _parts(text: str) -> list[str]:
    return [part.strip() for part in text.split(",") if part.strip()]


def storage(study: Study) -> str:
    """Return the one storage text printed for every unit of the round."""
    if study.parcel is not None and study.parcel.storage:
        return study.parcel.storage
    seen: dict[str, str] = {}  # casefolded part -> part as first written
    for material in study.materials:
        for part in _parts(material.storage):
            seen.setdefault(part.casefold(), part)
    return ", ".join(seen.values())


def cautions(study: Study) -> dict[str, str]:
    """Return hazard word -> caution of every material that carries one (notes of one word
    joined), in the order of the materials."""
    out: dict[str, str] = {}
    for material in study.materials:
        if material.hazard is None:
            continue
        word, note = material.hazard.word, material.hazard.note
        if word in out and note not in out[word]:
            out[word] = f"{out[word]}; {note}"
        else:
            out.setdefault(word, note)
    return out


def hazard_word(study: Study) -> str:
    """Return the hazard words printed on every unit ("" when no material carries one)."""
    return " · ".join(cautions(study))


def use_by(study: Study, prepared: date | None) -> date | None:
    """Return the preparation date plus the shortest stability of the round's materials."""
    if prepared is None:
        return None
    return prepared + timedelta(days=min(m.stability_days for m in study.materials))


def _groups(values: dict[str, str]) -> str:
    """Return "A, B: x; C: y" for material -> value, largest group first."""
    by_value: dict[str, list[str]] = {}
    for material, value in values.items():
        by_value.setdefault(value, []).append(material)
    ordered = sorted(by_value.items(), key=lambda kv: -len(kv[1]))
    return "; ".join(f"{', '.join(ids)}: {value}" for value, ids in ordered)


def tells(study: Study) -> list[str]:
    """Return one sentence per way a laboratory could still tell materials apart by what it
    receives, with the materials named and what would hide it; [] when nothing does."""
    out: list[str] = []
    materials = study.materials
    amounts = {m.id: f"{m.amount:g} {m.amount_unit}" for m in materials}
    if len(set(amounts.values())) > 1:
        out.append(f"amounts per unit differ ({_groups(amounts)}): a laboratory that weighs or "
                   "counts its units can tell these materials' units apart; fill every unit "
                   "with the same amount")
    texts = {m.id: m.storage for m in materials}
    if len(set(texts.values())) > 1 and (study.parcel is None or not study.parcel.storage):
        out.append(f"storage conditions differ ({_groups(texts)}); every label carries all of "
                   f"them joined: {storage(study)!r}; check that this one text is right for "
                   "every unit, or write it as parcel.storage")
    for m in study.measurands or ():
        if m.materials is None or set(m.materials) >= {x.id for x in materials}:
            continue
        count = len(m.materials)
        out.append(f"measurand {m.id!r} is measured on {', '.join(m.materials)} only: the "
                   "result forms mark its cells n/a and the run sheets show a dash for every "
                   "other unit, so a laboratory can tell which of its units hold "
                   + ("that material" if count == 1 else f"one of these {count} materials")
                   + " and which do not; measure it on every material to hide that")
    return out


def notes(study: Study) -> list[str]:
    """Return what the coordinator should know although the documents hide it: hazard words
    that only some materials carry are printed on every unit."""
    words = {m.id: m.hazard.word if m.hazard else "no hazard word" for m in study.materials}
    if len(set(words.values())) < 2:
        return []
    return [f"hazard words differ ({_groups(words)}); every unit carries "
            f"{hazard_word(study)!r} and every material's caution, so that no label singles "
            "units out; laboratories handle every unit with those cautions, and can still "
            "tell these materials apart if they look, smell or handle differently"]
