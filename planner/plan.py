"""Assemble a round: units, codes and run orders from a Study and a secret, and write it.

``plan_round`` is pure: the same study, round, host, dates and secret give the
same RoundPlan on any machine. ``write_round`` puts it on disk and in the
ledger as one step: the files go to a hidden folder first, the ledger rows go
in one transaction, and the folder is renamed into place just before the
commit, so a failure part-way leaves neither a round folder nor ledger rows.
"""

from __future__ import annotations

import csv
import io
import json
import os
import re
import secrets
import shutil
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from datetime import date
from pathlib import Path
from typing import TYPE_CHECKING, Any

from planner import circulate, codes, design, draw, files, homogeneity, language, seal, tokens
from planner.errors import LedgerError, PlannerError, SealError, Where

if TYPE_CHECKING:
    from planner.calendar import RoundDates
    from planner.circulate import Route
    from planner.language import Texts
    from planner.ledger import Ledger
    from planner.spec import Measurand, Study

__all__ = [
    "Unit", "RoundPlan", "plan_round", "key_of", "manifest_of", "result_form_csv",
    "definition_of", "study_of_definition", "round_study", "check_manifest", "settle_round",
    "HOST_SEALED_NAME", "sealing_of", "seal_round_key",
    "Frame", "frame_of",
    "frame_from_key",
    "write_round", "round_dir", "dates_for", "read_manifest", "units_from_key", "parcel_spares",
    "compare_units",
    "FORM_COLUMNS", "FORM_IDENTITY", "MANIFEST_NAME", "KINDS", "run_orders", "build_units",
    "host_visit_forms",
    "NOT_APPLICABLE", "form_columns", "uncertainty_column", "measurands_line",
    "read_measurands_line", "not_measured", "codes_not_measured", "manifest_measurands",
    "not_applicable", "measurands_of_manifest",
    "expected_runs", "manifest_runs",
]

MANIFEST_NAME = "manifest.json"
HOST_SEALED_NAME = "key.host.sealed"  # the host's own copy, with trustees
KINDS = ("test", "spare", "retained", "homogeneity", "artefact")
FORM_COLUMNS = ("trial", "position", "code", "value", "uncertainty", "date", "analyst", "remarks")
FORM_IDENTITY = ("study", "round", "visit", "laboratory", "fingerprint", "unit", "decimal",
                 "measurand", "results due", "submission token", "measurands")
"""Keys of a result form's identity lines (``# round: 2027-1``): English in every language.
A study in the single-measurand form has ``unit`` and ``measurand``; one with ``measurands:``
has ``measurands`` (``measurands_line``) in their place."""
NOT_APPLICABLE = "n/a"
"""What a result form holds in the cell of a measurand that is not measured on that unit."""
_KEY_FORMAT = "ringplan-key/3"
# Keys of rounds planned while every parcel carried spares of each material (their spare
# units belong to the laboratories); since ringplan-key/3 the host keeps every spare.
_PARCEL_SPARE_FORMATS = frozenset({"ringplan-key/1", "ringplan-key/2"})
_DEFINITION_FORMAT = "ringplan-round/1"


@dataclass(frozen=True, slots=True)
class Unit:
    code: str
    material: str
    kind: str
    lab: str
    trial: int | None
    position: int | None


@dataclass(frozen=True, slots=True)
class RoundPlan:
    study_id: str
    round_id: str
    host: str
    secret: bytes
    salt: bytes
    units: tuple[Unit, ...]
    dates: RoundDates
    fingerprint: str
    route: Route | None = None
    definition: bytes = b""  # the study as planned, canonical JSON (``definition_of``)
    frame: dict[str, Any] | None = None  # what rebuilding the units needs (``frame_of``)
    skipped: tuple[str, ...] = ()  # codes of earlier rounds the draw passed over


@dataclass(frozen=True, slots=True)
class _Item:
    id: str


@dataclass(frozen=True, slots=True)
class Frame:
    """What rebuilding a round's units from its secret needs, as the key carries it.

    It stands in for the Study in ``build_units``, ``run_orders`` and ``expected_runs``,
    so that a participant holding only key.json and the manifest can rebuild the round.
    """

    laboratories: tuple[_Item, ...]
    materials: tuple[_Item, ...]
    design: Any
    stops: tuple[tuple[str, str | None], ...] | None = None


def frame_of(study: Study, host: str) -> dict[str, Any]:
    """Return the key's ``frame``: laboratory and material ids in order, design, stops."""
    stops = (circulate.stops(study, host) if study.design.mode == "circulate" else None)
    return {"laboratories": [lab.id for lab in study.laboratories],
            "materials": [m.id for m in study.materials],
            "design": study.design.model_dump(mode="json"),
            "stops": [list(s) for s in stops] if stops is not None else None}


def frame_from_key(key: dict[str, Any]) -> Frame:
    """Return the Frame a key carries; ValueError/KeyError/TypeError if it has none."""
    from planner.spec import Design

    f = key["frame"]
    stops = f.get("stops")
    return Frame(tuple(_Item(str(x)) for x in f["laboratories"]),
                 tuple(_Item(str(x)) for x in f["materials"]),
                 Design.model_validate(f["design"]),
                 tuple((str(a), b) for a, b in stops) if stops is not None else None)


