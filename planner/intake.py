"""Returned result forms: check them against their round.

``check_form`` checks a form as ``planner.forms`` read it against the round's
manifest and reports every problem at once, each as ``file:line: what is
wrong``; a form with any problem is not recorded. Accepted forms are recorded
by ``planner.returns``, spares are issued in ``planner.spares``, and
``planner.status`` says where a round stands. A unit the host keeps (a spare, or
a retained unit once the spares of its material are gone) is expected from a
laboratory only after the ledger's ``spare-swap`` event issued it to that
laboratory in place of a damaged unit.

A circulating set (manifest ``mode: circulate``) is one set of artefacts that
every laboratory measures: each artefact code appears once in every trial (the
trial column says which measurement a row is), and each stop of the route is
its own submission slot. A laboratory's slot is its id; the host's first stop
is the host's id and its later stops ``host@middle`` and ``host@end``, whose
forms carry the identity line ``# visit: middle`` or ``# visit: end``. Such a
set has no spares.

A study with several measurands (``measurands:`` in study.yaml) has, in place of
``value`` and ``uncertainty``, a column per measurand and ``<id> uncertainty``
unless its uncertainty is "none" (``plan.form_columns``), and the identity line
``# measurands: mfr [g/10 min]; ...`` in place of ``# unit``. Each measurand's
column is checked as the ``value`` column is (a blank needs a remark, shared by
the row); an uncertainty the study requires must be given with every value; the
cells of a measurand not measured on a unit (the manifest's ``not_measured``)
must stay ``n/a`` or empty. A form may leave out a measurand's columns: its
results are then outstanding, as the rows of units a form leaves out are.

Numbers follow the laboratory's ``decimal`` setting in the study (point or
comma). A number with both marks, with a mark twice, or with spaces or
apostrophes between digits is refused: thousands separators read differently
from one country to the next, so they are ambiguous. The minus sign U+2212 reads
as a minus; a dash before a number, a limit (``<0,5``) and a marker without
digits (``n.d.``, ``ND``, ``-``) are refused with what was found, and the
message says to leave the value empty and give the reason under remarks.
Spaces around a number, no-break spaces included, are dropped.
"""

from __future__ import annotations

import difflib
import math
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from datetime import date, datetime
from typing import TYPE_CHECKING, Any

from planner import circulate, codes, forms, plan, tokens
from planner.errors import CodeError, IntakeError, PlannerError, Where
from planner.ledger import ResultRow

if TYPE_CHECKING:
    from planner.ledger import Ledger
    from planner.spec import Lab, Study

__all__ = [
    "Checked",
    "check_form",
    "condense",
    "describe_slot",
    "expected_codes",
    "inspect_form",
    "read_number",
    "issued_spares",
    "code_owners",
    "spare_swaps",
]

_NUMBER = {
    "point": re.compile(r"[+-]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][+-]?\d+)?"),
    "comma": re.compile(r"[+-]?(?:\d+(?:,\d*)?|,\d+)(?:[eE][+-]?\d+)?"),
}
_MARK = {"point": ".", "comma": ","}
_EXAMPLE = {"point": "12.5", "comma": "12,5"}
# Digits with a space, no-break space, narrow no-break space or apostrophe between
# them: the thousands separators of several locales.
_GROUPED = re.compile(r"\d[\s'\u2019\u00a0\u202f]+\d")
_ISO_DATE = re.compile(r"(\d{4}-\d{2}-\d{2})(?:[T ]\d{2}:\d{2}(?::\d{2}(?:\.\d+)?)?)?")


# --- checking -------------------------------------------------------------------

@dataclass(frozen=True, slots=True)
class Checked:
    """What checking one form found; ``rows`` are the rows to record if ``problems`` is empty.

    ``lab`` is the form's submission slot (None if its identity lines are wrong),
    ``missing`` the expected codes without a row, ``late_rows`` the codes tested
    after the test window.
    """

    problems: tuple[PlannerError, ...]
    lab: str | None
    rows: tuple[ResultRow, ...]
    missing: tuple[str, ...]
    late_rows: tuple[str, ...]


def spare_swaps(ledger: Ledger, round_id: str) -> dict[str, str]:
    """Return damaged code -> spare code for every spare issued in a round, in issue order."""
    return {str(e.detail["damaged"]): str(e.detail["spare"])
            for e in ledger.events(round_id, "spare-swap")}


def issued_spares(ledger: Ledger, round_id: str) -> dict[str, str]:
    """Return spare code -> the laboratory it was issued to, for every spare issued in a round."""
    return {str(e.detail["spare"]): str(e.detail["lab"])
            for e in ledger.events(round_id, "spare-swap")}


def expected_codes(manifest: Mapping[str, Any], lab: str,
                   swaps: Mapping[str, str]) -> dict[str, tuple[int, int]]:
    """Return the codes a laboratory reports on, with (trial, position), spares in place."""
    out: dict[str, tuple[int, int]] = {}
    for trial, run in enumerate(manifest["labs"][lab]["trials"], start=1):
        for position, code in enumerate(run, start=1):
            out[_last_spare(code, swaps)] = (trial, position)
    return out


