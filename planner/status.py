"""Where a round stands: per laboratory what is in, and whether the key may be opened.

``round_status_table`` reads the ledger and the round's manifest and returns
one row per laboratory in spec order (for a circulating set: one per stop of
the route, the host's later stops as ``host@visit``): whether and when results
came in, which version, how many values, which codes are still missing, late
or after unsealing, spares issued and days left until the results are due.
The key may be opened once every laboratory (or stop) has reported and it is
still sealed.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import circulate, codes, intake, plan
from planner.errors import LedgerError

if TYPE_CHECKING:
    from planner.ledger import Ledger, ResultRow, Submission
    from planner.spec import Study

__all__ = ["RoundStatus", "round_status_table"]


@dataclass(frozen=True, slots=True)
class RoundStatus:
    """One row per laboratory (dicts, spec order) and whether the key may be opened."""

    round: str
    results_due: date
    unsealed: bool
    may_open: bool
    waiting_for: tuple[str, ...]
    rows: tuple[dict[str, Any], ...]


def round_status_table(study: Study, study_dir: Path, round_id: str, ledger: Ledger, *,
                       today: date) -> RoundStatus:
    """Return per laboratory: received, version, values, codes missing, late, days left."""
    from planner import audit

    folder = plan.round_dir(study_dir, round_id)
    manifest = plan.read_manifest(folder)
    if ledger.current_round(round_id) is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder")
    due = date.fromisoformat(manifest["dates"]["results_due"])
    swaps = intake.spare_swaps(ledger, round_id)
    unsealed = ledger.round_status(round_id) in ("unsealed", "evaluated")
    if manifest.get("mode") == "circulate":
        rows = _circulating_rows(manifest, ledger, round_id, today=today, due=due)
        waiting = tuple(audit.missing_labs(study, ledger, round_id, manifest=manifest))
        return RoundStatus(round_id, due, unsealed, not unsealed and not waiting, waiting,
                           tuple(rows))
    rows = []
    for lab in study.laboratories:
        if lab.id not in manifest["labs"]:
            continue
        expected = intake.expected_codes(manifest, lab.id, swaps)
        history = ledger.submissions(round_id, lab.id)
        got = ledger.result_rows(history[-1].row) if history else []
        reported = {r.code for r in got}
        missing = [codes.format(c) for c in expected if c not in reported]
        spares = sum(1 for s in swaps.values() if s in manifest["labs"][lab.id].get("spares", ()))
        rows.append(_row(lab.id, history, got, expected=len(expected), missing=missing,
                         spares=spares, today=today, due=due))
    waiting = tuple(audit.missing_labs(study, ledger, round_id))
    return RoundStatus(round_id, due, unsealed, not unsealed and not waiting, waiting,
                       tuple(rows))


def _circulating_rows(manifest: Mapping[str, Any], ledger: Ledger, round_id: str, *,
                      today: date, due: date) -> list[dict[str, Any]]:
    """Return one status row per stop of a circulating set, in route order."""
    from planner import audit

    stations = {circulate.station_key(str(s["lab"]), s.get("visit")): s
                for s in manifest["route"]}
    rows = []
    for slot in audit.report_slots(manifest):
        runs = audit.slot_runs(manifest, slot)
        expected = [(code, trial) for trial, run in enumerate(runs, start=1) for code in run]
        history = ledger.submissions(round_id, slot)
        got = ledger.result_rows(history[-1].row) if history else []
        reported = {(r.code, r.trial) for r in got}
        missing = [f"{codes.format(c)} (trial {t})" for c, t in expected if (c, t) not in reported]
        station = stations.get(slot, {})
        rows.append({
            **_row(slot, history, got, expected=len(expected), missing=missing, spares=0,
                   today=today, due=due),
            "laboratory": station.get("lab", slot),
            "visit": station.get("visit"),
            "test_end": station.get("test_end"),
        })
    return rows


def _row(slot: str, history: Sequence[Submission], got: Sequence[ResultRow], *, expected: int,
         missing: list[str], spares: int, today: date, due: date) -> dict[str, Any]:
    """Return the status row of one laboratory (or stop) from its submissions."""
    last = history[-1] if history else None
    return {
        "lab": slot,
        "received": last is not None,
        "version": last.version if last else None,
        "received_at": last.received_at if last else None,
        "values": sum(1 for r in got if r.value is not None),
        "failed": sum(1 for r in got if r.value is None),
        "expected": expected,
        "missing": len(missing),
        "missing_codes": missing,
        "late": last.late if last else today > due,
        "after_unseal": any(s.after_unseal for s in history),
        "spares_issued": spares,
        "days_left": None if last else (due - today).days,
    }