def definition_of(study: Study) -> bytes:
    """Return the round definition: the validated study as planned, as canonical JSON.

    Everything that defines a round (laboratories, materials and their order, design,
    schedule, evaluation settings) is frozen in it at planning. It is kept in the
    ledger's chained planning event (not in the round folder, which names no material);
    its SHA-256 goes into the key (and so into the fingerprint printed on every packing
    list) and the manifest, and every later command on the round reads the round from it.
    """
    body = {"format": _DEFINITION_FORMAT,
            "study": study.model_dump(mode="json", by_alias=True, exclude_none=True)}
    return seal.canonical(body)


def study_of_definition(data: bytes, *, where: Where) -> Study:
    """Return the Study frozen in a round definition; LedgerError if it cannot be read."""
    from planner.spec import Study

    try:
        body = json.loads(data)
        if body.get("format") != _DEFINITION_FORMAT:
            raise ValueError(body.get("format"))
        return Study.model_validate(body["study"])
    except (ValueError, KeyError, TypeError, AttributeError):
        raise LedgerError("the round definition cannot be read as one ringplan wrote; restore "
                          "it from a backup", where) from None


def run_orders(study: Study | Frame, *, host: str, secret: bytes
               ) -> dict[tuple[str, int], tuple[str, ...]]:
    """Return the materials in run order for every (laboratory or stop, trial) of a round.

    In circulating mode the slots are the route's stops (the host's later stops
    as ``host@middle`` and ``host@end``); otherwise the laboratories.
    """
    d = study.design
    if d.mode == "circulate":
        stops = study.stops if isinstance(study, Frame) else circulate.stops(study, host)
        keys = [circulate.station_key(lab, visit) for lab, visit in stops or ()]
    else:
        keys = [lab.id for lab in study.laboratories]
    slots = [(key, t) for key in keys for t in range(1, d.trials + 1)]
    return design.run_orders([m.id for m in study.materials], slots, scheme=d.run_order,
                             stream=draw.Stream(secret, "orders"))


def build_units(study: Study | Frame, *, host: str, secret: bytes,
                taken: Iterable[str] = (), skipped: list[str] | None = None,
                spares_in_parcels: bool = False) -> tuple[Unit, ...]:
    """Return every unit of a round (tests, spares, retained, homogeneity) with codes and positions.

    Codes come from the secret's "codes" stream in a fixed unit order; run orders
    from its "orders" stream. A circulating set has one unit per material, the
    artefact, held by the host between stops. Codes in ``taken`` (issued in earlier
    rounds) are passed over and appended to ``skipped``.

    Spares are a pool per material kept by the host (``spares_per_lab`` for each
    laboratory), sent one at a time as replacements (``planner.spares``): a parcel
    that carried spares of each material would let a laboratory learn from the
    answers to its spare requests which of its units share a material.
    ``spares_in_parcels`` rebuilds a round planned before that (``parcel_spares``),
    whose spares belong to the laboratories; the codes are the same either way.
    """
    d = study.design
    material_ids = [m.id for m in study.materials]
    skeleton: list[tuple[str, str, str, int | None, int | None]] = []
    if d.mode == "circulate":
        skeleton = [(material, "artefact", host, None, None) for material in material_ids]
    else:
        orders = run_orders(study, host=host, secret=secret)
        for material in material_ids:
            for lab in study.laboratories:
                for trial in range(1, d.trials + 1):
                    position = orders[(lab.id, trial)].index(material) + 1
                    skeleton.append((material, "test", lab.id, trial, position))
            # One run per laboratory, as when spares went in the parcels, so that the
            # codes drawn from a secret stay where they were.
            for lab in study.laboratories:
                keeper = lab.id if spares_in_parcels else host
                skeleton += [(material, "spare", keeper, None, None)] * d.spares_per_lab
            skeleton += [(material, "retained", host, None, None)] * d.retained_by_host
            skeleton += [(material, "homogeneity", host, None, None)] * d.homogeneity_units
    drawn = codes.new_codes(draw.Stream(secret, "codes"), len(skeleton), taken=set(taken),
                            skipped=skipped)
    return tuple(Unit(code, *rest) for code, rest in zip(drawn, skeleton, strict=True))


def plan_round(study: Study, *, round_id: str, host: str, dates: RoundDates, secret: bytes,
               taken: Iterable[str] = (), route: Route | None = None) -> RoundPlan:
    """Return the RoundPlan of ``round_id`` hosted by ``host``, drawn from ``secret``.

    A circulating study needs its ``route`` (from ``circulate.schedule_route``).
    """
    if (study.design.mode == "circulate") != (route is not None):
        raise ValueError("a route is needed exactly when the study circulates one set")
    skipped: list[str] = []
    units = build_units(study, host=host, secret=secret, taken=taken, skipped=skipped)
    salt = draw.Stream(secret, "salt").token(16)
    definition = definition_of(study)
    frame = frame_of(study, host)
    plan = RoundPlan(study.id, round_id, host, secret, salt, units, dates, "", route, definition,
                     frame, tuple(skipped))
    return RoundPlan(study.id, round_id, host, secret, salt, units, dates,
                     seal.fingerprint(seal.canonical(key_of(plan))), route, definition, frame,
                     tuple(skipped))