def _last_spare(code: str, swaps: Mapping[str, str]) -> str:
    seen = {code}
    while code in swaps and swaps[code] not in seen:
        code = swaps[code]
        seen.add(code)
    return code


def code_owners(manifest: Mapping[str, Any], swaps: Mapping[str, str]
                ) -> dict[str, tuple[str, str]]:
    """Return code -> (laboratory, kind) for every code in the manifest, a unit the host sent
    as a replacement (``swaps``, in issue order) belonging to the laboratory it went to."""
    out: dict[str, tuple[str, str]] = {}
    for lab, info in manifest["labs"].items():
        for run in info["trials"]:
            out.update((c, (lab, "test")) for c in run)
        # a round planned while every parcel carried spares of each material
        out.update((c, (lab, "spare")) for c in info.get("spares", ()))
    for kind, found in manifest.get("host_units", {}).items():
        out.update((c, (str(manifest["host"]), kind)) for c in found)
    for damaged, spare in swaps.items():
        out[spare] = (out.get(damaged, ("", ""))[0], "spare")
    return out


def check_form(study: Study, manifest: Mapping[str, Any], form: forms.Form, *,
               swaps: Mapping[str, str] | None = None, unsealed: bool = False,
               lab: str | None = None, today: date | None = None,
               elsewhere: Mapping[str, str] | None = None) -> list[PlannerError]:
    """Return every problem of a form against its round (empty if it may be recorded).

    ``swaps`` are the spares issued (damaged -> spare), ``lab`` the laboratory the
    coordinator says sent it, ``today`` the day it is received (dates after it
    are refused), ``elsewhere`` code -> round for codes of the study's other rounds.
    """
    return list(inspect_form(study, manifest, form, swaps=swaps or {}, unsealed=unsealed,
                             lab=lab, today=today, elsewhere=elsewhere or {}).problems)


def inspect_form(study: Study, manifest: Mapping[str, Any], form: forms.Form, *,
                 swaps: Mapping[str, str], unsealed: bool, lab: str | None, today: date | None,
                 elsewhere: Mapping[str, str],
                 token_digests: Mapping[str, str] | None = None,
                 owners: Mapping[str, tuple[str, str]] | None = None,
                 absent: Mapping[str, frozenset[str]] | None = None,
                 labs: Mapping[str, Lab] | None = None) -> Checked:
    """Return what checking a form against its round found: its problems, slot and rows.

    The arguments are those of ``check_form``, all given; ``planner.returns``
    records the rows of a form without problems. ``token_digests`` (laboratory ->
    SHA-256 of its submission token, from the ledger) makes the form's token line
    required and checked; None for a round planned before there were tokens.
    ``owners`` is ``code_owners(manifest, swaps)``, made once by a caller that checks
    many forms of one round (it holds every code of the round); ``absent`` likewise is
    ``plan.not_applicable(manifest, swaps)``, and ``labs`` the study's laboratories by id.
    """
    labs = {x.id: x for x in study.laboratories} if labs is None else labs
    problems = _check_identity(study, manifest, form, lab=lab, labs=labs)
    if problems:
        return Checked(tuple(problems), None, (), (), ())
    form_lab = form.ident("laboratory")[0]  # type: ignore[index]
    token = _check_token(form, token_digests) if token_digests is not None else []
    if manifest.get("mode") == "circulate":
        if token:
            return Checked(tuple(token), None, (), (), ())
        return _inspect_circulating(study, manifest, form, unsealed=unsealed, today=today,
                                    elsewhere=elsewhere)
    expected = expected_codes(manifest, form_lab, swaps)
    owners = code_owners(manifest, swaps) if owners is None else owners
    rows = form.rows
    read = [_validated(r) for r in rows]  # each code read and checked once
    given = [got if isinstance(got, str) and _plain(r.get("code")) else
             (codes.compact(text) if codes.is_valid(text := str(r.get("code"))) else None)
             for r, got in zip(rows, read, strict=True)]
    mine = sum(1 for c in given if c in expected)
    others = {owners[c][0] for c in given
              if c is not None and c in owners and owners[c][1] == "test"}
    if rows and not mine and len(others) == 1 and form_lab not in others:
        line = form.ident("laboratory")[1]  # type: ignore[index]
        return Checked((IntakeError(
            f"the form says laboratory {form_lab!r} but its codes are those of laboratory "
            f"{others.pop()!r}; correct the laboratory line or send that laboratory's form",
            form.where(line)),), None, (), (), ())
    if token:  # after the codes: a slip in the laboratory line is told as that
        return Checked(tuple(token), None, (), (), ())
    problems += _check_columns(form, study)
    lacking = _missing_results(form, study)
    if lacking:
        return Checked(tuple(problems + lacking), None, (), (), ())
    decimal = labs[form_lab].decimal
    absent = plan.not_applicable(manifest, swaps) if absent is None else absent
    dates = manifest["dates"]
    start, end = date.fromisoformat(dates["test_start"]), date.fromisoformat(dates["test_end"])
    # this laboratory's units that a spare replaced, mapped to the spare now in force
    replaced = {d: _last_spare(d, swaps) for d in swaps
                if owners.get(d, ("", ""))[0] == form_lab and d not in expected}
    planned = _flatten(manifest["labs"][form_lab]["trials"])
    first_seen: dict[str, int] = {}
    kept: list[ResultRow] = []
    late_rows: list[str] = []
    for row, got in zip(rows, read, strict=True):
        where = form.where(row.line)
        found: list[PlannerError] = []
        if form.separator is not None and row.width > form.header_width:
            hint = "; remove the extra separator"
            if form.separator == ",":
                hint = ("; a decimal comma splits a value in two in a file separated by ','"
                        + (f", and this laboratory writes a decimal point (e.g. "
                           f"{_EXAMPLE[decimal]!r})" if decimal == "point" else
                           ": put such values in quotes, or save the file with ';'"))
            problems.append(IntakeError(f"the row has {row.width} fields but the header has "
                                        f"{form.header_width}{hint}", where))
            continue
        code = _check_code(row, where, found, expected=expected, replaced=replaced,
                           owners=owners, lab=form_lab, host=str(manifest["host"]),
                           round_id=str(manifest["round"]),
                           elsewhere=elsewhere, first_seen=first_seen, form=form, read=got)
        value, uncertainty, remarks, measured = _check_results(
            row, study, form.columns, decimal, where, found,
            skip=absent.get(code, frozenset()) if code is not None else None)
        tested = _check_date(row.get("date"), where, found, start=start, end=end, today=today)
        if code is not None and code in expected:
            _check_slot(row, where, found, code=code, slot=expected[code])
        problems += found
        if found or code is None:
            continue
        flags = []
        if _no_value(study, value, measured):
            flags.append("no-value")
        if tested is not None and tested > end:
            flags.append("late-date")
            late_rows.append(code)
        if code not in planned:
            flags.append("spare")
        if unsealed:
            flags.append("after-unseal")
        trial, position = expected[code]
        kept.append(ResultRow(code, trial, position, value, uncertainty,
                              tested.isoformat() if tested else None,
                              forms.cell_text(row.get("analyst")), remarks, tuple(flags),
                              measured))
    if not rows:
        problems.append(IntakeError("the form has no result rows below the header; fill in "
                                    "the rows of the blank form", form.where(form.header_line)))
    missing = tuple(c for c in expected if c not in first_seen)
    return Checked(tuple(problems), form_lab, tuple(kept), missing, tuple(late_rows))


