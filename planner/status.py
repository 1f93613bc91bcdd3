"""Where a round stands: per laboratory what is in, and whether the key may be opened.

``round_status_table`` reads the ledger and the round's manifest and returns
one row per laboratory in spec order (for a circulating set: one per stop of
the route, the host's later stops as ``host@visit``): whether and when results
came in, which version, how many values, which codes are still missing, late
or after unsealing, spares issued and days left until the results are due.
The key may be opened once every laboratory (or stop) has reported and it is
still sealed.

``read_key_history`` reads what the ledger shows of the key itself: when it
was opened, whether that was forced before every result was in (with the
reason and who was missing then), and each time it was decrypted while still
sealed to print the host's documents or to issue a spare. The status shows it,
and evaluation copies it into statistics.json, the report and every letter.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import circulate, codes, intake, plan, returns
from planner.errors import LedgerError

if TYPE_CHECKING:
    from planner.files import Leftover
    from planner.ledger import Ledger, ResultRow, Submission
    from planner.spec import Study

__all__ = ["RoundStatus", "round_status_table", "read_key_history", "describe_key",
           "host_documents", "ledger_time", "HOST_FOLDER", "leftovers", "describe_leftovers"]

HOST_FOLDER = "host/"
"""Where a round's host documents lie; printing them shows which material each code is."""


@dataclass(frozen=True, slots=True)
class RoundStatus:
    """One row per laboratory (dicts, spec order), whether the key may be opened, and what the
    ledger shows of the key (``key``: see ``read_key_history``)."""

    round: str
    results_due: date
    unsealed: bool
    may_open: bool
    waiting_for: tuple[str, ...]
    rows: tuple[dict[str, Any], ...]
    key: dict[str, Any] = field(default_factory=dict)


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
    issued_to = list(intake.issued_spares(ledger, round_id).values())
    absent = plan.not_applicable(manifest, swaps)
    unsealed = ledger.round_status(round_id) in ("unsealed", "evaluated")
    key = read_key_history(ledger, round_id)
    if manifest.get("mode") == "circulate":
        rows = _circulating_rows(manifest, ledger, round_id, today=today, due=due)
        waiting = tuple(audit.missing_labs(study, ledger, round_id, manifest=manifest))
        return RoundStatus(round_id, due, unsealed, not unsealed and not waiting, waiting,
                           tuple(rows), key)
    rows = []
    for lab in study.laboratories:
        if lab.id not in manifest["labs"]:
            continue
        expected = intake.expected_codes(manifest, lab.id, swaps)
        history = ledger.submissions(round_id, lab.id)
        state = returns.slot_state(manifest, ledger, round_id, lab.id, swaps=swaps,
                                   absent=absent)
        got = [r for _, r in state.rows]
        missing = [codes.format(c) for c in state.outstanding]
        rows.append(_row(lab.id, history, got, expected=len(expected), missing=missing,
                         spares=issued_to.count(lab.id), today=today, due=due,
                         merged=state.merged, measurands=plan.manifest_measurands(manifest),
                         unfilled=state.unfilled))
    waiting = tuple(audit.missing_labs(study, ledger, round_id, manifest=manifest))
    return RoundStatus(round_id, due, unsealed, not unsealed and not waiting, waiting,
                       tuple(rows), key)


def read_key_history(ledger: Ledger, round_id: str) -> dict[str, Any]:
    """Return what the ledger shows of a round's key: how it was opened, and its uses before.

    ``opened`` (bool); ``at``, ``forced``, ``reason`` and ``missing`` (the slots without
    results at that moment) as the "unsealed" event recorded them (None, None, None and []
    while the key is sealed); ``early_decryptions``: every printing of host documents and
    every spare issued while the key was sealed, oldest first, each ``{kind, at, detail,
    before_results}`` (``before_results``: it came before the first result form);
    ``first_result_at``: when the first form was recorded, or None; ``received_after``: the
    slots whose forms were recorded after the opening. Only events since the round was last
    planned count: a round planned again has a new key.
    """
    events = ledger.events(round_id)
    start = max((i for i, e in enumerate(events) if e.kind == "planned"), default=-1) + 1
    opening = None
    early: list[dict[str, Any]] = []
    after: dict[str, None] = {}
    first_result = None
    # The ledger's order, not its times: events recorded within one second share a time.
    for e in events[start:]:
        if e.kind == "received":
            first_result = first_result or e.at
            if opening is not None:
                after[str(e.detail.get("lab"))] = None
        elif opening is not None:
            continue
        elif e.kind == "unsealed":
            opening = e
        elif e.kind == "spare-swap" or (e.kind == "printed" and _prints_host(e.detail)):
            early.append({"kind": e.kind, "at": e.at, "detail": dict(e.detail),
                          "before_results": first_result is None})
    detail = opening.detail if opening is not None else {}
    return {
        "opened": opening is not None,
        "at": opening.at if opening is not None else None,
        "forced": bool(detail.get("forced")) if opening is not None else None,
        "reason": detail.get("reason"),
        "missing": [str(s) for s in detail.get("missing") or ()],
        "releases": [str(s) for s in detail.get("releases") or ()],
        "sealing": _sealing(ledger, round_id),
        "early_decryptions": early,
        "first_result_at": first_result,
        "received_after": list(after),
    }