def dates_for(study: Study, host: str, *,
              receive_by: date | None = None) -> tuple[RoundDates, Route | None]:
    """Return a round's dates (and route, for a circulating set) after checking stability.

    Raises SpecError naming each material that would not last to the end of testing.
    """
    from planner import calendar

    if study.design.mode == "circulate":
        route = circulate.schedule_route(study, host, start=receive_by)
        circulate.check_stability(study, route)
        return circulate.round_dates(study, route), route
    dates = calendar.schedule_round(study, host, receive_by=receive_by)
    calendar.check_stability(study, dates)
    return dates, None


def key_of(plan: RoundPlan) -> dict[str, Any]:
    """Return the decoding key of a plan as a JSON-ready dict, units sorted by code."""
    return {
        "format": _KEY_FORMAT,
        "study": plan.study_id,
        "round": plan.round_id,
        "host": plan.host,
        "secret": plan.secret.hex(),
        "salt": plan.salt.hex(),
        "definition": seal.fingerprint(plan.definition),
        "frame": plan.frame,
        "skipped": sorted(plan.skipped),
        "units": [{"code": u.code, "material": u.material, "kind": u.kind, "lab": u.lab,
                   "trial": u.trial, "position": u.position}
                  for u in sorted(plan.units, key=lambda u: u.code)],
    }


def parcel_spares(key: dict[str, Any]) -> bool:
    """Return whether a key's round was planned with spares in the laboratories' parcels."""
    return key.get("format") in _PARCEL_SPARE_FORMATS


def units_from_key(key: dict[str, Any]) -> tuple[Unit, ...]:
    """Return the units written in a decoded key, sorted by code."""
    try:
        return tuple(sorted((Unit(str(u["code"]), str(u["material"]), str(u["kind"]), str(u["lab"]),
                                  u["trial"], u["position"]) for u in key["units"]),
                            key=lambda u: u.code))
    except (KeyError, TypeError):
        raise SealError("the key has no readable list of units") from None


def compare_units(expected: Iterable[Unit], found: Iterable[Unit]) -> list[str]:
    """Return one line per unit that differs between a rebuilt round and a key (empty if equal)."""
    want = {u.code: u for u in expected}
    have = {u.code: u for u in found}
    out = []
    for code in sorted(want.keys() | have.keys()):
        a, b = want.get(code), have.get(code)
        shown = codes.format(code) if codes.is_valid(code) else repr(code)
        if a is None:
            out.append(f"unit {shown}: in the key but not in the rebuilt round")
        elif b is None:
            out.append(f"unit {shown}: in the rebuilt round but missing from the key")
        else:
            diffs = [f"{f} is {getattr(b, f)!r}, rebuilt {getattr(a, f)!r}"
                     for f in ("material", "kind", "lab", "trial", "position")
                     if getattr(a, f) != getattr(b, f)]
            if diffs:
                out.append(f"unit {shown}: " + "; ".join(diffs))
    return out


def manifest_of(study: Study, plan: RoundPlan) -> dict[str, Any]:
    """Return the public manifest: per laboratory its codes by trial in run order, no materials.

    The units the host keeps (its spare pool, retained and homogeneity units) are listed
    under ``host_units`` by kind. A manifest of a round planned while parcels carried
    spares also lists each laboratory's ``spares``; intake still reads those. A
    circulating round also carries its route, the host's later stops and the artefacts.
    """
    runs = expected_runs(study, host=plan.host, secret=plan.secret, units=plan.units)
    dates = plan.dates.to_json()["labs"]
    out: dict[str, Any] = {
        **_manifest_head(study, plan),
        "labs": {lab.id: {"trials": runs[lab.id], **dates.get(lab.id, {})}
                 for lab in study.laboratories},
    }
    if plan.route is None:
        out["host_units"] = {kind: sorted(u.code for u in plan.units if u.kind == kind)
                             for kind in ("spare", "retained", "homogeneity")}
    else:
        out["route"] = plan.route.to_json()
        out["host_visits"] = {s.visit: runs[s.key] for s in plan.route.stations
                              if s.visit not in (None, "start")}
        out["artefacts"] = sorted(u.code for u in plan.units)
    return out