def _check_identity(study: Study, manifest: Mapping[str, Any], form: forms.Form, *,
                    lab: str | None, labs: Mapping[str, Lab]) -> list[PlannerError]:
    """Return identity problems, the most telling first; later ones would only repeat it."""
    # A study with several measurands names them (with their units) in one line instead.
    required = (forms.IDENTITY_KEYS if study.shorthand else
                tuple("measurands" if k == "unit" else k for k in forms.IDENTITY_KEYS))
    absent = [k for k in required if form.ident(k) is None]
    if absent:
        return [IntakeError(f"the form has no '# {k}: ...' line; send the result form that "
                            "'ringplan plan' wrote, with its first lines unchanged",
                            form.where(1))
                for k in absent]
    (study_id, study_at), (round_id, round_at) = form.ident("study"), form.ident("round")  # type: ignore[misc]
    (lab_id, lab_at), (print_, print_at) = form.ident("laboratory"), form.ident("fingerprint")  # type: ignore[misc]
    if study_id != study.id:
        return [IntakeError(f"the form is for study {study_id!r}, not {study.id!r}",
                            form.where(study_at))]
    if round_id != manifest["round"]:
        return [IntakeError(f"the form is for round {round_id!r}, not {manifest['round']!r}; "
                            "record it with that round's --round, or send this round's form",
                            form.where(round_at))]
    out: list[PlannerError] = []
    if lab_id not in labs or lab_id not in manifest["labs"]:
        known = [x.id for x in study.laboratories]
        guess = difflib.get_close_matches(lab_id, known, n=1)
        out.append(IntakeError(f"laboratory {lab_id!r} is not in round {manifest['round']!r}"
                               + (f"; did you mean {guess[0]!r}?" if guess else
                                  f"; known: {', '.join(known)}"), form.where(lab_at)))
    elif lab is not None and lab_id != lab:
        out.append(IntakeError(f"the form is from laboratory {lab_id!r}, not {lab!r} as --lab "
                               "says; check who sent it", form.where(lab_at)))
    if not out:
        out += _check_visit(manifest, form, lab_id)
    if print_.strip().lower() != manifest["fingerprint"]:
        out.append(IntakeError(f"fingerprint {print_[:16]!r}... is not this round's "
                               f"({manifest['fingerprint'][:16]}...); the form belongs to an "
                               "earlier plan of the round; send the current form",
                               form.where(print_at)))
    if study.shorthand:
        unit, unit_at = form.ident("unit")  # type: ignore[misc]
        want = str(study.study.unit)
        if "".join(unit.split()) != "".join(want.split()):
            out.append(IntakeError(f"the form reports in {unit!r}, but the study's unit is "
                                   f"{want!r}; report the results in {want!r}",
                                   form.where(unit_at)))
    else:
        out += _check_measurands_line(study, form, str(manifest["round"]))
    return out


