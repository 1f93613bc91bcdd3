"""Spares: which of a laboratory's spare codes replaces a damaged or failed unit.

Each laboratory is sent spare units along with its test units. When a unit is
damaged or fails, ``issue_spare`` picks the laboratory's lowest unused spare of
the same material and records the swap as a ``spare-swap`` event in the
ledger; from then on intake expects the spare's result in place of the damaged
unit (``intake.spare_swaps``, ``intake.expected_codes``). The material is never
named, so the swap does not unblind the laboratory. A circulating set has no
spares.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import codes, intake, plan
from planner.errors import IntakeError, Where

if TYPE_CHECKING:
    from planner.ledger import Ledger
    from planner.spec import Study

__all__ = ["Swap", "issue_spare"]


@dataclass(frozen=True, slots=True)
class Swap:
    """A spare issued for a damaged or failed unit; the material is never part of it."""

    lab: str
    damaged: str
    spare: str
    trial: int
    position: int


def issue_spare(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *, lab: str,
                damaged: str, key: Mapping[str, Any]) -> Swap:
    """Return and record the spare that replaces a laboratory's damaged unit.

    ``key`` is the decoded key (``seal.open_key``), needed for the material of
    the damaged unit; the spare is the laboratory's lowest unused spare code of
    that material. Raises CodeError for a malformed code and IntakeError when
    the unit is not the laboratory's, was replaced already, or no spare is left.
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
        raise IntakeError(f"unit {shown} was already replaced by spare "
                          f"{codes.format(swaps[code])}")
    if code not in expected:
        raise IntakeError(f"{shown} is not a unit that laboratory {lab!r} tests in round "
                          f"{round_id!r}; give the code on the damaged unit's label")
    units = plan.units_from_key(dict(key))
    material = {u.code: u.material for u in units}.get(code)
    used = set(swaps.values())
    free = sorted(u.code for u in units if u.kind == "spare" and u.lab == lab
                  and u.material == material and u.code not in used)
    if not free:
        raise IntakeError(f"laboratory {lab!r} has no unused spare left for unit {shown}; "
                          "the host must send a replacement unit")
    spare = free[0]
    trial, position = expected[code]
    with ledger.transaction():
        ledger.record_event(round_id, "spare-swap", {"lab": lab, "damaged": code, "spare": spare})
    return Swap(lab, code, spare, trial, position)