def _sealing(ledger: Ledger, round_id: str) -> dict[str, Any]:
    """Return how the round's key was sealed, as the planning event recorded it."""
    planned = ledger.events(round_id, "planned")
    return dict(planned[-1].detail.get("sealing") or {"kind": "passphrase"}) if planned else {}


def sealing_sentence(key: Mapping[str, Any]) -> str:
    """Return one sentence on how the key was sealed and, once opened, by whom."""
    sealing = key.get("sealing") or {}
    if sealing.get("kind") == "trustees":
        who = ", ".join(sealing.get("trustees") or ())
        text = (f"The key was sealed for {len(sealing.get('trustees') or ())} trustees ({who}), "
                f"any {sealing.get('threshold')} of whom open it together, with a copy for "
                "the host alone")
        if key.get("releases"):
            text += f"; it was opened with the releases of {', '.join(key['releases'])}"
        return text + "."
    if sealing.get("kind") == "passphrase":
        return "The key was sealed with the coordinator's passphrase (no trustees)."
    return ""


def ledger_time(at: str) -> str:
    """Return a ledger time as '2027-02-03 at 10:15 UTC' (the text itself if unreadable)."""
    from datetime import UTC, datetime

    try:
        moment = datetime.fromisoformat(at)
    except (TypeError, ValueError):
        return str(at)
    if moment.tzinfo is None:
        return moment.strftime("%Y-%m-%d at %H:%M")  # no zone recorded: do not invent one
    return moment.astimezone(UTC).strftime("%Y-%m-%d at %H:%M UTC")


def host_documents(detail: Mapping[str, Any]) -> list[str] | None:
    """Return the host documents a "printed" event names, or None if it names none by path."""
    documents = detail.get("documents")
    if not isinstance(documents, list):
        return None
    return [str(d) for d in documents if str(d).startswith(HOST_FOLDER)]


def describe_key(key: Mapping[str, Any]) -> list[str]:
    """Return the lines that tell ``read_key_history``'s record of a key, oldest first."""
    out = [s for s in [sealing_sentence(key)] if s]
    for use in key.get("early_decryptions", ()):
        when = ledger_time(use["at"])
        detail = use.get("detail") or {}
        if use["kind"] == "spare-swap":
            what = (f"to issue spare {codes.format(str(detail.get('spare')))} for unit "
                    f"{codes.format(str(detail.get('damaged')))} of {detail.get('lab')}")
        else:
            names = host_documents(detail)
            documents = [str(d) for d in detail.get("documents") or ()]
            what = ("to print host documents (" + ", ".join(names) + ")" if names
                    else "to print documents (" + ", ".join(documents) + ")" if documents
                    else "to print documents (the ledger does not name them)")
        late = "" if use.get("before_results") else ", after results had come in"
        out.append(f"{when}: the key was decrypted while sealed, {what}{late}")
    if key.get("opened"):
        when = ledger_time(str(key["at"]))
        if key.get("forced"):
            out.append(f"{when}: the key was opened BEFORE every result was in, forced: reason "
                       f"{key.get('reason')!r}; missing then: {', '.join(key['missing'])}")
        else:
            out.append(f"{when}: the key was opened after every laboratory had reported")
    if key.get("received_after"):
        out.append("results recorded after the opening (flagged after-unseal): "
                   + ", ".join(key["received_after"]))
    return out


def _prints_host(detail: Mapping[str, Any]) -> bool:
    """Return whether a "printed" event may have printed host documents (labels, prep sheet)."""
    if detail.get("key_used") is False:
        return False  # participants' documents only, made without the key
    names = host_documents(detail)
    # An event that counts its documents without naming them may have printed the host's;
    # one that used the key for a laboratory's labels decrypted it all the same.
    return names is None or bool(names) or bool(detail.get("key_used"))