def _manifest_head(study: Study, plan: RoundPlan) -> dict[str, Any]:
    dates = plan.dates.to_json()
    head = {
        "format": "ringplan-manifest/1",
        "study": study.id,
        "title": study.study.title,
        "round": plan.round_id,
        "host": plan.host,
        "mode": study.design.mode,
        "measurand": study.study.measurand,
        "unit": study.study.unit,
        "fingerprint": plan.fingerprint,
        "definition": seal.fingerprint(plan.definition),
        "run_order": study.design.run_order,
        "trials": study.design.trials,
        "dates": {k: v for k, v in dates.items() if k != "labs"},
    }
    if study.shorthand:
        return head
    # Several measurands: what each is and, for one measured on some materials only, the
    # codes it is not measured on (the forms and run sheets mark them; intake reads them).
    del head["measurand"], head["unit"]
    return {**head, "measurands": measurands_of_manifest(study),
            "not_measured": not_measured(study, plan.units)}


def measurands_of_manifest(study: Study) -> list[dict[str, Any]]:
    """Return the manifest's ``measurands`` list of a study with several measurands."""
    return [_measurand_json(m) for m in study.all_measurands]


def _measurand_json(m: Measurand) -> dict[str, Any]:
    return {"id": m.id, "name": m.name, "unit": m.unit, "resolution": m.resolution,
            "method": m.method, "materials": list(m.materials) if m.materials else None,
            "uncertainty": m.uncertainty}


def not_measured(study: Study, units: Iterable[Unit]) -> dict[str, list[str]]:
    """Return measurand id -> the codes (sorted) of the units a laboratory reports on that it
    is not measured on, for every measurand measured on some materials only.

    A unit the host sends in place of a damaged one holds the same material and takes the
    damaged unit's place here (``not_applicable``).
    """
    return codes_not_measured({m.id: m.materials for m in study.all_measurands}, units)


def codes_not_measured(materials: Mapping[str, Iterable[str] | None], units: Iterable[Unit]
                       ) -> dict[str, list[str]]:
    """Return ``not_measured`` from measurand id -> the materials it is measured on (None:
    every material), as a manifest's ``measurands`` list them; ``audit`` checks a manifest
    against its key with it."""
    reported = [u for u in units if u.kind in ("test", "artefact")]
    out: dict[str, list[str]] = {}
    for mid, found in materials.items():
        if found is not None:
            chosen = frozenset(found)
            out[mid] = sorted(u.code for u in reported if u.material not in chosen)
    return out


def manifest_measurands(manifest: Mapping[str, Any]) -> tuple[str, ...] | None:
    """Return the measurand ids a round's manifest lists, in spec order; None for a study in
    the single-measurand form (its forms have the one ``value`` column)."""
    found = manifest.get("measurands")
    return None if found is None else tuple(str(m["id"]) for m in found)


def not_applicable(manifest: Mapping[str, Any], swaps: Mapping[str, str] | None = None, *,
                   only: Iterable[str] | None = None) -> dict[str, frozenset[str]]:
    """Return code -> the ids of the measurands not measured on it (codes with none left out).

    ``swaps`` (damaged -> spare, in issue order) carry a damaged unit's measurands over to
    the spare that replaced it: it holds the same material. ``only`` limits the answer to
    these codes (one laboratory's documents), which is quicker in a large round.
    """
    out: dict[str, set[str]] = {}
    wanted = None if only is None else set(only) | set(swaps or ())
    for measurand, found in (manifest.get("not_measured") or {}).items():
        for code in (found if wanted is None else wanted.intersection(found)):
            out.setdefault(str(code), set()).add(str(measurand))
    for damaged, spare in (swaps or {}).items():
        if damaged in out:
            out.setdefault(spare, set()).update(out[damaged])
    return {code: frozenset(ids) for code, ids in out.items()}


def form_columns(study: Study) -> tuple[str, ...]:
    """Return the header of a study's result form.

    The single-measurand form keeps ``FORM_COLUMNS``; a study with ``measurands:`` has, in
    place of ``value`` and ``uncertainty``, per measurand in spec order a column named by its
    id and, unless its uncertainty is "none", ``<id> uncertainty``.
    """
    if study.shorthand:
        return FORM_COLUMNS
    results: list[str] = []
    for m in study.all_measurands:
        results.append(m.id)
        if m.uncertainty != "none":
            results.append(uncertainty_column(m.id))
    return ("trial", "position", "code", *results, "date", "analyst", "remarks")


def uncertainty_column(measurand_id: str) -> str:
    """Return the form column of a measurand's expanded uncertainty: ``<id> uncertainty``."""
    return f"{measurand_id} uncertainty"


def measurands_line(study: Study) -> str:
    """Return the value of a form's ``measurands`` identity line: ``mfr [g/10 min]; ...``."""
    return "; ".join(f"{m.id} [{m.unit}]" for m in study.all_measurands)


_MEASURAND_ITEM = re.compile(r"\s*([^\s\[\];]+)\s*\[(.*)\]\s*")


def read_measurands_line(text: str) -> list[tuple[str, str]] | None:
    """Return (id, unit) of each item of a ``measurands`` identity line, or None if an item
    is not written ``id [unit]``."""
    out = []
    for item in text.split("; "):
        found = _MEASURAND_ITEM.fullmatch(item)
        if found is None:
            return None
        out.append((found.group(1), found.group(2).strip()))
    return out