def _check_measurands_line(study: Study, form: forms.Form, round_id: str) -> list[PlannerError]:
    """Return the problem of a form's ``measurands`` line: its ids and units must be the
    round's, in spec order (``plan.measurands_line``)."""
    text, line = form.ident("measurands")  # type: ignore[misc]
    expected = plan.measurands_line(study)
    if "".join(text.split()) == "".join(expected.split()):
        return []
    found = plan.read_measurands_line(text)
    want = [(m.id, m.unit) for m in study.all_measurands]
    if found is not None and [i.lower() for i, _ in found] == [i.lower() for i, _ in want]:
        for (_, unit), (mid, own) in zip(found, want, strict=True):
            if "".join(unit.split()) != "".join(own.split()):
                return [IntakeError(f"the form reports {mid} in {unit!r}, but the study's unit "
                                    f"for {mid} is {own!r}; report {mid} in {own!r}",
                                    form.where(line))]
        return []
    return [IntakeError(f"the form lists the measurands {text!r}, but round {round_id!r} "
                        f"measures {expected!r}; send the result form that 'ringplan plan' "
                        "wrote for this round, with its first lines unchanged", form.where(line))]


def _check_token(form: forms.Form, digests: Mapping[str, str]) -> list[PlannerError]:
    """Return the problem of a form's submission token: missing, or not its laboratory's."""
    lab_id, lab_at = form.ident("laboratory")  # type: ignore[misc]
    found = form.ident("submission token")
    if found is None:
        return [IntakeError("the form has no '# submission token: ...' line; send the result "
                            f"form that 'ringplan plan' wrote for {lab_id!r}, with its first "
                            "lines unchanged", form.where(1))]
    token, line = found
    if tokens.digest(token) != digests.get(lab_id):
        return [IntakeError(f"the submission token is not that of laboratory {lab_id!r}; a "
                            "form is recorded only with its own laboratory's token (printed on "
                            "its run sheet and form)", form.where(line))]
    return []


def _check_visit(manifest: Mapping[str, Any], form: forms.Form, lab_id: str) -> list[PlannerError]:
    """Return the problem of a form's visit line: only a circulating set's host has later stops."""
    found = form.ident("visit")
    if found is None:
        return []
    visit, line = found[0].strip().lower(), found[1]
    round_id, host = manifest["round"], manifest["host"]
    if manifest.get("mode") != "circulate":
        return [IntakeError(f"the form says visit {visit!r}, but round {round_id!r} sends each "
                            "laboratory its own units, so there are no visits; remove the "
                            "'# visit' line", form.where(line))]
    if lab_id != host:
        return [IntakeError(f"the form says visit {visit!r}, but laboratory {lab_id!r} has one "
                            "stop on the route and its form has no visit line; remove the "
                            "'# visit' line", form.where(line))]
    visits = list(manifest.get("host_visits", {}))
    if visit not in ("start", *visits):
        stops = ", ".join(["start (the form without a visit line)", *visits])
        return [IntakeError(f"visit {visit!r} is not a stop of the host in round {round_id!r}; "
                            f"its stops are {stops}", form.where(line))]
    return []


def _form_slot(form: forms.Form, lab_id: str) -> str:
    """Return the submission slot of a checked form: its laboratory or ``host@visit``."""

    found = form.ident("visit")
    return circulate.station_key(lab_id, found[0].strip().lower() if found else None)


def describe_slot(slot: str) -> str:
    """Return a slot as a message names it: "laboratory 'x'", or the host's stop."""
    lab, _, visit = slot.partition("@")
    return f"laboratory {lab!r}" + (f" ({visit} stop)" if visit else "")


