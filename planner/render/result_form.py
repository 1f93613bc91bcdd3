"""The result form as a spreadsheet (XLSX), beside the CSV the planner writes.

It mirrors ``labs/<lab>/result-form.csv`` line for line, so that intake can
read either: first the identity rows (column A the key, column B the value,
in the order of the CSV's ``# key: value`` lines), then the CSV's note, a
note that the pre-filled cells are locked, one blank row, the header row
``trial, position, code, value, uncertainty, date, analyst, remarks`` and one
row per unit in run order. The pre-filled cells are locked (sheet protection
without a password: it stops slips, not intent); the value and uncertainty
columns accept only numbers, the date column only dates. A spreadsheet stores
numbers without a decimal mark and shows them in the user's locale, so the
laboratory's decimal convention matters only for the CSV.

A study with several measurands has a value column per measurand (and its
uncertainty column) in place of ``value`` and ``uncertainty``; a cell the CSV
marks ``n/a`` (a measurand not measured on that unit) stays locked and grey and
outside its column's number check.

In another language than English the keys and column names stay as they are,
since intake reads them: column C names each identity key in the laboratory's
words, and a row of headings in its words stands above the header row, which
is set small and grey with a note to leave it alone. The messages of the
checks and the notes are in the laboratory's language too.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

from planner.language import DEFAULT, texts
from planner.render import _layout

__all__ = ["SHEET", "read_csv", "render"]

SHEET = "result form"
"""Name of the worksheet that holds the form (read by intake: the same in every language)."""

_EDITABLE = ("date", "analyst", "remarks")
_UNCERTAINTY = " uncertainty"  # plan.uncertainty_column


def read_csv(text: str) -> tuple[list[tuple[str, str]], list[str], list[str], list[list[str]]]:
    """Return (identity pairs, note lines, header, rows) of a result-form CSV."""
    from planner.plan import FORM_IDENTITY

    identity: list[tuple[str, str]] = []
    notes: list[str] = []
    body: list[str] = []
    for line in text.splitlines():
        if line.startswith("#"):
            name, sep, value = line[1:].strip().partition(": ")
            if sep and name in FORM_IDENTITY:
                identity.append((name, value))
            else:
                notes.append(line[1:].strip())
        elif line.strip():
            body.append(line)
    if not body:
        raise ValueError("the result-form CSV has no header row")
    delimiter = ";" if body[0].count(";") > body[0].count(",") else ","
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=delimiter))
    return identity, notes, rows[0], rows[1:]


def render(path: Path, csv_text: str, *, language: str = DEFAULT) -> Path:
    """Write the XLSX twin of the result-form CSV ``csv_text`` to ``path`` in ``language``
    (the laboratory's); return ``path``."""
    from openpyxl import Workbook
    from openpyxl.styles import Alignment, Font, PatternFill, Protection
    from openpyxl.worksheet.datavalidation import DataValidation

    from planner.plan import NOT_APPLICABLE

    t = texts(language)
    identity, notes, header, rows = read_csv(csv_text)
    kinds = _column_kinds(header)
    several = any(kind == "measurand" for kind, _ in kinds.values())
    units = dict(_units(identity))
    book = Workbook()
    sheet = book.active
    sheet.title = SHEET
    accent = _layout.ACCENT.lstrip("#")
    bold = Font(bold=True)
    muted = Font(italic=True, color="6B6B6B")
    for name, value in identity:
        own = t(f"form.identity.{name}")
        sheet.append([name, value] + ([own] if own != name else []))
        sheet.cell(sheet.max_row, 1).font = bold
        if own != name:
            sheet.cell(sheet.max_row, 3).font = muted
    headings = [_heading(t, name, kinds, units) for name in header]
    # English needs no row of headings; it would also read as the header row to intake.
    localized = headings != header and language != DEFAULT
    locked_note = t("form.locked_several") if several else t("form.locked")
    for note in [*notes, locked_note] + ([t("form.machine_row")] if localized else []):
        sheet.append([note])
        sheet.cell(sheet.max_row, 1).font = muted
    sheet.append([])
    fill = PatternFill("solid", fgColor="EEF3F3")
    if localized:
        sheet.append(headings)
        for cell in sheet[sheet.max_row]:
            cell.font = Font(bold=True, color=accent)
            cell.fill = fill
    sheet.append(header)
    header_row = sheet.max_row
    for cell in sheet[header_row]:
        cell.font = Font(size=8, color="6B6B6B") if localized else Font(bold=True, color=accent)
        if not localized:
            cell.fill = fill
    first = header_row + 1
    for row in rows:
        values: list[Any] = []
        for name, raw in zip(header, row, strict=False):
            values.append(int(raw) if name in ("trial", "position") and raw.isdigit() else
                          (raw if raw != "" else None))
        sheet.append(values)
    last = max(first, sheet.max_row)
    column = {name: i + 1 for i, name in enumerate(header)}
    letter = {name: sheet.cell(1, i).column_letter for name, i in column.items()}

    unlocked = Protection(locked=False)
    # A measurand not measured on a unit: its cell holds n/a, stays locked and is grey.
    not_measured = PatternFill("solid", fgColor="D9DCDD")
    open_rows: dict[str, list[int]] = {}
    for name in header:
        if kinds[name][0] not in ("value", "uncertainty", "measurand", "measurand uncertainty",
                                  "editable"):
            continue
        for r in range(first, last + 1):
            cell = sheet.cell(r, column[name])
            if cell.value == NOT_APPLICABLE:
                cell.fill = not_measured
                cell.font = muted
                cell.alignment = Alignment(horizontal="center")
                continue
            cell.protection = unlocked
            open_rows.setdefault(name, []).append(r)
            if name == "date":
                cell.number_format = "yyyy-mm-dd"
    for name in header:
        kind = kinds[name][0]
        if kind in ("value", "measurand"):
            check = DataValidation(
                type="decimal", operator="between", formula1="-1E+300", formula2="1E+300",
                allow_blank=True, showErrorMessage=True, errorTitle=t("form.not_a_number"),
                error=t("form.value_error"))
        elif kind in ("uncertainty", "measurand uncertainty"):
            check = DataValidation(
                type="decimal", operator="greaterThanOrEqual", formula1="0", allow_blank=True,
                showErrorMessage=True, errorTitle=t("form.not_a_number"),
                error=t("form.uncertainty_error"))
        elif name == "date":
            check = DataValidation(
                type="date", operator="greaterThan", formula1="36526", allow_blank=True,
                showErrorMessage=True, errorTitle=t("form.not_a_date"),
                error=t("form.date_error"))
        else:
            continue
        spans = _spans(open_rows.get(name, [])) or [(first, last)]
        for top, bottom in spans:
            check.add(f"{letter[name]}{top}:{letter[name]}{bottom}")
        sheet.add_data_validation(check)
    widths = {"trial": 7, "position": 9, "code": 14, "value": 12, "uncertainty": 13,
              "date": 12, "analyst": 16, "remarks": 40}
    for name in header:
        if name not in letter:
            continue
        # wide enough for the heading in the laboratory's words too
        own = len(_heading(t, name, kinds, units)) + 2
        if name in widths:
            sheet.column_dimensions[letter[name]].width = max(widths[name], own)
        elif kinds[name][0].startswith("measurand"):
            sheet.column_dimensions[letter[name]].width = max(12, own, len(name) + 2)
    sheet.column_dimensions["A"].width = max(sheet.column_dimensions["A"].width or 0, 14)
    for r in range(1, header_row):
        sheet.cell(r, 2).alignment = Alignment(horizontal="left")
    sheet.freeze_panes = sheet.cell(first, 1)
    sheet.protection.sheet = True
    sheet.protection.formatCells = False
    sheet.protection.formatColumns = False

    def write(temp: Path) -> None:
        book.save(str(temp))

    return _layout.write_atomic(path, write)


def _column_kinds(header: list[str]) -> dict[str, tuple[str, str]]:
    """Return column -> (kind, measurand id): the form's own columns by name ('value',
    'uncertainty', 'editable' for date, analyst and remarks, 'fixed' for the pre-filled
    ones), else 'measurand' or 'measurand uncertainty' (a study with several measurands)."""
    from planner.plan import FORM_COLUMNS

    out: dict[str, tuple[str, str]] = {}
    for name in header:
        if name in ("value", "uncertainty"):
            out[name] = (name, "")
        elif name in _EDITABLE:
            out[name] = ("editable", "")
        elif name in FORM_COLUMNS or not name:
            out[name] = ("fixed", "")
        elif name.endswith(_UNCERTAINTY) and name[:-len(_UNCERTAINTY)] in header:
            out[name] = ("measurand uncertainty", name[:-len(_UNCERTAINTY)])
        else:
            out[name] = ("measurand", name)
    return out


def _units(identity: list[tuple[str, str]]) -> list[tuple[str, str]]:
    """Return (measurand id, unit) from a form's ``measurands`` identity line ([] without)."""
    from planner.plan import read_measurands_line

    line = dict(identity).get("measurands")
    return (read_measurands_line(line) or []) if line else []


def _heading(t: Any, name: str, kinds: dict[str, tuple[str, str]], units: dict[str, str]
             ) -> str:
    """Return a column's heading in the laboratory's words."""
    kind, measurand = kinds[name]
    if kind == "measurand":
        return str(t("form.heading_measurand", id=name, unit=units.get(name, "")))
    if kind == "measurand uncertainty":
        return str(t("form.heading_uncertainty", id=measurand))
    return str(t(f"form.column.{name}")) if name else ""


def _spans(rows: list[int]) -> list[tuple[int, int]]:
    """Return the runs of consecutive row numbers as (first, last)."""
    out: list[tuple[int, int]] = []
    for r in rows:
        if out and out[-1][1] == r - 1:
            out[-1] = (out[-1][0], r)
        else:
            out.append((r, r))
    return out
