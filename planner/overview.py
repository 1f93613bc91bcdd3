"""What `check` shows: the study at a glance, the units to prepare, the next host.

Built from the spec and the ledger's past rounds, returned as plain data so the
CLI can print it as tables or as JSON.
"""

from __future__ import annotations

from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import design

if TYPE_CHECKING:
    from planner.spec import Study

__all__ = ["notes", "past_rounds", "summarize", "undrawable", "warnings"]


def past_rounds(study: Study, study_dir: Path | None) -> list[tuple[str, str, date]]:
    """Return (round, host, date) of every earlier round: the spec's history, then the ledger's."""
    out = [(p.round, p.host, p.date) for p in study.history]
    if study_dir is None:
        return out
    from planner.ledger import LEDGER_NAME, Ledger

    folder = Path(study_dir)
    planned = folder.is_dir() and any((folder / "rounds").glob("*/manifest.json"))
    if not (folder / LEDGER_NAME).exists() and not planned:
        return out
    known = {r for r, _, _ in out}
    # create=False: a folder with planned rounds but no ledger is refused, not started anew.
    with Ledger.open(study_dir, create=False) as ledger:
        for row in ledger.rounds():
            if row.round in known:
                continue
            when = str(row.dates.get("test_start") or row.dates["prepare_on"])
            out.append((row.round, row.host, date.fromisoformat(when)))
    return sorted(out, key=lambda r: r[2])


def summarize(study: Study, study_dir: Path | None = None) -> dict[str, Any]:
    """Return the study summary: laboratories, materials with unit counts and amounts, next host."""
    from planner import plan, rotation

    d = study.design
    counts = design.unit_counts(labs=len(study.laboratories), trials=d.trials,
                                spares=d.spares_per_lab, retained=d.retained_by_host,
                                homogeneity=d.homogeneity_units)
    materials = []
    for m in study.materials:
        materials.append({
            "id": m.id, "description": m.description, "measurand": study.study.measurand,
            "unit": study.study.unit, "test": counts.test, "spare": counts.spare,
            "retained": counts.retained, "homogeneity": counts.homogeneity,
            "units": counts.total, "amount_per_unit": m.amount, "amount_unit": m.amount_unit,
            "total_amount": round(m.amount * counts.total, 6), "stability_days": m.stability_days,
            "hazard": m.hazard.word if m.hazard else None,
        })
        if not study.shorthand:
            materials[-1]["measurands"] = [x.id for x in study.measurands_of(m.id)]
    past = past_rounds(study, study_dir)
    proposals = rotation.propose(study, past, rounds=1)
    host = proposals[0].host
    dates, route = plan.dates_for(study, host)
    several = {} if study.shorthand else {"measurands": [
        {"id": x.id, "name": x.name, "unit": x.unit, "method": x.method,
         "materials": list(x.materials) if x.materials else None,
         "uncertainty": x.uncertainty} for x in study.all_measurands]}
    return {
        "study": study.id,
        "title": study.study.title,
        "measurand": study.study.measurand,
        "unit": study.study.unit,
        **several,
        "laboratories": [{"id": lab.id, "name": lab.name, "country": lab.country,
                          "can_host": lab.can_host, "decimal": lab.decimal,
                          "hosted": sum(1 for _, h, _ in past if h == lab.id)}
                         for lab in study.laboratories],
        "materials": materials,
        "units_per_material": counts.total,
        "units_total": counts.total * len(study.materials),
        "design": {"mode": d.mode, "trials": d.trials, "run_order": d.run_order,
                   "spares_per_lab": d.spares_per_lab, "retained_by_host": d.retained_by_host,
                   "homogeneity_units": d.homogeneity_units},
        "past_rounds": [{"round": r, "host": h, "date": w.isoformat()} for r, h, w in past],
        "next_host": {"host": host, "reason": proposals[0].reason},
        "schedule": dates.to_json(),
        "route": route.to_json() if route else None,
        "warnings": warnings(study, study_dir),
        "notes": notes(study),
    }


def warnings(study: Study, study_dir: Path | None = None) -> list[str]:
    """Return what ``check`` and ``plan`` warn of: what could tell materials apart to a
    laboratory (``parcel.tells``, a measurand measured on some materials only among them),
    and text the fonts cannot draw (``undrawable``)."""
    from planner import parcel

    return parcel.tells(study) + undrawable(study, study_dir)


_SHOWN_AT_MOST = 8  # characters named in one warning


def undrawable(study: Study, study_dir: Path | None = None) -> list[str]:
    """Return one warning per text of the spec with characters that the regular or the bold
    font cannot draw (they would print as empty boxes), naming the field and the characters.

    The fonts are the study's own (``study.fonts``, relative to ``study_dir``; nothing is
    said without the folder) or the bundled DejaVu family. Raises SpecError for a named
    font file that cannot be used.
    """
    from planner import fonts

    if study.study.fonts is None:
        chosen = fonts.BUNDLED
    elif study_dir is None:
        return []
    else:
        chosen = fonts.for_study(study, study_dir)
    # Any text may be set in either face (names in bold on most documents).
    drawable = fonts.characters(chosen.regular) & fonts.characters(chosen.bold)
    named = ("the bundled DejaVu Sans" if study.study.fonts is None else
             "the fonts of study.fonts")
    out = []
    for field, text in _texts(study.model_dump(mode="json", by_alias=True, exclude_none=True)):
        missing = list(dict.fromkeys(ch for ch in text if ord(ch) not in drawable
                                     and ch not in "\t\n\r"))
        if not missing:
            continue
        shown = ", ".join(f"{ch} (U+{ord(ch):04X})" if ch.isprintable() else f"U+{ord(ch):04X}"
                          for ch in missing[:_SHOWN_AT_MOST])
        more = (f" and {len(missing) - _SHOWN_AT_MOST} more" if len(missing) > _SHOWN_AT_MOST
                else "")
        out.append(f"{field}: {shown}{more} cannot be drawn with {named} and would print as "
                   "empty boxes; name TrueType fonts that have them under study.fonts")
    return out


def _texts(value: Any, path: str = "") -> list[tuple[str, str]]:
    """Return (field path, text) of every string in a dumped spec, as ``laboratories[3].name``;
    the font files' own paths are not printed and left out."""
    if isinstance(value, str):
        return [(path, value)]
    if isinstance(value, dict):
        return [found for key, item in value.items() if f"{path}.{key}" != "study.fonts"
                for found in _texts(item, f"{path}.{key}" if path else str(key))]
    if isinstance(value, list):
        return [found for i, item in enumerate(value) for found in _texts(item, f"{path}[{i}]")]
    return []


def notes(study: Study) -> list[str]:
    """Return what ``check`` and ``plan`` note: what every unit carries because some
    material needs it (``parcel.notes``), and balanced run orders that can balance only
    approximately with these numbers (``design.balance_note``)."""
    from planner import parcel

    out = parcel.notes(study)
    d = study.design
    if d.run_order == "balanced" and d.mode == "split":
        note = design.balance_note(len(study.laboratories), len(study.materials), d.trials)
        if note:
            out.append(f"balanced run orders: {note}")
    return out