def _inspect_circulating(study: Study, manifest: Mapping[str, Any], form: forms.Form, *,
                         unsealed: bool, today: date | None,
                         elsewhere: Mapping[str, str]) -> Checked:
    """Check the rows of a circulating set's form: every artefact once in every trial."""
    from planner import audit

    form_lab = form.ident("laboratory")[0]  # type: ignore[index]
    slot = _form_slot(form, form_lab)
    runs = audit.slot_runs(manifest, slot)
    expected = {(code, trial): position for trial, run in enumerate(runs, start=1)
                for position, code in enumerate(run, start=1)}
    artefacts = frozenset(code for code, _ in expected)
    problems: list[PlannerError] = list(_check_columns(form, study))
    lacking = _missing_results(form, study)
    if lacking:
        return Checked(tuple(problems + lacking), None, (), (), ())
    decimal = study.lab(form_lab).decimal
    absent = plan.not_applicable(manifest)
    # Each stop tests in its own window while it holds the set.
    dates = next((s for s in manifest["route"]
                  if circulate.station_key(str(s["lab"]), s.get("visit")) == slot),
                 manifest["dates"])
    start, end = date.fromisoformat(dates["test_start"]), date.fromisoformat(dates["test_end"])
    first_seen: dict[tuple[str, int], int] = {}
    kept: list[ResultRow] = []
    late_rows: list[str] = []
    for row in form.rows:
        where = form.where(row.line)
        found: list[PlannerError] = []
        if form.separator is not None and row.width > form.header_width:
            problems.append(IntakeError(f"the row has {row.width} fields but the header has "
                                        f"{form.header_width}; remove the extra separator"
                                        + ("; with ',' as separator put values with a decimal "
                                           "comma in quotes" if form.separator == "," else ""),
                                        where))
            continue
        hit = _check_artefact(row, where, found, artefacts=artefacts, trials=len(runs),
                              round_id=str(manifest["round"]), elsewhere=elsewhere,
                              first_seen=first_seen, form=form)
        value, uncertainty, remarks, measured = _check_results(
            row, study, form.columns, decimal, where, found,
            skip=absent.get(hit[0], frozenset()) if hit is not None else None)
        tested = _check_date(row.get("date"), where, found, start=start, end=end, today=today)
        if hit is not None:
            _check_slot(row, where, found, code=hit[0], slot=(hit[1], expected[hit]))
        problems += found
        if found or hit is None:
            continue
        code, trial = hit
        flags = []
        if _no_value(study, value, measured):
            flags.append("no-value")
        if tested is not None and tested > end:
            flags.append("late-date")
            late_rows.append(code)
        if unsealed:
            flags.append("after-unseal")
        kept.append(ResultRow(code, trial, expected[hit], value, uncertainty,
                              tested.isoformat() if tested else None,
                              forms.cell_text(row.get("analyst")), remarks, tuple(flags),
                              measured))
    if not form.rows:
        problems.append(IntakeError("the form has no result rows below the header; fill in "
                                    "the rows of the blank form", form.where(form.header_line)))
    missing = tuple(code for code, trial in expected if (code, trial) not in first_seen)
    return Checked(tuple(problems), slot, tuple(kept), missing, tuple(late_rows))


def _check_artefact(row: forms.FormRow, where: Where, found: list[PlannerError], *,
                    artefacts: frozenset[str], trials: int, round_id: str,
                    elsewhere: Mapping[str, str], first_seen: dict[tuple[str, int], int],
                    form: forms.Form) -> tuple[str, int] | None:
    """Return (code, trial) of a circulating set's row; else note why not and return None.

    Each artefact is measured once in every trial, so the trial column says
    which measurement a row is and must be given.
    """
    code = _read_code(row, where, found, label="artefact's label")
    if code is None:
        return None
    shown = codes.format(code)
    if code not in artefacts:
        if code in elsewhere:
            msg = f"code {shown} belongs to round {elsewhere[code]!r}, not to {round_id!r}"
        else:
            msg = (f"code {shown} is not an artefact of round {round_id!r}; check it against "
                   "the artefact's label")
        found.append(IntakeError(msg, where))
        return None
    raw = row.get("trial")
    trial: int | None
    if isinstance(raw, bool):
        trial = None
    elif isinstance(raw, (int, float)):
        trial = int(raw) if math.isfinite(raw) and float(raw).is_integer() else None
    else:
        trial = int(str(raw).strip()) if str(raw).strip().isdigit() else None
    if trial is None or not 1 <= trial <= trials:
        found.append(IntakeError(f"trial {forms.cell_text(raw)!r} of artefact {shown} is not a "
                                 f"trial of the round; every artefact is measured once in each "
                                 f"trial, so give the trial (1 to {trials}) as on the run sheet",
                                 where))
        return None
    if (code, trial) in first_seen:
        place = first_seen[(code, trial)]
        place_text = f"line {place}" if form.kind == "csv" else f"row {place}"
        found.append(IntakeError(f"artefact {shown} appears twice in trial {trial} (first on "
                                 f"{place_text}); report each artefact once per trial", where))
        return None
    first_seen[(code, trial)] = row.line
    return code, trial


def condense(problems: Sequence[PlannerError], *, repeat: int = 3) -> list[str]:
    """Return one line per problem, but one line for a problem that repeats on many rows.

    A message found on ``repeat`` or more lines of the same file is printed once, at its
    first line, with how many more lines have it and the last of them.
    """
    groups: dict[tuple[str | None, str], list[PlannerError]] = {}
    for p in problems:
        groups.setdefault((p.where.file, p.message), []).append(p)
    out = []
    for p in problems:
        same = groups[(p.where.file, p.message)]
        if len(same) < repeat:
            out.append(str(p))
        elif p is same[0]:
            last = same[-1].where.line
            out.append(f"{p} (and {len(same) - 1} more rows with the same problem, "
                       f"up to line {last})")
    return out


