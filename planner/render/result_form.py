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

_EDITABLE = ("value", "uncertainty", "date", "analyst", "remarks")


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

    t = texts(language)
    identity, notes, header, rows = read_csv(csv_text)
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
    headings = [t(f"form.column.{name}") if name else "" for name in header]
    localized = headings != header
    for note in [*notes, t("form.locked")] + ([t("form.machine_row")] if localized else []):
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
    for name in _EDITABLE:
        if name not in column:
            continue
        for r in range(first, last + 1):
            cell = sheet.cell(r, column[name])
            cell.protection = unlocked
            if name == "date":
                cell.number_format = "yyyy-mm-dd"
    checks = []
    if "value" in column:
        checks.append(("value", DataValidation(
            type="decimal", operator="between", formula1="-1E+300", formula2="1E+300",
            allow_blank=True, showErrorMessage=True, errorTitle=t("form.not_a_number"),
            error=t("form.value_error"))))
    if "uncertainty" in column:
        checks.append(("uncertainty", DataValidation(
            type="decimal", operator="greaterThanOrEqual", formula1="0", allow_blank=True,
            showErrorMessage=True, errorTitle=t("form.not_a_number"),
            error=t("form.uncertainty_error"))))
    if "date" in column:
        checks.append(("date", DataValidation(
            type="date", operator="greaterThan", formula1="36526", allow_blank=True,
            showErrorMessage=True, errorTitle=t("form.not_a_date"),
            error=t("form.date_error"))))
    for name, check in checks:
        check.add(f"{letter[name]}{first}:{letter[name]}{last}")
        sheet.add_data_validation(check)
    widths = {"trial": 7, "position": 9, "code": 14, "value": 12, "uncertainty": 13,
              "date": 12, "analyst": 16, "remarks": 40}
    for name, width in widths.items():
        if name in letter:
            # wide enough for the heading in the laboratory's words too
            own = len(t(f"form.column.{name}")) + 2
            sheet.column_dimensions[letter[name]].width = max(width, own)
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