def _circulating_rows(manifest: Mapping[str, Any], ledger: Ledger, round_id: str, *,
                      today: date, due: date) -> list[dict[str, Any]]:
    """Return one status row per stop of a circulating set, in route order."""
    from planner import audit

    stations = {circulate.station_key(str(s["lab"]), s.get("visit")): s
                for s in manifest["route"]}
    rows = []
    absent = plan.not_applicable(manifest)
    for slot in audit.report_slots(manifest):
        runs = audit.slot_runs(manifest, slot)
        expected = [(code, trial) for trial, run in enumerate(runs, start=1) for code in run]
        history = ledger.submissions(round_id, slot)
        state = returns.slot_state(manifest, ledger, round_id, slot, absent=absent)
        got = [r for _, r in state.rows]
        missing = [f"{codes.format(c)} (trial {t})" for c, _, t in
                   (o.partition("@") for o in state.outstanding)]
        station = stations.get(slot, {})
        rows.append({
            **_row(slot, history, got, expected=len(expected), missing=missing, spares=0,
                   today=today, due=due, merged=state.merged,
                   measurands=plan.manifest_measurands(manifest), unfilled=state.unfilled),
            "laboratory": station.get("lab", slot),
            "visit": station.get("visit"),
            "test_end": station.get("test_end"),
        })
    return rows


def _row(slot: str, history: Sequence[Submission], got: Sequence[ResultRow], *, expected: int,
         missing: list[str], spares: int, today: date, due: date,
         merged: bool = False, measurands: Sequence[str] | None = None,
         unfilled: Sequence[tuple[str, str]] = ()) -> dict[str, Any]:
    """Return the status row of one laboratory (or stop) from the rows in force.

    With several ``measurands`` the values are counted per result, and ``measurands``
    gives per measurand the results with a value, the blanks (remark given) and the units
    still without either (``unfilled``: (code, measurand) pairs).
    """
    last = history[-1] if history else None
    values, failed = returns.count_values(got, several=measurands is not None)
    row = {
        "lab": slot,
        "received": last is not None,
        "complete": last is not None and not missing,
        "version": last.version if last else None,
        "merged": merged,
        "received_at": last.received_at if last else None,
        "values": values,
        "failed": failed,
        "expected": expected,
        "missing": len(missing),
        "missing_codes": missing,
        "late": last.late if last else today > due,
        "after_unseal": any(s.after_unseal for s in history),
        "spares_issued": spares,
        "days_left": None if last else (due - today).days,
    }
    if measurands is not None:
        found = [(m, v) for r in got for m, v, _ in r.measurements]
        row["measurands"] = {m: {"values": sum(1 for k, v in found if k == m and v is not None),
                                 "empty": sum(1 for k, v in found if k == m and v is None),
                                 "missing": sum(1 for _, k in unfilled if k == m)}
                             for m in measurands}
    return row


def leftovers(folder: Path, removed: Sequence[Leftover], kept: Sequence[Leftover]
              ) -> dict[str, list[str]]:
    """Return what stopped commands left in a round folder, as paths inside it.

    ``removed``: temporary files removed now (``files.remove_stale``); ``kept``: those of a
    process that still runs (or that could not be removed), each with its process id;
    ``intake``: forms staged in ``.intake/``, which the next receive records or removes.
    """
    def inside(path: Path) -> str:
        return Path(path).relative_to(folder).as_posix()

    staging = Path(folder) / returns.STAGING_DIR
    staged = sorted(p.name for p in staging.iterdir()) if staging.is_dir() else []
    return {"removed": [inside(x.path) for x in removed],
            "kept": [f"{inside(x.path)} (process {x.pid})" for x in kept],
            "intake": [f"{returns.STAGING_DIR}/{name}" for name in staged]}


def describe_leftovers(found: Mapping[str, Sequence[str]]) -> list[str]:
    """Return the lines that name what ``leftovers`` found (none when nothing was left)."""
    def count(items: Sequence[str], noun: str) -> str:
        return f"{len(items)} {noun}{'' if len(items) == 1 else 's'}"

    out = []
    if found.get("removed"):
        out.append(f"removed {count(found['removed'], 'temporary file')} left by a stopped "
                   "command: " + ", ".join(found["removed"]))
    if found.get("kept"):
        out.append(f"left in place {count(found['kept'], 'temporary file')} (its command is "
                   "still running, or it cannot be removed): " + ", ".join(found["kept"]))
    if found.get("intake"):
        out.append(f"{count(found['intake'], 'form')} staged by a receive that was stopped or "
                   "is running: " + ", ".join(found["intake"]) + "; the next 'ringplan "
                   "receive' records or removes them")
    return out