def _check_results(row: forms.FormRow, study: Study, columns: Sequence[str], decimal: str,
                   where: Where, found: list[PlannerError], *, skip: frozenset[str] | None
                   ) -> tuple[float | None, float | None, str,
                              tuple[tuple[str, float | None, float | None], ...]]:
    """Return (value, expanded uncertainty, remarks, measurements) of a row, adding its
    problems to ``found``: the ``value`` column of a study in the single-measurand form, or
    one entry per measurand whose column the form has (value None for a blank explained in
    remarks). ``skip`` are the measurands not measured on the row's unit (None: the row's
    code is unknown), whose cells must stay n/a or empty."""
    if study.shorthand:
        return (*_check_values(row, decimal, where, found), ())
    remarks = forms.cell_text(row.get("remarks"))
    out: list[tuple[str, float | None, float | None]] = []
    for m in study.all_measurands:
        name, u_name = m.id, plan.uncertainty_column(m.id)
        has_value, has_u = name.lower() in columns, u_name.lower() in columns
        raw = row.get(name.lower()) if has_value else ""
        raw_u = row.get(u_name.lower()) if has_u else ""
        if skip is None or m.id in skip:
            for column, cell in ((name, raw), (u_name, raw_u)):
                text = forms.cell_text(cell)
                if skip is not None and text and text.lower() != plan.NOT_APPLICABLE:
                    found.append(IntakeError(
                        f"{column} {text!r} is given for a unit that {m.id} is not measured on "
                        f"(the form marks the cell {plan.NOT_APPLICABLE}); leave it "
                        f"{plan.NOT_APPLICABLE}", where))
            if skip is not None or forms.cell_text(raw).lower() == plan.NOT_APPLICABLE:
                continue
        value = _quantity(raw, decimal, name, where, found, result=True)
        uncertainty = _quantity(raw_u, decimal, u_name, where, found)
        blank = forms.cell_text(raw) == ""
        if blank and uncertainty is not None:
            found.append(IntakeError(f"{u_name} is given without a value of {name}; give the "
                                     "value too, or leave both empty", where))
        elif blank and has_value and not remarks:
            found.append(IntakeError(f"{name} is empty; enter the result, or say in remarks "
                                     "why there is none", where))
        elif (value is not None and m.uncertainty == "required" and has_u
              and forms.cell_text(raw_u) == ""):
            found.append(IntakeError(f"{u_name} is empty, but every {name} result needs its "
                                     "expanded uncertainty (k = 2); give it", where))
        if uncertainty is not None and uncertainty <= 0:
            found.append(IntakeError(f"{u_name} {raw_u!r} is not above 0; give the expanded "
                                     "uncertainty (k = 2), or leave it empty", where))
        if value is not None or (blank and has_value):
            out.append((m.id, value, uncertainty))
    return None, None, remarks, tuple(out)


def _no_value(study: Study, value: float | None,
              measured: Sequence[tuple[str, float | None, float | None]]) -> bool:
    """Return whether a row reports a blank: its value, or with several measurands any."""
    if study.shorthand:
        return value is None
    return any(v is None for _, v, _ in measured)


def _check_values(row: forms.FormRow, decimal: str, where: Where,
                  found: list[PlannerError]) -> tuple[float | None, float | None, str]:
    """Return (value, expanded uncertainty, remarks) of a row, adding its problems to ``found``."""
    value = _quantity(row.get("value"), decimal, "value", where, found)
    uncertainty = _quantity(row.get("uncertainty"), decimal, "uncertainty", where, found)
    remarks = forms.cell_text(row.get("remarks"))
    if value is None and forms.cell_text(row.get("value")) == "":
        if not remarks:
            found.append(IntakeError(
                "value is empty; enter the result, or say in remarks why there is none", where))
        if uncertainty is not None:
            found.append(IntakeError("an uncertainty is given without a value; give the "
                                     "value too, or leave both empty", where))
    if uncertainty is not None and uncertainty <= 0:
        found.append(IntakeError(f"uncertainty {row.get('uncertainty')!r} is not above 0; "
                                 "give the expanded uncertainty (k = 2), or leave it empty",
                                 where))
    return value, uncertainty, remarks


def _check_columns(form: forms.Form, study: Study) -> list[PlannerError]:
    wanted = plan.form_columns(study)
    known = {c.lower() for c in wanted}
    out: list[PlannerError] = []
    seen: set[str] = set()
    for name in form.columns:
        if not name:
            continue
        if name in seen:
            out.append(IntakeError(f"column {name!r} appears twice in the header; keep one",
                                   form.where(form.header_line)))
        elif name not in known:
            guess = difflib.get_close_matches(name, sorted(known), n=1)
            out.append(IntakeError(
                f"unknown column {name!r}" + (f"; did you mean {guess[0]!r}?" if guess else
                                              f"; the form's columns are {', '.join(wanted)}"),
                form.where(form.header_line)))
        seen.add(name)
    return out


