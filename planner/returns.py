"""Recording returned result forms: SHA-256 copies, ledger versions, crash-safe staging.

``receive`` checks forms with ``planner.intake`` and, if none has a problem,
records each as a new version of its laboratory's submission; a form identical
to the last version recorded changes nothing.

Recording is one decision, the ledger commit. The form's bytes are first
written (``files.write_many``: temp name, fsync, rename; owner-only and
read-only, as are the receipts) to the round's hidden staging folder
``.intake/`` inside the ledger transaction, the commit follows, and only then
is the file renamed into ``results/<sha256>.<ext>``. A process killed before
the commit leaves the ledger and ``results/`` as they were (the staged copy is
removed by the next ``receive``); one killed after the commit but before the
rename is completed by the next ``receive``, which moves every staged file the
ledger knows into ``results/``.

A call with the forms of hundreds of laboratories costs about what their rows
cost: the round's versions are read once, every form's rows are recorded in the
one transaction, the copies and the receipts are each written in one
``files.write_many`` (each file flushed to disk on its own, the flushes side by
side), and each laboratory's state in force is worked out once, for its receipt
and its answer alike.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import files, forms, plan
from planner.errors import IntakeError, LedgerError, PlannerError, Where
from planner.intake import (Checked, code_owners, condense, describe_slot, inspect_form,
                            spare_swaps)

if TYPE_CHECKING:
    from collections.abc import Mapping

    from planner.ledger import Ledger, ResultRow, Submission
    from planner.spec import Study

__all__ = [
    "RESULTS_DIR",
    "STAGING_DIR",
    "Receipt",
    "SlotState",
    "slot_state",
    "receipt_name",
    "write_receipts",
    "receive",
    "settle_results",
    "count_values",
]

RESULTS_DIR = "results"
STAGING_DIR = ".intake"


@dataclass(frozen=True, slots=True)
class Receipt:
    """What became of one accepted form; ``version`` is None when only checked or a repeat."""

    file: str
    lab: str
    sha256: str
    version: int | None
    supersedes: int | None
    stored: str | None
    values: int
    failed: int
    missing: tuple[str, ...]
    late_rows: tuple[str, ...]
    received_late: bool
    after_unseal: bool
    repeat_of: int | None
    receipt: str | None = None  # the receipt file, relative to the round folder
    chain_head: str | None = None  # "link:head" of the ledger right after recording
    in_force: int | None = None  # rows in force after merging with earlier versions
    outstanding: tuple[str, ...] = ()  # expected codes still without a value or remark
    merged: bool = False  # rows of more than one version are in force
    unfilled: tuple[tuple[str, str], ...] = ()  # (code, measurand) still without either

    @property
    def late(self) -> bool:
        return self.received_late or bool(self.late_rows)


def _results_name(sha256: str, kind: str) -> str:
    return f"{sha256}.{kind}"


def _study_of(round_folder: Path) -> Path:
    return round_folder.parent.parent  # <study>/rounds/<round>


def settle_results(round_folder: Path, ledger: Ledger, round_id: str) -> list[str]:
    """Finish or undo staged copies left by an interrupted receive; return the names moved in.

    A staged file the ledger records is moved into ``results/``; any other is removed.
    Call inside a ledger transaction, so no other receive is between stage and commit.
    """
    staging = round_folder / STAGING_DIR
    if not staging.is_dir():
        return []
    known = {s.sha256 for s in ledger.submissions(round_id)}
    moved = []
    for item in sorted(staging.iterdir()):
        sha = item.name.split(".")[0]
        if item.name.endswith(".part") or sha not in known:
            item.unlink(missing_ok=True)
            continue
        target = round_folder / RESULTS_DIR / item.name
        if target.exists():
            item.unlink(missing_ok=True)
        else:
            files.make_folders(target.parent, root=_study_of(round_folder))
            os.replace(item, target)
            moved.append(item.name)
    return moved


@dataclass(frozen=True, slots=True)
class SlotState:
    """The results in force of one slot: the merge of every version received, oldest first.

    ``rows`` pairs each row with the submission it came from (a later version's row
    replaces an earlier one of the same code and trial); ``outstanding`` lists the
    expected codes (``CODE`` or ``CODE@trial`` for a circulating set) that have neither
    a value nor a remark yet. With several measurands a row's measurements are merged
    one by one (a later version's result of a measurand replaces the earlier one; a
    form without a measurand's column leaves it as it was), a code is outstanding while
    a measurand measured on it has neither, and ``unfilled`` names those pairs
    (code as in ``outstanding``, measurand id).
    """

    slot: str
    versions: tuple[int, ...]
    rows: tuple[tuple[Submission, ResultRow], ...]
    outstanding: tuple[str, ...]
    unfilled: tuple[tuple[str, str], ...] = ()

    @property
    def complete(self) -> bool:
        return bool(self.versions) and not self.outstanding

    @property
    def merged(self) -> bool:
        """True when rows of more than one version are in force."""
        return len({s.version for s, _ in self.rows}) > 1


def slot_state(manifest: Mapping[str, Any], ledger: Ledger, round_id: str, slot: str, *,
               swaps: Mapping[str, str] | None = None,
               upto_version: int | None = None,
               absent: Mapping[str, frozenset[str]] | None = None) -> SlotState:
    """Return what is in force for one slot of a round, and what is still outstanding.

    A correction may carry only the rows it changes: the versions are merged in the
    order received, each row replacing the earlier one of its code and trial (and, with
    several measurands, each result the earlier one of its measurand).
    ``upto_version`` gives the state as it was right after that version. ``absent`` is
    ``plan.not_applicable(manifest, swaps)``, made once by a caller that looks at many slots.
    """
    history = [(s, ledger.result_rows(s.row)) for s in ledger.submissions(round_id, slot)
               if upto_version is None or s.version <= upto_version]
    return _merged_state(manifest, slot, history, swaps=swaps, absent=absent)


def _merged_state(manifest: Mapping[str, Any], slot: str,
                  history: Sequence[tuple[Submission, Sequence[ResultRow]]], *,
                  swaps: Mapping[str, str] | None,
                  absent: Mapping[str, frozenset[str]] | None) -> SlotState:
    """Return ``slot_state`` of the versions in ``history`` (oldest first, with their rows),
    for a caller that has read them from the ledger already."""
    from planner import audit
    from planner.intake import expected_codes

    merged: dict[tuple[str, int | None], tuple[Submission, ResultRow]] = {}
    measured: dict[tuple[str, int | None], dict[str, tuple[float | None, float | None]]] = {}
    for sub, rows in history:
        for row in rows:
            merged[(row.code, row.trial)] = (sub, row)
            measured.setdefault((row.code, row.trial), {}).update(
                (m, (v, u)) for m, v, u in row.measurements)
    ids = plan.manifest_measurands(manifest)
    if ids is None:
        absent = {}
    elif absent is None:
        absent = plan.not_applicable(manifest, swaps)
    unfilled: list[tuple[str, str]] = []
    if ids is None:
        done = {key for key, (_, row) in merged.items()
                if row.value is not None or row.remarks.strip()}
    else:
        # Intake records a blank only with a remark: an entry is a value or a reason.
        done = set()
        for key, (sub, row) in merged.items():
            have = measured[key]
            merged[key] = (sub, replace(row, measurements=tuple(
                (m, *have[m]) for m in ids if m in have)))
            if all(m in have for m in ids if m not in absent.get(key[0], ())):
                done.add(key)
    if manifest.get("mode") == "circulate":
        expected = [(code, trial) for trial, run in
                    enumerate(audit.slot_runs(manifest, slot), start=1) for code in run]
        outstanding = [f"{c}@{t}" for c, t in expected if (c, t) not in done]
        if ids is not None:
            unfilled = [(f"{c}@{t}", m) for c, t in expected for m in ids
                        if m not in absent.get(c, ()) and m not in measured.get((c, t), {})]
    else:
        lab = audit.split_slot(slot)[0]
        codes_done = {code for code, _ in done}
        outstanding = [c for c in expected_codes(manifest, lab, swaps or {}) if c not in codes_done]
        if ids is not None:
            have_code = {code: have for (code, _), have in measured.items()}
            unfilled = [(c, m) for c in outstanding for m in ids
                        if m not in absent.get(c, ()) and m not in have_code.get(c, {})]
    order = sorted(merged.values(), key=lambda sr: (sr[1].trial or 0, sr[1].position or 0,
                                                    sr[1].code))
    return SlotState(slot, tuple(s.version for s, _ in history), tuple(order),
                     tuple(outstanding), tuple(unfilled))


def count_values(rows: Sequence[ResultRow], *, several: bool) -> tuple[int, int]:
    """Return (results with a value, results without) of rows: one per row, or with
    ``several`` measurands one per measurement the rows carry."""
    if several:
        found = [v for r in rows for _, v, _ in r.measurements]
        return sum(1 for v in found if v is not None), sum(1 for v in found if v is None)
    return (sum(1 for r in rows if r.value is not None),
            sum(1 for r in rows if r.value is None))


def _other_rounds(ledger: Ledger, round_id: str) -> dict[str, str]:
    return {code: row.round for row in ledger.rounds() if row.round != round_id
            for code, *_ in ledger.units(row.row)}


def receive(study: Study, study_dir: Path, round_id: str, paths: Sequence[Path], ledger: Ledger,
            *, lab: str | None = None, check_only: bool = False, after_unseal: bool = False,
            reason: str | None = None,
            _pause: Callable[[str], None] | None = None) -> list[Receipt]:
    """Check returned forms and record them; return one Receipt per form.

    Raises IntakeError listing every problem (one line each, ``file:line: ...``)
    if any form has one; then nothing is recorded. ``check_only`` records
    nothing either way. Results after the key was opened need ``after_unseal``
    and a ``reason``. ``_pause`` is a test-only hook called with "before-commit"
    and "after-commit" so a test can kill the process there.
    """
    folder = plan.round_dir(study_dir, round_id)
    manifest = plan.read_manifest(folder)
    current = ledger.current_round(round_id)
    if current is None or current.fingerprint != manifest["fingerprint"]:
        raise LedgerError(f"round {round_id!r} in the folder does not match the ledger; it was "
                          "not planned in this study folder", Where(str(folder)))
    unsealed = ledger.round_status(round_id) in ("unsealed", "evaluated")
    if unsealed and not after_unseal:
        raise IntakeError(f"the key of round {round_id!r} has been opened; results that arrive "
                          "after unsealing are refused unless you add --after-unseal --reason "
                          "TEXT (they are then flagged in every output)")
    if after_unseal and not unsealed:
        raise IntakeError(f"the key of round {round_id!r} is still sealed; --after-unseal is "
                          "only for results that arrive after the key was opened")
    if after_unseal and not (reason and reason.strip()):
        raise IntakeError("--after-unseal needs --reason TEXT saying why late results are "
                          "taken; the reason is recorded in the ledger")
    if not paths:
        raise IntakeError("no result form given; name one or more returned forms")
    today = date.fromisoformat(ledger.now()[:10])
    swaps = spare_swaps(ledger, round_id)
    elsewhere = _other_rounds(ledger, round_id)
    owners = code_owners(manifest, swaps)  # one table for every form of the call
    absent = plan.not_applicable(manifest, swaps)
    labs = {x.id: x for x in study.laboratories}
    planned = ledger.events(round_id, "planned")
    # The chained planning event holds the tokens' digests; a round planned before
    # there were tokens has none, and its forms are taken without.
    digests = planned[-1].detail.get("tokens") if planned else None
    problems: list[PlannerError] = []
    accepted: list[tuple[forms.Form, Checked]] = []
    for path in paths:
        try:
            form = forms.read_form(path)
        except IntakeError as exc:
            problems.append(exc)
            continue
        checked = inspect_form(study, manifest, form, swaps=swaps, unsealed=unsealed, lab=lab,
                               today=today, elsewhere=elsewhere, token_digests=digests,
                               owners=owners, absent=absent, labs=labs)
        problems += checked.problems
        if not checked.problems:
            accepted.append((form, checked))
    by_lab: dict[str, str] = {}
    for form, checked in accepted:
        assert checked.lab is not None
        if checked.lab in by_lab:
            problems.append(IntakeError(f"a second form of {describe_slot(checked.lab)} (the "
                                        f"first is {by_lab[checked.lab]}); send one form per "
                                        "laboratory at a time", Where(form.path)))
        by_lab[checked.lab] = form.path
    if problems:
        raise IntakeError("\n".join(condense(problems)))
    due = date.fromisoformat(manifest["dates"]["results_due"])
    several = not study.shorthand
    plans = []
    stale: list[PlannerError] = []
    versions: dict[str, list[Submission]] = {}  # one read of the round's versions
    for sub in ledger.submissions(round_id):
        versions.setdefault(sub.lab, []).append(sub)
    for form, checked in accepted:
        lab_id = str(checked.lab)
        history = versions.get(lab_id, [])
        last = history[-1] if history else None
        old = [s for s in history[:-1] if s.sha256 == form.sha256]
        if old and (last is None or last.sha256 != form.sha256):
            # Recording it again would quietly bring back values that were corrected.
            stale.append(IntakeError(
                f"this file is version {old[-1].version} of {describe_slot(lab_id)}, already "
                f"replaced by version {last.version if last else '?'}; sending it again would "
                "bring back the values corrected since: send a form with the values that "
                "should be in force", Where(form.path)))
        plans.append((form, checked, last))
    if stale:
        raise IntakeError("\n".join(condense(stale)))
    receipts: list[Receipt] = []
    if check_only:
        return [_receipt(f, c, last, None, None, today > due, unsealed,
                         several=several) for f, c, last in plans]
    staging, results = folder / STAGING_DIR, folder / RESULTS_DIR
    # Links or files in the way are refused before anything is recorded.
    files.make_folders(staging, root=study_dir)
    files.make_folders(results, root=study_dir)
    staged: list[Path] = []
    try:
        with ledger.transaction():
            settle_results(folder, ledger, round_id)
            # receipts a receive stopped after its commit did not write
            write_receipts(folder, study.id, round_id, ledger, manifest)
            copies: dict[Path, bytes] = {}
            for form, checked, last in plans:
                if last is not None and last.sha256 == form.sha256:
                    receipts.append(_receipt(form, checked, last, None, None, False, unsealed,
                                             several=several))
                    continue
                target = staging / _results_name(form.sha256, form.kind)
                if target not in copies and not target.exists():
                    copies[target] = form.data
                    staged.append(target)
                version = ledger.add_submission(
                    round_id=round_id, lab=str(checked.lab), sha256=form.sha256,
                    file_name=Path(form.path).name, late=today > due or bool(checked.late_rows),
                    after_unseal=unsealed, reason=reason if unsealed else None,
                    rows=checked.rows)
                ledger.record_event(round_id, "received", {
                    "lab": checked.lab, "version": version, "sha256": form.sha256})
                stored = f"{RESULTS_DIR}/{_results_name(form.sha256, form.kind)}"
                receipts.append(_receipt(form, checked, last, version, stored, today > due,
                                         unsealed, several=several))
            # Every copy is on disk (each flushed on its own) before the commit records it;
            # owner-only, and never changed: a received form is evidence.
            files.write_many(list(copies.items()), root=study_dir, private=True, read_only=True)
            if _pause is not None:
                _pause("before-commit")
    except BaseException:
        for path in staged:
            path.unlink(missing_ok=True)
        raise
    if _pause is not None:
        _pause("after-commit")
    files.make_folders(results, root=study_dir)
    for path in staged:
        try:
            os.replace(path, results / path.name)
        except FileNotFoundError:
            pass  # another receive settled it into results/ already
    written, states = _write_receipts(folder, study.id, round_id, ledger, manifest)
    out = []
    for r in receipts:
        if r.version is not None:
            state = states.get((r.lab, r.version))
            if state is None:  # its receipt was there already: read the state anew
                state = slot_state(manifest, ledger, round_id, r.lab, swaps=swaps, absent=absent)
            name, head = written.get((r.lab, r.version), (receipt_name(r.lab, r.version), None))
            r = replace(r, in_force=len(state.rows), outstanding=state.outstanding,
                        merged=state.merged, receipt=name, chain_head=head,
                        unfilled=state.unfilled)
        out.append(r)
    return out


def receipt_name(slot: str, version: int) -> str:
    """Return a receipt's path in the round folder."""
    return f"{RESULTS_DIR}/receipt-{slot}-v{version}.txt"


def write_receipts(folder: Path, study_id: str, round_id: str, ledger: Ledger,
                   manifest: Mapping[str, Any]) -> dict[tuple[str, int], tuple[str, str]]:
    """Write the receipt of every recorded form version that has none; return what it wrote.

    A receipt is made from the ledger alone (the version's rows, the state in force after
    it, the chain link that recorded it), so a receive stopped after its commit has its
    receipts written by the next one, the same as they would have been. Returns
    (slot, version) -> (receipt path, "link:head").
    """
    return _write_receipts(folder, study_id, round_id, ledger, manifest)[0]


def _write_receipts(folder: Path, study_id: str, round_id: str, ledger: Ledger,
                    manifest: Mapping[str, Any]
                    ) -> tuple[dict[tuple[str, int], tuple[str, str]],
                               dict[tuple[str, int], SlotState]]:
    """Return ``write_receipts``'s answer and the state in force after each version it
    wrote a receipt of. The ledger is read once for all receipts: the versions, their rows,
    the received events."""
    subs = ledger.submissions(round_id)
    missing = [sub for sub in subs if not (folder / receipt_name(sub.lab, sub.version)).exists()]
    if not missing:
        return {}, {}
    from planner.intake import spare_swaps

    swaps = spare_swaps(ledger, round_id)
    several = plan.manifest_measurands(manifest)
    absent = plan.not_applicable(manifest, swaps) if several is not None else None
    # the time each version was recorded; the last event of a (slot, version) tells it
    recorded = {(e.detail.get("lab"), e.detail.get("version")): e.at
                for e in ledger.events(round_id, "received")}
    newest: dict[str, int] = {}
    for sub in missing:
        newest[sub.lab] = max(newest.get(sub.lab, 0), sub.version)
    # every version of a slot up to its newest without a receipt, oldest first, with rows
    history: dict[str, list[tuple[Submission, list[ResultRow]]]] = {}
    for sub in subs:
        if sub.version <= newest.get(sub.lab, 0):
            history.setdefault(sub.lab, []).append((sub, ledger.result_rows(sub.row)))
    out: dict[tuple[str, int], tuple[str, str]] = {}
    states: dict[tuple[str, int], SlotState] = {}
    texts: list[tuple[Path, bytes]] = []
    for sub in missing:
        name = receipt_name(sub.lab, sub.version)
        upto = [(s, rows) for s, rows in history[sub.lab] if s.version <= sub.version]
        rows = upto[-1][1]
        state = _merged_state(manifest, sub.lab, upto, swaps=swaps, absent=absent)
        link = ledger.link_of("submissions", sub.row)
        at = recorded.get((sub.lab, sub.version), sub.received_at)
        lines = [
            "ringplan receipt: a result form recorded in the study's ledger",
            f"study {study_id}, round {round_id}, laboratory {sub.lab}",
            f"form version {sub.version}" + (f" (replaces version {sub.version - 1})"
                                             if sub.version > 1 else "") + f", recorded {at}",
            f"file {sub.file_name}, SHA-256 {sub.sha256}",
            "this form: {} results with a value, {} without".format(*count_values(
                rows, several=several is not None)),
            "in force for the laboratory"
            + (" (merged with its earlier versions)" if state.merged else "")
            + f": {len(state.rows)} " + ("results" if several is None else "units")
            + (f"; still outstanding: {len(state.outstanding)} codes" if state.outstanding
               else "; complete"),
            f"ledger chain after recording: link {link.seq}, head {link.head}",
            "",
            "Keep this receipt. The ledger's chain must pass through this link and head for "
            "as",
            "long as the study lasts; 'ringplan chain DIR --link N' shows the head of link N.",
            "A ledger that does not has been rewritten since your form was recorded.",
        ]
        texts.append((folder / name, ("\n".join(lines) + "\n").encode("utf-8")))
        out[(sub.lab, sub.version)] = (name, str(link))
        states[(sub.lab, sub.version)] = state
    files.write_many(texts, root=_study_of(folder), private=True)
    return out, states


def _receipt(form: forms.Form, checked: Checked, last: Any, version: int | None,
             stored: str | None, received_late: bool, unsealed: bool, *,
             several: bool) -> Receipt:
    counts = count_values(checked.rows, several=several)
    repeat = last.version if last is not None and last.sha256 == form.sha256 else None
    return Receipt(
        file=form.path, lab=str(checked.lab), sha256=form.sha256, version=version,
        supersedes=last.version if last is not None and repeat is None else None,
        stored=stored, values=counts[0], failed=counts[1], missing=checked.missing,
        late_rows=checked.late_rows, received_late=received_late, after_unseal=unsealed,
        repeat_of=repeat)