def expected_runs(study: Study | Frame, *, host: str, secret: bytes,
                  units: Iterable[Unit]) -> dict[str, list[list[str]]]:
    """Return the codes in run order per trial for every laboratory (or stop) of a round."""
    d = study.design
    if d.mode == "circulate":
        code_of = {u.material: u.code for u in units}
        orders = run_orders(study, host=host, secret=secret)
        stops = study.stops if isinstance(study, Frame) else circulate.stops(study, host)
        keys = [circulate.station_key(lab, visit) for lab, visit in stops or ()]
        return {key: [[code_of[m] for m in orders[(key, t)]] for t in range(1, d.trials + 1)]
                for key in keys}
    runs: dict[str, list[list[Unit]]] = {lab.id: [[] for _ in range(d.trials)]
                                         for lab in study.laboratories}
    for u in units:
        if u.kind == "test" and u.trial is not None and u.lab in runs:
            runs[u.lab][u.trial - 1].append(u)
    return {lab: [[u.code for u in sorted(run, key=lambda u: u.position or 0)] for run in trials]
            for lab, trials in runs.items()}


def manifest_runs(manifest: dict[str, Any]) -> dict[str, list[list[str]]]:
    """Return the run orders a manifest published, keyed like ``expected_runs``."""
    host = manifest["host"]
    out = {lab: entry["trials"] for lab, entry in manifest["labs"].items()}
    out.update({circulate.station_key(host, visit): trials
                for visit, trials in manifest.get("host_visits", {}).items()})
    return out


def host_visit_forms(manifest: dict[str, Any]) -> list[tuple[str, str]]:
    """Return (visit, form file name) of the host's extra stops in a circulating round."""
    return [(visit, f"result-form-{visit}.csv") for visit in manifest.get("host_visits", {})]


def result_form_csv(study: Study, manifest: dict[str, Any], lab_id: str,
                    visit: str | None = None, *, token: str | None = None) -> str:
    """Return the text of a laboratory's blank result form (a host ``visit`` of a circulating set).

    Identity lines start with '#'; laboratories that write a decimal comma get
    ';' as the separator, as spreadsheets in those locales expect. ``token`` is the
    laboratory's submission token (``planner.tokens``), printed on its form only.
    A study with ``measurands:`` has a column per measurand (``form_columns``), a note
    line saying what each is, and ``n/a`` in the cells of a measurand not measured on
    that unit.
    """
    lab = study.lab(lab_id)
    sep = ";" if lab.decimal == "comma" else ","
    out = io.StringIO()
    if study.shorthand:
        identity = [("study", study.id), ("round", manifest["round"]), ("laboratory", lab.id),
                    ("fingerprint", manifest["fingerprint"]), ("unit", study.study.unit),
                    ("decimal", lab.decimal), ("measurand", study.study.measurand),
                    ("results due", manifest["dates"].get("results_due", ""))]
    else:
        identity = [("study", study.id), ("round", manifest["round"]), ("laboratory", lab.id),
                    ("fingerprint", manifest["fingerprint"]),
                    ("measurands", measurands_line(study)), ("decimal", lab.decimal),
                    ("results due", manifest["dates"].get("results_due", ""))]
    if token is not None:
        identity.append(("submission token", tokens.format(token)))
    if visit is not None:
        identity.insert(3, ("visit", visit))
    for key, value in identity:
        out.write(f"# {key}: {value}\n")
    # The keys above and the column names below are read back and stay English; the note
    # lines are in the laboratory's language (planner.language).
    t = language.texts(language.of(lab))
    decimal = t(f"common.decimal_{lab.decimal}")
    if study.shorthand:
        notes = [t("form.note", decimal=decimal)]
    else:
        notes = [t("form.note_several", decimal=decimal)] + _measurand_notes(study, t)
    for note in notes:
        out.write(f"# {note}\n")
    writer = csv.writer(out, delimiter=sep, lineterminator="\n")
    columns = form_columns(study)
    writer.writerow(columns)
    runs = manifest["host_visits"][visit] if visit else manifest["labs"][lab_id]["trials"]
    ids = {m.id: m.id for m in study.all_measurands}
    ids.update({uncertainty_column(m.id): m.id for m in study.all_measurands})
    absent = not_applicable(manifest, only=[c for run in runs for c in run])
    for trial, run in enumerate(runs, start=1):
        for position, code in enumerate(run, start=1):
            skip = absent.get(code, frozenset())
            writer.writerow([trial, position, codes.format(code)]
                            + [NOT_APPLICABLE if ids.get(name) in skip else ""
                               for name in columns[3:]])
    return out.getvalue()


def _measurand_notes(study: Study, t: Texts) -> list[str]:
    """Return the note lines that say what each measurand's columns hold, in ``t``'s words."""
    out = []
    for m in study.all_measurands:
        if m.method:
            out.append(t("form.measurand_method", column=m.id, name=m.name, unit=m.unit,
                         method=m.method))
        else:
            out.append(t("form.measurand", column=m.id, name=m.name, unit=m.unit))
        if m.uncertainty != "none":
            out.append(t(f"form.uncertainty_{m.uncertainty}", column=uncertainty_column(m.id),
                         id=m.id, unit=m.unit))
    return out