def _missing_results(form: forms.Form, study: Study) -> list[PlannerError]:
    """Return the problem of a form without a column for any result, or without the column
    of an uncertainty the study requires; its rows then go unread.

    With several measurands a form may leave out some measurands' columns: their results
    are then outstanding, as the rows of a form that leaves out some units are.
    """
    where = form.where(form.header_line)
    if study.shorthand:
        if "value" in form.columns:
            return []
        return [IntakeError("the form has no 'value' column; send the result form that "
                            "'ringplan plan' wrote, with its header row unchanged", where)]
    present = [m for m in study.all_measurands if m.id.lower() in form.columns]
    if not present:
        ids = ", ".join(repr(m.id) for m in study.all_measurands)
        return [IntakeError(f"the form has no result column; the round's are {ids}; send the "
                            "result form that 'ringplan plan' wrote, with its header row "
                            "unchanged", where)]
    return [IntakeError(f"the form has no {plan.uncertainty_column(m.id)!r} column, but every "
                        f"{m.id} result needs its expanded uncertainty (k = 2); add the column "
                        "as on the blank form", where)
            for m in present if m.uncertainty == "required"
            and plan.uncertainty_column(m.id).lower() not in form.columns]


def _validated(row: forms.FormRow) -> str | CodeError | None:
    """Return the row's code, compact and checked, or the CodeError saying what is wrong with
    it (without a place), or None when the cell is empty."""
    text = forms.cell_text(row.get("code"))
    if not text:
        return None
    try:
        return codes.validate(text)
    except CodeError as exc:
        return exc


def _plain(raw: Any) -> bool:
    """Return whether a cell reads the same as text with and without its outer spaces."""
    return raw is None or str(raw) == forms.cell_text(raw)


_UNREAD = object()


def _read_code(row: forms.FormRow, where: Where, found: list[PlannerError], *,
               label: str, read: Any = _UNREAD) -> str | None:
    """Return the row's code, compact and checked; else note why not and return None.

    ``read`` is ``_validated(row)`` when the caller has it already.
    """
    got = _validated(row) if read is _UNREAD else read
    if got is None:
        found.append(IntakeError("the row has no code; every result needs the code from the "
                                 f"{label}", where))
        return None
    if isinstance(got, CodeError):
        found.append(CodeError(got.message, where))
        return None
    return str(got)


def _check_code(row: forms.FormRow, where: Where, found: list[PlannerError], *,
                expected: Mapping[str, tuple[int, int]], replaced: Mapping[str, str],
                owners: Mapping[str, tuple[str, str]], lab: str, host: str, round_id: str,
                elsewhere: Mapping[str, str], first_seen: dict[str, int],
                form: forms.Form, read: Any = _UNREAD) -> str | None:
    """Return the row's compact code if it is this laboratory's; else note why and return None.

    ``read`` is ``_validated(row)`` when the caller has it already."""
    code = _read_code(row, where, found, label="unit's label", read=read)
    if code is None:
        return None
    shown = codes.format(code)
    if code in first_seen:
        place = f"line {first_seen[code]}" if form.kind == "csv" else f"row {first_seen[code]}"
        found.append(IntakeError(f"code {shown} appears twice (first on {place}); report each "
                                 "unit once", where))
        return None
    first_seen[code] = row.line
    if code in expected:
        return code
    owner = owners.get(code)
    if code in replaced:
        msg = (f"unit {shown} was replaced by spare {codes.format(replaced[code])}; report "
               "the spare's result under its code")
    elif owner == (lab, "spare"):
        msg = (f"{shown} is a spare of this laboratory that was not issued; run 'ringplan spare' "
               "for the damaged unit first, or correct the code")
    elif owner == (host, "spare"):
        msg = (f"{shown} is a spare kept by the host that was not issued to laboratory {lab!r}; "
               "run 'ringplan spare' for the damaged unit first, or correct the code")
    elif owner is not None and owner[1] in ("test", "spare"):
        msg = f"code {shown} belongs to laboratory {owner[0]!r}, not to {lab!r}"
    elif owner is not None:
        msg = f"code {shown} is a unit kept by the host, not a test unit of {lab!r}"
    elif code in elsewhere:
        msg = f"code {shown} belongs to round {elsewhere[code]!r}, not to {round_id!r}"
    else:
        msg = (f"code {shown} is not a code of laboratory {lab!r} in round {round_id!r}; check "
               "it against the unit's label")
    found.append(IntakeError(msg, where))
    return None


def _check_slot(row: forms.FormRow, where: Where, found: list[PlannerError], *, code: str,
                slot: tuple[int, int]) -> None:
    """Note a row whose trial or position disagrees with the run order of its code."""
    given = []
    for column, want in zip(("trial", "position"), slot, strict=True):
        raw = row.get(column)
        if raw in ("", None):
            continue
        try:
            number = int(float(str(raw).replace(",", "."))) if not isinstance(raw, int) else raw
        except (ValueError, OverflowError):  # not a number, or 1e400 / inf
            number = None
        if number != want:
            given.append(f"{column} {raw!r}")
    if given:
        found.append(IntakeError(
            f"code {codes.format(code)} is trial {slot[0]}, position {slot[1]} of the run "
            f"order, but the row says {' and '.join(given)}; the code decides, so check that "
            "the value belongs to this code", where))


