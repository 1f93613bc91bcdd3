"""Printed documents of a round, one module per document, each with ``render(...) -> Path``.

``print_round`` writes them all into the round folder::

    host/labels.pdf             every unit label, material by material, with separators
    host/prep-sheet.pdf         confidential: what to prepare, codes by material
    labs/<lab>/packing-list.pdf
    labs/<lab>/run-sheet.pdf
    labs/<lab>/result-form.xlsx beside the planner's result-form.csv

A circulating set (``design.mode: circulate``) has no parcels: the host prints
one label per artefact, and each stop of the route gets a hand-over sheet in
place of the packing list (``labs/<lab>/handover.pdf``; the host one per stop,
``handover-start.pdf``, ``handover-middle.pdf``, ``handover-end.pdf``), its
run sheet and its result form (the host's later stops ``run-sheet-<visit>.pdf``
and ``result-form-<visit>.xlsx``).

Only the host documents need the materials; they come from the decoded key,
which the caller decrypts in memory. Nothing a laboratory receives names a
material.
"""

from __future__ import annotations

from collections.abc import Collection, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

if TYPE_CHECKING:
    from planner.render._sheets import Geometry
    from planner.spec import Study

__all__ = ["KINDS", "check_options", "needs_key", "planned_documents", "print_calibration",
           "print_round", "use_fonts"]

KINDS = ("labels", "prep", "packing", "runsheets", "forms")
"""The kinds of document ``print_round(only=...)`` accepts."""


def _check_key(manifest: dict[str, Any], key: dict[str, Any]) -> None:
    from planner import seal
    from planner.errors import SealError

    if key.get("round") != manifest.get("round") or key.get("study") != manifest.get("study"):
        raise SealError(f"the key is for round {key.get('round')!r} of {key.get('study')!r}, "
                        f"not round {manifest.get('round')!r} of {manifest.get('study')!r}")
    found = seal.fingerprint(seal.canonical(key))
    if found != manifest.get("fingerprint"):
        raise SealError(f"the key's fingerprint {found[:16]}... does not match the round's "
                        f"{str(manifest.get('fingerprint'))[:16]}...; the key or the manifest "
                        "was changed")


def use_fonts(study: Study, study_dir: Path) -> None:
    """Set the documents drawn from now on in the study's fonts (``study.fonts``, else the
    bundled DejaVu family); raise SpecError for a font file missing or not TrueType."""
    from planner import fonts
    from planner.render import _layout

    _layout.use_fonts(fonts.for_study(study, study_dir))


def check_options(study: Study, study_dir: Path, manifest: dict[str, Any], *,
                  only: str | None = None, lab: str | None = None,
                  codes: Sequence[str] | None = None,
                  sheet: str | None = None) -> tuple[set[str], Geometry | None]:
    """Return the kinds of document to print and the label geometry (None without labels).

    Raises PlannerError naming the option (--only, --lab, --codes, --sheet) that is wrong,
    so that a caller can check before it asks for the passphrase.
    """
    from planner.errors import PlannerError, Where
    from planner.render import _sheets

    if only is not None and only not in KINDS:
        raise PlannerError(f"{only!r} is not a kind of document; use one of {', '.join(KINDS)}",
                           Where(field="--only"))
    if lab is not None and lab not in manifest["labs"]:
        raise PlannerError(f"{lab!r} is not a laboratory of round {manifest['round']!r}; use "
                           f"one of {', '.join(manifest['labs'])}", Where(field="--lab"))
    if codes and only not in (None, "labels"):
        raise PlannerError("--codes reprints labels; leave out --only or use --only labels",
                           Where(field="--codes"))
    wanted = {"labels"} if codes else ({only} if only else set(KINDS))
    if manifest.get("mode") == "circulate" and lab and "labels" in wanted:
        if only == "labels" or codes:
            raise PlannerError("a circulating set's labels are printed once, by the host, one "
                               "per artefact; leave out --lab", Where(field="--lab"))
        wanted.discard("labels")
    from planner import fonts

    fonts.for_study(study, study_dir)  # a font file that cannot be used, named early too
    geometry = None
    if "labels" in wanted:
        geometry = _sheets.load(sheet or study.study.label_sheet, [Path(study_dir) / "sheets"],
                                field="--sheet" if sheet else "study.label_sheet")
    return wanted, geometry