def round_study(study_dir: Path, round_id: str, ledger: Ledger) -> Study:
    """Return the study as it was when the round was planned, from its frozen definition.

    The definition lives in the ledger's chained planning event; its SHA-256 must equal
    the one recorded beside it and in the manifest. A round planned before definitions
    were frozen (none in the ledger) is read from today's study.yaml. Raises
    LedgerError when the round was not planned here or the manifest was edited.
    """
    from planner import spec

    folder = round_dir(study_dir, round_id)
    settle_if_needed(study_dir, round_id, ledger)
    manifest = read_manifest(folder)  # says "not planned" when there is no manifest
    planned = ledger.events(round_id, "planned")
    if ledger.current_round(round_id) is None or not planned:
        raise LedgerError(f"round {round_id!r} is not in the ledger; it was not planned in "
                          "this study folder", Where(str(folder / MANIFEST_NAME)))
    detail = planned[-1].detail
    recorded = detail.get("definition")
    if recorded is None:
        return spec.load(study_dir)
    where = Where(str(study_dir), None, f"ledger: round {round_id} as planned")
    data = seal.canonical(detail.get("round"))
    if seal.fingerprint(data) != recorded:
        raise LedgerError("the round definition in the ledger does not match its SHA-256; "
                          "restore the ledger from a backup", where)
    if manifest.get("definition") != recorded:
        raise LedgerError("the manifest names another round definition than the ledger; it "
                          "was edited after planning", Where(str(folder / MANIFEST_NAME)))
    check_manifest(manifest, ledger, round_id, where=Where(str(folder / MANIFEST_NAME)))
    return study_of_definition(data, where=where)


def check_manifest(manifest: dict[str, Any], ledger: Ledger, round_id: str, *,
                   where: Where) -> None:
    """Raise LedgerError when the manifest's dates or codes are not the ones the ledger recorded.

    The manifest is a plain file that ``receive`` and ``status`` read for the dates and
    the codes of each laboratory; the ledger's chained rows are the reference.
    """
    current = ledger.current_round(round_id)
    if current is None:
        raise LedgerError(f"round {round_id!r} is not in the ledger", where)
    planned = ledger.events(round_id, "planned")
    definition = planned[-1].detail.get("round", {}).get("study", {}) if planned else {}
    design = definition.get("design", {})
    expected = {"round": round_id, "host": current.host, "study": current.study,
                "mode": design.get("mode", "split"), "trials": design.get("trials")}
    for field, value in expected.items():
        if value is not None and manifest.get(field) != value:
            raise LedgerError(f"manifest.json was edited after planning: its {field} is "
                              f"{manifest.get(field)!r}, the ledger recorded {value!r}; restore "
                              "it from a backup", where)
    if not isinstance(manifest.get("labs"), dict) or not all(
            isinstance(e, dict) for e in manifest["labs"].values()):
        raise LedgerError("manifest.json was edited after planning: its laboratories are not "
                          "as ringplan wrote them; restore it from a backup", where)
    if manifest.get("dates") != current.dates:
        raise LedgerError("manifest.json was edited after planning: its dates are not the ones "
                          "the ledger recorded; restore it from a backup", where)
    recorded = planned[-1].detail.get("measured") if planned else None
    if (recorded is not None or "not_measured" in manifest) and (
            recorded != _measured_digest(manifest)):
        raise LedgerError("manifest.json was edited after planning: its measurands, or the "
                          "units each is not measured on, are not the ones the ledger "
                          "recorded; restore it from a backup", where)
    units = ledger.units(current.row)
    issued = {code for code, *_ in units}
    listed = {code for runs in manifest_runs(manifest).values() for run in runs for code in run}
    listed |= {c for entry in manifest.get("labs", {}).values() for c in entry.get("spares", ())}
    if manifest.get("mode") != "circulate":
        placed = {(code, lab, trial, position) for code, lab, kind, trial, position in units
                  if kind == "test"}
        runs = {(code, lab, trial, position) for lab, entry in manifest.get("labs", {}).items()
                for trial, run in enumerate(entry.get("trials", ()), start=1)
                for position, code in enumerate(run, start=1)}
        if runs != placed:
            raise LedgerError("manifest.json was edited after planning: its run orders are not "
                              "the ones the ledger recorded; restore it from a backup", where)
    if not listed <= issued:
        raise LedgerError("manifest.json was edited after planning: it lists codes the ledger "
                          "never issued for this round; restore it from a backup", where)


def _measured_digest(manifest: Mapping[str, Any]) -> str:
    """Return the SHA-256 of a manifest's measurands and the codes each is not measured on."""
    return seal.fingerprint(seal.canonical({"measurands": manifest.get("measurands"),
                                            "not_measured": manifest.get("not_measured")}))


