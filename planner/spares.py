"""Spares: which unit the host sends to replace a laboratory's damaged or failed unit.

Spares stay with the host: per material a pool of ``spares_per_lab`` units for
each laboratory (``plan.build_units``). When a laboratory reports a unit
damaged, ``issue_spare`` picks an unused spare of that unit's material from the
pool at random, or, once the pool of that material is empty, an unused unit of
it that the host retained, and records the swap as a ``spare-swap``
event in the ledger; from then on intake expects the replacement's result in
place of the damaged unit (``intake.spare_swaps``, ``intake.expected_codes``).

What the laboratory hears is the same whatever the material and however many
units it asked for: a replacement is on its way. A parcel that carried spares of
each material told it more: with one spare per material, a second request
refused for "no spare left" meant that both units held the same material. When
the host has no unit of the material left, the coordinator hears so
(IntakeError) and the laboratory is told only that a replacement is on its way.
A circulating set has no spares.
"""

from __future__ import annotations

import secrets
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, intake, plan
from planner.errors import IntakeError, Where

if TYPE_CHECKING:
    from planner.ledger import Ledger
    from planner.spec import Study

__all__ = ["SOURCES", "Swap", "issue_spare"]

SOURCES = ("spare", "retained")
"""Where a replacement comes from, in the order they are used: the host's spare pool, then
the units the host retained."""


@dataclass(frozen=True, slots=True)
class Swap:
    """A unit the host sends for a damaged or failed one; the material is never part of it.

    ``source`` is "spare" (the host's spare pool) or "retained" (a unit the host kept
    back, because the pool of that material is empty); only the coordinator and the
    host need to know which.
    """

    lab: str
    damaged: str
    spare: str
    trial: int
    position: int
    host: str
    source: str


def issue_spare(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *, lab: str,
                damaged: str, key: Mapping[str, Any],
                pick: Callable[[Sequence[str]], str] = secrets.choice) -> Swap:
    """Return and record the unit the host sends to replace a laboratory's damaged unit.

    ``key`` is the decoded key (``seal.open_key``), needed for the material of the
    damaged unit; the replacement is an unused spare of that material the host keeps,
    drawn at random (the lowest would rank a laboratory's replacements, so that their codes
    would link its units of one material), else an unused unit of it the host retained. Raises CodeError for a
    malformed code and IntakeError when the unit is not the laboratory's, was replaced
    already, or the host has no unit of its material left (nothing is recorded then).
    ``pick`` draws one code of the unused ones (the demo passes a seeded one).
    """
    folder = plan.round_dir(study_dir, round_id)
    manifest = plan.read_manifest(folder)
    if manifest.get("mode") == "circulate":
        raise IntakeError(f"round {round_id!r} circulates one set of artefacts, which has no "
                          "spares; report the damage in the remarks of the form and tell the "
                          "host, who decides whether the artefact stays in the round")
    if key.get("round") != round_id or key.get("study") != study.id:
        raise IntakeError(f"the key belongs to study {key.get('study')!r} round "
                          f"{key.get('round')!r}, not to this round", Where(str(folder)))
    if lab not in manifest["labs"]:
        known = ", ".join(manifest["labs"])
        raise IntakeError(f"--lab {lab!r} is not a laboratory of round {round_id!r}; known: "
                          f"{known}")
    code = codes.validate(damaged, where=Where(field="--damaged"))
    shown = codes.format(code)
    swaps = intake.spare_swaps(ledger, round_id)
    expected = intake.expected_codes(manifest, lab, swaps)
    if code in swaps:
        raise IntakeError(f"unit {shown} was already replaced by unit "
                          f"{codes.format(swaps[code])}")
    if code not in expected:
        raise IntakeError(f"{shown} is not a unit that laboratory {lab!r} tests in round "
                          f"{round_id!r}; give the code on the damaged unit's label")
    host = str(manifest["host"])
    units = plan.units_from_key(dict(key))
    material = {u.code: u.material for u in units}.get(code)
    used = set(swaps.values())
    for source in SOURCES:
        # Only units the host holds: in a round planned while parcels carried spares,
        # the other laboratories' spares are in their parcels.
        free = sorted(u.code for u in units if u.kind == source and u.lab == host
                      and u.material == material and u.code not in used)
        if free:
            break
    else:
        raise IntakeError(f"for the coordinator: no unit of the material of {shown} is left "
                          "with the host (its spares and retained units are all issued), so "
                          "nothing was recorded; the host prepares a replacement from its "
                          f"stock; tell laboratory {lab!r} only that a replacement is on its way")
    spare = pick(free)
    trial, position = expected[code]
    with ledger.transaction():
        ledger.record_event(round_id, "spare-swap", {"lab": lab, "damaged": code,
                                                     "spare": spare, "source": source})
    return Swap(lab, code, spare, trial, position, host, source)