def _quantity(raw: Any, decimal: str, what: str, where: Where,
              found: list[PlannerError], *, result: bool | None = None) -> float | None:
    """Return the number in a cell (None if empty); note a problem and return None if it is not one.

    ``result``: the cell is a result, whose blank is explained in remarks (default: the
    ``value`` column is one).
    """
    if raw is None or (isinstance(raw, str) and not raw.strip()):
        return None
    try:
        return read_number(raw, decimal, what, result=result)
    except IntakeError as exc:
        found.append(IntakeError(exc.message, where))
        return None


def read_number(raw: Any, decimal: str, what: str, *, result: bool | None = None) -> float:
    """Return the number a form cell holds in the form's decimal convention (``what`` names
    the column); raise IntakeError saying what is wrong with it. The host's check forms
    are read with it too."""
    if result is None:
        result = what == "value"
    if isinstance(raw, (bool, date)):   # datetime is a date
        raise IntakeError(f"{what} {raw!r} is not a number")
    if isinstance(raw, (int, float)):
        value = float(raw)
    else:
        text = str(raw).strip().replace("\u2212", "-")  # the minus sign of typeset text
        mark = _MARK[decimal]
        other = "point" if decimal == "comma" else "comma"
        _refuse_marker(text, what, decimal, result=result)
        if (_GROUPED.search(text) or ("." in text and "," in text)
                or text.count(".") > 1 or text.count(",") > 1):
            raise IntakeError(
                f"{what} {text!r} has thousands separators, which are ambiguous ('1.234' is "
                f"1234 in some countries and 1.234 in others); write it without them, with a "
                f"decimal {decimal}, e.g. {_EXAMPLE[decimal]!r}")
        if _NUMBER[decimal].fullmatch(text):
            value = float(text.replace(",", "."))
        elif _NUMBER[other].fullmatch(text):
            raise IntakeError(
                f"{what} {text!r} has a decimal {other}, but this laboratory writes a decimal "
                f"{decimal} (its 'decimal' in study.yaml); write "
                f"{text.replace(_MARK[other], mark)!r}")
        else:
            raise IntakeError(f"{what} {text!r} is not a number; write it like "
                              f"{_EXAMPLE[decimal]!r}" + (", or leave it empty and say why in "
                                                          "remarks" if result else ""))
    if not math.isfinite(value):
        raise IntakeError(f"{what} {raw!r} is not a finite number")
    if abs(value) > 1e100 or (value != 0 and abs(value) < 1e-100):
        # the statistics refuse such values (their squares overflow); say so at the form
        raise IntakeError(f"{what} {raw!r} is out of any plausible range (1e-100 to 1e100 in "
                          "size); check the number, or report in another unit")
    return value


def _refuse_marker(text: str, what: str, decimal: str, *, result: bool = False) -> None:
    """Raise IntakeError for a cell that holds a marker or a limit where a number belongs."""
    empty = (f"; leave the {what} empty" + (" and write it under remarks" if result else ""))
    if text[:1] in "<>\u2264\u2265":
        raise IntakeError(f"{what} {text!r} is a limit, not a result, and cannot be scored{empty}")
    if text[:1] in "\u2010\u2011\u2012\u2013\u2014" and any(c.isdigit() for c in text):
        raise IntakeError(f"{what} {text!r} starts with a dash (U+{ord(text[0]):04X}), not a "
                          f"minus sign; write {'-' + text[1:].strip()!r}")
    if not any(c.isdigit() for c in text) and sum(c.isalpha() for c in text) <= 4:
        raise IntakeError(f"{what} {text!r} is a marker (such as 'not determined'), not a "
                          f"number{empty}")


def _check_date(raw: Any, where: Where, found: list[PlannerError], *, start: date, end: date,
                today: date | None) -> date | None:
    """Return the test date (None if empty); refuse dates before the window or after today."""
    if raw is None or raw == "":
        return None
    if isinstance(raw, datetime):
        day = raw.date()
    elif isinstance(raw, date):
        day = raw
    else:
        text = str(raw).strip()
        match = _ISO_DATE.fullmatch(text)
        try:
            if match is None:
                raise ValueError
            day = date.fromisoformat(match.group(1))
        except ValueError:
            found.append(IntakeError(f"date {text!r} is not a calendar date written YYYY-MM-DD",
                                     where))
            return None
    if day < start:
        found.append(IntakeError(f"date {day} is before the test window ({start} to {end}); "
                                 "check the date", where))
        return None
    if today is not None and day > today:
        found.append(IntakeError(f"date {day} is after the day the form was received "
                                 f"({today}); check the date", where))
        return None
    return day


def _flatten(items: Iterable[Iterable[str]]) -> set[str]:
    return {c for run in items for c in run}