def round_dir(study_dir: Path, round_id: str) -> Path:
    """Return the folder of a round inside a study folder; raise PlannerError for a round id
    that is not one (a path such as '../x', '' or 'a/b' would lead out of ``rounds/``)."""
    from planner import spec

    if not spec.slug_ok(round_id):
        raise PlannerError(f"{round_id!r} is not a usable round id; use letters, digits, '-', "
                           "'_' or '.', e.g. 2027-1")
    return Path(study_dir) / "rounds" / round_id


def read_manifest(folder: Path) -> dict[str, Any]:
    """Return a round's manifest; raise LedgerError if the round has not been planned."""
    path = Path(folder) / MANIFEST_NAME
    try:
        return dict(json.loads(path.read_text(encoding="utf-8")))
    except FileNotFoundError:
        raise LedgerError(f"round {Path(folder).name!r} has not been planned; run "
                          "'ringplan plan' first", Where(str(path))) from None
    except ValueError:
        raise LedgerError("the manifest is not valid JSON; it was edited by hand",
                          Where(str(path))) from None


def _write(path: Path, text: str, *, root: Path) -> None:
    # A laboratory's form carries its submission token: for it alone (planner.files).
    private = "labs" in Path(path).relative_to(root).parts
    files.write_text(path, text, root=root, private=private)


def write_round(study: Study, study_dir: Path, plan: RoundPlan, ledger: Ledger, *,
                passphrase: str | None, replace: bool = False,
                _fail_after_files: bool = False) -> Path:
    """Write a planned round's folder and ledger rows as one step; return the round folder.

    The files are staged, the ledger commit decides, and the staged folder is then
    renamed into place; a process killed after the commit has its folder put in place
    by the next command on the round (``settle_round``), one killed before leaves
    nothing. Refuses (LedgerError) to overwrite a round unless ``replace`` and the
    round has been neither printed nor received. ``_fail_after_files`` is a test hook
    that raises after every file is written, to prove nothing is left behind.
    """
    target = round_dir(study_dir, plan.round_id)
    current = ledger.current_round(plan.round_id)
    if current is not None or target.exists():
        status = ledger.round_status(plan.round_id)
        if not replace:
            raise LedgerError(f"round {plan.round_id!r} is already planned (status: "
                              f"{status or 'folder exists'}); choose a new round id, or add "
                              "--replace if nothing has been printed or received")
        if status not in (None, "planned"):
            raise LedgerError(f"round {plan.round_id!r} has been {status}; it cannot be "
                              "re-planned, plan a new round id instead")
    manifest = manifest_of(study, plan)
    key_json = seal.canonical(key_of(plan))
    sealed, host_copy = seal_round_key(study, plan, key_json, passphrase=passphrase)
    staging = target.parent / f".{plan.round_id}.{secrets.token_hex(4)}.staging"
    try:
        # The files are staged while the ledger's write lock is held, so that no other
        # command mistakes them for the leftovers of a plan that was killed.
        with ledger.transaction():
            settle_round(study_dir, plan.round_id, ledger)
            files.make_folders(staging, root=study_dir)
            _write(staging / MANIFEST_NAME,
                   json.dumps(manifest, indent=1, ensure_ascii=False) + "\n", root=study_dir)
            files.write_bytes(staging / seal.SEALED_NAME, sealed, root=study_dir, private=True)
            if host_copy is not None:
                files.write_bytes(staging / HOST_SEALED_NAME, host_copy, root=study_dir,
                                  private=True)
            _write(staging / seal.FINGERPRINT_NAME, plan.fingerprint + "\n", root=study_dir)
            token = {lab.id: tokens.submission_token(plan.secret, lab.id)
                     for lab in study.laboratories}
            for lab in study.laboratories:
                _write(staging / "labs" / lab.id / "result-form.csv",
                       result_form_csv(study, manifest, lab.id, token=token[lab.id]),
                       root=study_dir)
            for visit, name in host_visit_forms(manifest):
                _write(staging / "labs" / plan.host / name,
                       result_form_csv(study, manifest, plan.host, visit,
                                       token=token[plan.host]), root=study_dir)
            checks = homogeneity.host_checks(plan.units) if plan.route is None else None
            if checks and any(checks.values()):
                homogeneity.write_forms(study, staging, plan.round_id, plan.host, checks,
                                        plan.secret, root=study_dir)
            ledger.add_round(
                study=study.id, round_id=plan.round_id, host=plan.host,
                fingerprint=plan.fingerprint, dates=manifest["dates"],
                # In code order: the order units are drawn in (material by material) would
                # tell a reader of the ledger which units share a material.
                units=[(u.code, u.lab, u.kind, u.trial, u.position)
                       for u in sorted(plan.units, key=lambda u: u.code)],
                replaces=current.row if current else None)
            detail = {"fingerprint": plan.fingerprint, "host": plan.host,
                      "units": len(plan.units), "replaced": current is not None,
                      "definition": seal.fingerprint(plan.definition),
                      "round": json.loads(plan.definition),
                      "sealing": sealing_of(study),
                      # only digests: a token in the ledger could be copied
                      "tokens": {lab: tokens.digest(t) for lab, t in token.items()}}
            if checks and any(checks.values()):
                # which host unit holds which material: the host's check forms are read
                # against it before the key is opened (these units reach no participant)
                detail["host_checks"] = checks
            if not study.shorthand:
                # which cells of the forms are n/a: intake reads them from the manifest
                detail["measured"] = _measured_digest(manifest)
            ledger.record_event(plan.round_id, "planned", detail)
            if _fail_after_files:
                raise RuntimeError("injected failure after the files were written")
    except BaseException:
        shutil.rmtree(staging, ignore_errors=True)
        raise
    # The commit decided: the round is planned. Put its folder in place; a process killed
    # from here on is completed by ``settle_round`` in the next command on the round.
    _place(target, staging)
    return target