def print_round(study: Study, study_dir: Path, round_id: str, *, key: dict[str, Any] | None,
                only: str | None = None, lab: str | None = None,
                codes: Sequence[str] | None = None, start_at: int = 1,
                sheet: str | None = None, offset_mm: tuple[float, float] = (0.0, 0.0),
                workers: int = 1, issued: Collection[str] = (),
                hold: Collection[str] = ()) -> list[Path]:
    """Write the documents of a round into its folder and return their paths.

    ``only`` picks one kind of ``KINDS``; ``lab`` limits every document to one
    laboratory (its labels then go to ``labs/<lab>/labels.pdf`` without
    separators, and the prep sheet is left out); ``codes`` reprints the labels
    of those codes only, to ``labels-reprint.pdf``; ``issued`` are the codes the host sent
    as replacements, labelled as spares (``labels.host_labels``). Raises LedgerError if the
    round was not planned, SealError if the key is not the round's,
    PlannerError for an unknown kind, laboratory or sheet. ``hold`` names kinds to leave
    out (the packing lists while the shipping gate is closed).
    """
    from planner import plan
    from planner.render import _qr, labels, prep_sheet

    folder = plan.round_dir(study_dir, round_id)
    manifest = plan.read_manifest(folder)
    if key is not None:
        _check_key(manifest, key)
    wanted, geometry = check_options(study, study_dir, manifest, only=only, lab=lab,
                                     codes=codes, sheet=sheet)
    wanted -= set(hold)
    use_fonts(study, study_dir)
    if key is None and needs_key(wanted, labels=geometry is not None, lab=lab):
        from planner.errors import SealError

        raise SealError("labels and the preparation sheet name materials: they need the key")
    paper = study.study.paper
    lab_ids = [lab] if lab else [x.id for x in study.laboratories if x.id in manifest["labs"]]
    out: list[Path] = []
    items: list[Any] = []
    if geometry is not None:
        if lab:
            items = labels.lab_labels(study, manifest, key, lab)
        else:
            items = labels.host_labels(study, manifest, key, issued=issued)
        if codes:
            items = labels.pick(items, codes, round_id=round_id)
    job = _LabJob(study, folder, manifest, key, wanted, paper)
    with _qr.session():
        # Every symbol once, in batches: a unit's label and its run-sheet row share it.
        _qr.prepare([_code_text(item.code) for item in items if isinstance(item, labels.Label)]
                    + (_run_sheet_codes(manifest, lab_ids) if "runsheets" in wanted else []),
                    workers=workers)
        # The laboratories' documents are made in worker processes while this one draws
        # the labels and the preparation sheet.
        pending = _lab_documents_elsewhere(job, lab_ids, workers)
        try:
            if geometry is not None:
                target = folder / "labs" / lab if lab else folder / "host"
                name = "labels-reprint.pdf" if codes else "labels.pdf"
                out.append(labels.render(target / name, items, geometry,
                                         title=f"labels, {study.id} round {round_id}",
                                         start_at=start_at, offset_mm=offset_mm,
                                         workers=1 if pending else workers))
            if "prep" in wanted and not lab:
                out.append(prep_sheet.render(folder / "host" / "prep-sheet.pdf", study,
                                             manifest, key, paper=paper))
        except BaseException:
            if pending is not None:
                _stop(pending)
            raise
        if pending is None:
            for lab_id in lab_ids:
                out += _lab_documents(job, lab_id)
        else:
            out += _gathered(pending)
    return out


def _code_text(code: str) -> str:
    from planner import codes

    return codes.format(code)


def _run_sheet_codes(manifest: dict[str, Any], lab_ids: Sequence[str]) -> list[str]:
    """Return the printed codes of the run sheets of ``lab_ids``, every stop's included."""
    found = [c for lab_id in lab_ids for run in manifest["labs"].get(lab_id, {}).get("trials", ())
             for c in run]
    found += [c for visit in (manifest.get("host_visits") or {}).values() for run in visit
              for c in run]
    return [_code_text(c) for c in found]


class _LabJob:
    """What every laboratory's documents are made from (shared with forked workers)."""

    __slots__ = ("folder", "key", "manifest", "paper", "study", "wanted")

    def __init__(self, study: Study, folder: Path, manifest: dict[str, Any],
                 key: dict[str, Any] | None, wanted: set[str], paper: str) -> None:
        self.study, self.folder, self.manifest = study, folder, manifest
        self.key, self.wanted, self.paper = key, wanted, paper


_job: _LabJob | None = None
"""The job of the forked workers of ``_lab_documents_elsewhere``, set before they fork."""

_LABS_PER_TASK = 8


def _lab_documents(job: _LabJob, lab_id: str) -> list[Path]:
    """Write one laboratory's packing list (or hand-over sheets), run sheets and forms."""
    from planner import language, plan
    from planner.render import packing_list, result_form, run_sheet

    study, folder, manifest, wanted, paper = (job.study, job.folder, job.manifest, job.wanted,
                                              job.paper)
    lab_dir = folder / "labs" / lab_id
    if manifest.get("mode") == "circulate":
        return _print_stops(study, manifest, lab_dir, lab_id, wanted, paper=paper,
                            token=_token(folder, job.key, lab_id))
    out: list[Path] = []
    if "packing" in wanted:
        out.append(packing_list.render(lab_dir / "packing-list.pdf", study, manifest,
                                       lab_id, paper=paper))
    token = _token(folder, job.key, lab_id)
    if "runsheets" in wanted:
        out.append(run_sheet.render(lab_dir / "run-sheet.pdf", study, manifest, lab_id,
                                    paper=paper, token=token))
    if "forms" in wanted:
        csv_path = lab_dir / "result-form.csv"
        if csv_path.is_file():
            text = csv_path.read_text(encoding="utf-8")
        else:
            text = plan.result_form_csv(study, manifest, lab_id, token=token)
        out.append(result_form.render(lab_dir / "result-form.xlsx", text,
                                      language=language.of(study.lab(lab_id))))
    return out


def _lab_task(lab_ids: list[str]) -> tuple[list[Path], tuple[type, str, Any] | None]:
    """Write the documents of ``lab_ids`` in a forked worker; a user's error comes back as
    its class, message and place (an exception's pickle would lose the place)."""
    from planner.errors import PlannerError

    assert _job is not None
    out: list[Path] = []
    try:
        for lab_id in lab_ids:
            out += _lab_documents(_job, lab_id)
    except PlannerError as exc:
        return out, (type(exc), exc.message, exc.where)
    return out, None


def _lab_documents_elsewhere(job: _LabJob, lab_ids: Sequence[str], workers: int) -> Any:
    """Start the laboratories' documents in ``workers`` forked processes, which share this
    one's memory (the study, the manifest and the symbols made); return the pending tasks,
    or None when they are better made here (one worker, few laboratories, nothing wanted,
    or no fork on this system)."""
    import multiprocessing

    global _job
    if (workers <= 1 or len(lab_ids) < 2 * _LABS_PER_TASK
            or not job.wanted & {"packing", "runsheets", "forms"}
            or "fork" not in multiprocessing.get_all_start_methods()):
        return None
    from planner.render import _workers

    _job = job
    pool = _workers.pool(workers, fork=True)
    tasks = [pool.submit(_lab_task, list(lab_ids[i:i + _LABS_PER_TASK]))
             for i in range(0, len(lab_ids), _LABS_PER_TASK)]
    return pool, tasks


def _gathered(pending: Any) -> list[Path]:
    """Return the paths of the pending tasks in order; raise the first user's error."""
    _, tasks = pending
    out: list[Path] = []
    try:
        for task in tasks:
            paths, error = task.result()
            out += paths
            if error is not None:
                kind, message, where = error
                raise kind(message, where)
    finally:
        _stop(pending)
    return out


def _stop(pending: Any) -> None:
    """Shut the workers of ``_lab_documents_elsewhere`` down, cancelling what has not begun."""
    global _job
    pending[0].shutdown(cancel_futures=True)
    _job = None


def needs_key(wanted: set[str], *, labels: bool, lab: str | None) -> bool:
    """Return whether these documents need the key: labels and the preparation sheet do; the
    participants' packing lists, run sheets and forms are made from the manifest alone."""
    return labels or ("prep" in wanted and not lab)