def sealing_of(study: Study) -> dict[str, Any]:
    """Return how a round of the study is sealed, as the ledger and the documents say it."""
    if study.sealing is None:
        return {"kind": "passphrase"}
    from planner.sealing import trustees

    # The keys' digests too: unseal holds the sealed file to exactly these recipients.
    return {"kind": "trustees", "threshold": study.sealing.threshold,
            "trustees": [t.id for t in study.sealing.trustees],
            "keys": {t.id: trustees.key_digest(t.public_key) for t in study.sealing.trustees}}


def seal_round_key(study: Study, plan: RoundPlan, key_json: bytes, *,
                   passphrase: str | None) -> tuple[bytes, bytes | None]:
    """Return key.sealed and the host's own copy (None without trustees).

    With ``sealing`` the key is sealed to the trustees (any ``threshold`` of them open
    it) and a second copy to the host laboratory's public key, so that the host can
    print its labels and preparation sheet and issue spares without them; the
    coordinator alone can open neither. Without it, one passphrase seals the key.
    Raises SealError for a missing passphrase, LedgerError for a host without a key.
    """
    if study.sealing is None:
        if passphrase is None:
            raise SealError("a passphrase is needed to seal the key (this study names no "
                            "trustees)")
        return seal.seal_key(key_json, passphrase), None
    from planner.sealing import trustees

    host = study.lab(plan.host)
    if host.public_key is None:
        raise LedgerError(f"the host {host.id!r} has no public_key in study.yaml, so its copy "
                          "of the key cannot be sealed; run 'ringplan trustee new "
                          f"{host.id} --out FILE' at the host and paste the key it prints")
    sealed = trustees.seal_envelope(
        key_json, recipients=[(t.id, t.public_key) for t in study.sealing.trustees],
        threshold=study.sealing.threshold, study=study.id, round_id=plan.round_id)
    host_copy = trustees.seal_envelope(key_json, recipients=[(host.id, host.public_key)],
                                       threshold=1, study=study.id, round_id=plan.round_id)
    return sealed, host_copy


def _place(target: Path, staging: Path) -> None:
    retired = target.parent / f".{target.name}.{secrets.token_hex(4)}.replaced"
    if target.exists():
        os.rename(target, retired)
    try:
        os.rename(staging, target)
    except FileNotFoundError:
        pass  # another command settled it into place first
    shutil.rmtree(retired, ignore_errors=True)


def settle_round(study_dir: Path, round_id: str, ledger: Ledger) -> bool:
    """Finish or undo what a killed ``plan`` left of a round's folder; return whether it acted.

    A staged folder whose manifest has the fingerprint the ledger committed is put in
    place (the plan was decided); any other staged or replaced folder of the round is
    removed. Call inside ``ledger.transaction()``: plan stages only while holding it.
    """
    target = round_dir(study_dir, round_id)
    parent = target.parent
    if not parent.is_dir():
        return False
    staged = sorted(parent.glob(f".{round_id}.*.staging"))
    retired = sorted(parent.glob(f".{round_id}.*.replaced"))
    if not staged and not retired:
        return False
    current = ledger.current_round(round_id)
    placed = _fingerprint_in(target)
    for folder in staged:
        if (current is not None and _fingerprint_in(folder) == current.fingerprint
                and placed != current.fingerprint):
            _place(target, folder)
            placed = current.fingerprint
        else:
            shutil.rmtree(folder, ignore_errors=True)
    for folder in retired:
        shutil.rmtree(folder, ignore_errors=True)
    return True


def settle_if_needed(study_dir: Path, round_id: str, ledger: Ledger) -> None:
    """Run ``settle_round`` under the ledger's lock, only when something was left behind."""
    parent = round_dir(study_dir, round_id).parent
    if parent.is_dir() and (any(parent.glob(f".{round_id}.*.staging"))
                            or any(parent.glob(f".{round_id}.*.replaced"))):
        with ledger.transaction():
            settle_round(study_dir, round_id, ledger)


def _fingerprint_in(folder: Path) -> str | None:
    try:
        return str(json.loads((folder / MANIFEST_NAME).read_text(encoding="utf-8"))
                   .get("fingerprint"))
    except (OSError, ValueError, AttributeError):
        return None