def _token(folder: Path, key: dict[str, Any] | None, lab_id: str) -> str:
    """Return a laboratory's submission token: from the key's secret, or from the form plan
    wrote (which carries it), so that a participant's documents need no key."""
    from planner import forms, tokens

    if key is not None:
        return tokens.submission_token(bytes.fromhex(str(key["secret"])), lab_id)
    found = forms.read_form(folder / "labs" / lab_id / "result-form.csv").ident(
        "submission token")
    if found is None:
        from planner.errors import SealError

        raise SealError(f"the result form of {lab_id!r} carries no submission token; print its "
                        "documents with the key")
    return tokens.compact(found[0])


def planned_documents(study: Study, manifest: dict[str, Any], *, wanted: set[str],
                      labels: bool, lab: str | None = None, codes: Sequence[str] | None = None
                      ) -> list[str]:
    """Return the round-folder paths ``print_round`` will write for these options.

    The print command records them in the ledger before the key is used, so that a
    printing of host documents is on record even if the process is stopped half-way.
    """
    from planner.render import handover, run_sheet

    out: list[str] = []
    if labels:
        out.append(f"{f'labs/{lab}' if lab else 'host'}/"
                   f"{'labels-reprint.pdf' if codes else 'labels.pdf'}")
    if "prep" in wanted and not lab:
        out.append("host/prep-sheet.pdf")
    lab_ids = [lab] if lab else [x.id for x in study.laboratories if x.id in manifest["labs"]]
    for lab_id in lab_ids:
        if manifest.get("mode") == "circulate":
            for station in manifest["route"]:
                if station["lab"] != lab_id:
                    continue
                visit = station.get("visit")
                later = visit if visit not in (None, "start") else None
                stem = f"result-form-{later}" if later else "result-form"
                names = {"packing": handover.file_name(station),
                         "runsheets": run_sheet.file_name(later), "forms": f"{stem}.xlsx"}
                out += [f"labs/{lab_id}/{names[k]}" for k in ("packing", "runsheets", "forms")
                        if k in wanted]
            continue
        names = {"packing": "packing-list.pdf", "runsheets": "run-sheet.pdf",
                 "forms": "result-form.xlsx"}
        out += [f"labs/{lab_id}/{names[k]}" for k in ("packing", "runsheets", "forms")
                if k in wanted]
    return out


def _print_stops(study: Study, manifest: dict[str, Any], lab_dir: Path, lab_id: str,
                 wanted: set[str], *, paper: str, token: str) -> list[Path]:
    """Write a circulating set's documents of every stop of one laboratory; return their paths."""
    from planner import language, plan
    from planner.render import handover, result_form, run_sheet

    out: list[Path] = []
    for station in manifest["route"]:
        if station["lab"] != lab_id:
            continue
        visit = station.get("visit")
        later = visit if visit not in (None, "start") else None
        if "packing" in wanted:
            out.append(handover.render(lab_dir / handover.file_name(station), study, manifest,
                                       station, paper=paper))
        if "runsheets" in wanted:
            out.append(run_sheet.render(lab_dir / run_sheet.file_name(later), study, manifest,
                                        lab_id, paper=paper, visit=later, token=token))
        if "forms" in wanted:
            stem = f"result-form-{later}" if later else "result-form"
            csv_path = lab_dir / f"{stem}.csv"
            if csv_path.is_file():
                text = csv_path.read_text(encoding="utf-8")
            else:
                text = plan.result_form_csv(study, manifest, lab_id, later, token=token)
            out.append(result_form.render(lab_dir / f"{stem}.xlsx", text,
                                          language=language.of(study.lab(lab_id))))
    return out


def print_calibration(path: Path, sheet: Any, offset_mm: tuple[float, float] = (0.0, 0.0)
                      ) -> Path:
    """Write the alignment page of ``sheet`` (a Geometry, or a sheet name) to ``path``; return it."""
    from planner.render import _sheets, labels

    geometry = _sheets.load(sheet) if isinstance(sheet, str) else sheet
    return labels.render_calibration(path, geometry, offset_mm=offset_mm)
