"""The returned result form's file formats: CSV and XLSX, read into one Form.

A result form is the CSV that ``plan`` wrote into ``labs/<lab>/result-form.csv``
(identity lines ``# key: value``, then a header row with at least ``code`` and
``value``, or a column per measurand), or the XLSX workbook of the same content.
The CSV is UTF-8 (a byte order mark is allowed) and separated by ``;``, ``,`` or
a tab, whichever splits the header into ``code`` and the columns beside it;
comment lines below the table are skipped. The workbook is read from the form's
sheet, or its first sheet, with identity lines in the first cells of the rows
above the header. An old-style ``.xls`` workbook is refused.

``read_form`` only reads: it keeps every cell as found, with its line (CSV) or
row (XLSX), and leaves checking against the round to ``planner.intake``.

A form is small (a row per unit), so a file that could only be an attack or a
slip is refused before it is parsed: more than ``MAX_BYTES`` on disk, a workbook
that would unpack to more than ``MAX_UNPACKED`` bytes, an XML part that declares
a document type or entities (a spreadsheet program never writes them; they are
how a few hundred bytes grow into gigabytes), more than ``MAX_ROWS`` rows. A cell
of a workbook's table that holds a formula is refused too: its stored value is
what the program computed when the file was last saved, not necessarily what the
laboratory saw or meant.
"""

from __future__ import annotations

import csv
import hashlib
import io
from dataclasses import dataclass, field
from datetime import date
from pathlib import Path
from typing import Any

from planner.errors import IntakeError, Where

__all__ = ["IDENTITY_KEYS", "MAX_BYTES", "MAX_ROWS", "MAX_UNPACKED", "Form", "FormRow",
           "cell_text", "read_form"]

IDENTITY_KEYS = ("study", "round", "laboratory", "fingerprint", "unit")
"""Identity lines a returned form must carry."""
_MORE_IDENTITY = ("decimal", "measurand", "results due", "visit", "submission token",
                  "measurands")
# Read from a workbook's two-cell rows too (key, value): what intake checks.
_CHECKED_IDENTITY = IDENTITY_KEYS + ("visit", "submission token", "measurands")

MAX_BYTES = 20_000_000
"""Largest form file read, in bytes (a form of 20,000 rows is about 2 MB)."""
MAX_UNPACKED = 200_000_000
"""Largest total size of a workbook's parts once unpacked, in bytes."""
MAX_ROWS = 100_000
"""Most rows a form may have (a laboratory of a 30,000-unit round has a few thousand)."""

_XLSX_MAGIC = b"PK\x03\x04"
_OLD_XLS_MAGIC = b"\xd0\xcf\x11\xe0"


@dataclass(frozen=True, slots=True)
class FormRow:
    """One table row of a form: its line (CSV) or row (XLSX) and its cells by column."""

    line: int
    cells: tuple[tuple[str, Any], ...]
    width: int

    def get(self, column: str) -> Any:
        """Return the raw cell of ``column`` ('' if the form has no such column)."""
        for name, value in self.cells:
            if name == column:
                return value
        return ""


@dataclass(frozen=True, slots=True)
class Form:
    """A returned result form as read, before any check against the round."""

    path: str
    kind: str                                  # "csv" | "xlsx"
    sha256: str
    identity: tuple[tuple[str, str, int], ...]  # (key, value, line)
    header_line: int
    columns: tuple[str, ...]
    header_width: int
    separator: str | None
    rows: tuple[FormRow, ...]
    data: bytes = field(repr=False)

    def where(self, line: int | None) -> Where:
        """Return the place of a line (CSV) or row (XLSX) of this form."""
        if line is None:
            return Where(self.path)
        if self.kind == "xlsx":
            return Where(self.path, None, f"row {line}")
        return Where(self.path, line)

    def ident(self, key: str) -> tuple[str, int] | None:
        """Return (value, line) of an identity line, or None if the form lacks it."""
        for name, value, line in self.identity:
            if name == key:
                return value, line
        return None


def read_form(path: Path) -> Form:
    """Return the form in a CSV or XLSX file; raise IntakeError if it cannot be read as one."""
    name = str(path)
    try:
        size = Path(path).stat().st_size
        if size > MAX_BYTES:
            raise IntakeError(f"the file is {size:,} bytes, more than a form of ringplan can "
                              f"be ({MAX_BYTES:,}); send the form that 'ringplan plan' wrote",
                              Where(name))
        data = Path(path).read_bytes()
    except OSError as exc:
        raise IntakeError(f"cannot read the file ({(exc.strerror or 'error').lower()})",
                          Where(name)) from None
    if not data.strip():
        raise IntakeError("the file is empty; send the form that 'ringplan plan' wrote "
                          "for it, with the values filled in", Where(name, 1))
    if data.startswith(_OLD_XLS_MAGIC):
        raise IntakeError("this is an old-style .xls workbook; save it as .xlsx or as CSV",
                          Where(name))
    if data.startswith(_XLSX_MAGIC):
        return _read_xlsx(name, data)
    return _read_csv(name, data)


def _decode(name: str, data: bytes) -> str:
    try:
        return data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        line = data[:exc.start].count(b"\n") + 1
        raise IntakeError("the file is not UTF-8 text (nor an .xlsx workbook); save it as "
                          "'CSV UTF-8'", Where(name, line)) from None


def _identity_line(text: str) -> tuple[str, str] | None:
    """Return (key, value) of '# key: value' (or 'key: value'), or None for other text."""
    body = text.strip().lstrip("#").strip()
    key, colon, value = body.partition(":")
    key = key.strip().lower()
    if not colon or key not in IDENTITY_KEYS + _MORE_IDENTITY:
        return None
    return key, value.strip()


def _read_csv(name: str, data: bytes) -> Form:
    text = _decode(name, data)
    if "\x00" in text:
        raise IntakeError("the file holds NUL bytes; it is not a CSV text file", Where(name))
    lines = text.splitlines()
    if len(lines) > MAX_ROWS:
        raise IntakeError(f"the file has {len(lines):,} lines, more than a form of ringplan can "
                          f"have ({MAX_ROWS:,}); send the form that 'ringplan plan' wrote",
                          Where(name))
    header_at = next((i for i, line in enumerate(lines)
                      if line.strip() and not line.lstrip(' "').startswith("#")), None)
    if header_at is None:
        raise IntakeError("the file has no header row; the table must start with the row "
                          "'trial, position, code, value, ...' of the blank form",
                          Where(name, len(lines) or 1))
    sep = _separator(lines[header_at])
    if sep is None:
        raise IntakeError(f"expected the header row with the columns 'code' and 'value' (or "
                          "one column per measurand), found "
                          f"{lines[header_at].strip()[:60]!r}", Where(name, header_at + 1))
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=sep)
    identity: list[tuple[str, str, int]] = []
    rows: list[FormRow] = []
    columns: tuple[str, ...] = ()
    header_line = header_width = 0
    last = 0
    try:
        for cells in reader:
            start, last = last + 1, reader.line_num
            if not any(c.strip() for c in cells):
                continue
            if not columns and cells[0].lstrip().startswith("#"):
                found = _identity_line(sep.join(cells).rstrip(sep + " "))
                if found:
                    identity.append((*found, start))
                continue
            if not columns:
                columns = tuple(c.strip().lower() for c in cells)
                header_line, header_width = start, len(cells)
                continue
            if cells[0].lstrip().startswith("#"):
                continue  # a comment below the table
            rows.append(FormRow(start, tuple(zip(columns, (c.strip() for c in cells))),
                                len(cells)))
    except csv.Error as exc:
        raise IntakeError(f"the CSV cannot be read ({exc})", Where(name, last + 1)) from None
    return Form(name, "csv", hashlib.sha256(data).hexdigest(), tuple(identity), header_line,
                columns, header_width, sep, tuple(rows), data)


def _separator(header: str) -> str | None:
    # 'code' and a column beside it: a form with several measurands has no 'value' column,
    # and with another separator the header would be a single cell.
    for sep in (";", ",", "\t"):
        cells = [c.strip().strip('"').lower() for c in header.split(sep)]
        if "code" in cells and sum(1 for c in cells if c) >= 2:
            return sep
    return None


def _read_xlsx(name: str, data: bytes) -> Form:
    from zipfile import BadZipFile

    from openpyxl import load_workbook

    from planner.render.result_form import SHEET

    _check_parts(name, data)
    try:
        # data_only=False: a formula cell shows as a formula, not as its stored result
        book = load_workbook(io.BytesIO(data), read_only=True, data_only=False)
    except (BadZipFile, KeyError, ValueError, OSError):
        raise IntakeError("this zip file is not an .xlsx workbook; save the form as .xlsx or "
                          "CSV", Where(name)) from None
    except Exception as exc:  # noqa: BLE001 - a parser's error on a hostile file
        raise IntakeError(f"the workbook cannot be read ({type(exc).__name__}); save the form "
                          "again as .xlsx or send it as CSV", Where(name)) from None
    try:
        sheet = book[SHEET] if SHEET in book.sheetnames else book.worksheets[0]
        grid = _grid(name, sheet)
    except IntakeError:
        raise
    except Exception as exc:  # noqa: BLE001 - a parser's error on a hostile file
        raise IntakeError(f"the workbook cannot be read ({type(exc).__name__}); save the form "
                          "again as .xlsx or send it as CSV", Where(name)) from None
    finally:
        book.close()
    identity: list[tuple[str, str, int]] = []
    rows: list[FormRow] = []
    columns: tuple[str, ...] = ()
    header_line = 0
    for number, (raw, formulas) in enumerate(grid, start=1):
        if columns and formulas and not (isinstance(raw[0], str)
                                         and raw[0].lstrip().startswith("#")):
            column = formulas[0]
            named = columns[column] if column < len(columns) and columns[column] else None
            raise IntakeError(
                f"the cell in column {named or _letter(column)!r} holds a formula "
                f"({str(raw[column])[:40]}); its stored result may not be what the laboratory "
                "saw; type the number itself and save again", Where(name, None, f"row {number}"))
        raw = tuple(None if i in formulas else c for i, c in enumerate(raw))
        cells = [cell_text(c) if not isinstance(c, (int, float, date)) else c for c in raw]
        filled = [c for c in cells if c not in (None, "")]
        if not filled:
            continue
        if not columns:
            lowered = tuple(str(c).strip().lower() if c is not None else "" for c in cells)
            # 'trial' too: a form with several measurands has no 'value' column, and
            # 'replicate' for the host's check forms. A heading row in the laboratory's
            # words stands above and has none of these words.
            if "code" in lowered and {"value", "trial", "replicate"} & set(lowered):
                columns, header_line = lowered, number
                continue
            found = _identity_line(str(filled[0]))
            if found is None and len(filled) >= 2:
                key = str(filled[0]).strip().rstrip(":").strip().lower()
                if key in _CHECKED_IDENTITY:
                    found = (key, str(filled[1]).strip())
            if found:
                identity.append((*found, number))
            continue
        if isinstance(cells[0], str) and cells[0].lstrip().startswith("#"):
            continue
        rows.append(FormRow(number, tuple(zip(columns, ("" if c is None else c for c in cells))),
                            len(cells)))
    if not columns:
        raise IntakeError(f"the sheet {sheet.title!r} has no header row with the columns "
                          "'trial', 'code' and the results; send the result form as it was "
                          "printed",
                          Where(name))
    return Form(name, "xlsx", hashlib.sha256(data).hexdigest(), tuple(identity), header_line,
                columns, len(columns), None, tuple(rows), data)


def _check_parts(name: str, data: bytes) -> None:
    """Refuse a workbook that unpacks too large or whose XML declares a DTD or entities,
    reading each part as a stream and never more than MAX_UNPACKED bytes in all."""
    from zipfile import BadZipFile, ZipFile

    try:
        with ZipFile(io.BytesIO(data)) as archive:
            declared = sum(info.file_size for info in archive.infolist())
            if declared > MAX_UNPACKED:
                raise IntakeError(f"the workbook would unpack to {declared:,} bytes, more than "
                                  f"a form of ringplan can be ({MAX_UNPACKED:,}); send the form "
                                  "that 'ringplan plan' wrote", Where(name))
            total = 0
            for info in archive.infolist():
                if not info.filename.endswith((".xml", ".rels")):
                    continue
                tail = b""
                with archive.open(info) as part:
                    while chunk := part.read(1 << 16):
                        total += len(chunk)
                        if total > MAX_UNPACKED:
                            raise IntakeError("the workbook unpacks to more than a result "
                                              f"form can be ({MAX_UNPACKED:,} bytes); send "
                                              "the form that 'ringplan plan' wrote", Where(name))
                        window = tail + chunk
                        if b"<!DOCTYPE" in window or b"<!ENTITY" in window:
                            raise IntakeError(
                                f"the workbook's part {info.filename!r} declares XML entities "
                                "(<!DOCTYPE or <!ENTITY), which no spreadsheet program writes "
                                "and which can make a small file expand without end; save the "
                                "form again as .xlsx or send it as CSV", Where(name))
                        tail = chunk[-16:]
    except (BadZipFile, OSError, RuntimeError, ValueError, EOFError):
        raise IntakeError("this zip file is not an .xlsx workbook (a part cannot be unpacked); "
                          "save the form as .xlsx or CSV", Where(name)) from None


def _grid(name: str, sheet: Any) -> list[tuple[tuple[Any, ...], tuple[int, ...]]]:
    """Return (values, columns holding a formula) of every row, refusing more than MAX_ROWS."""
    out = []
    # A sheet's stored dimension may be wrong or forged; read every row the XML holds.
    sheet.reset_dimensions()
    for count, row in enumerate(sheet.iter_rows(min_row=1), start=1):
        if count > MAX_ROWS:
            raise IntakeError(f"the sheet {sheet.title!r} reaches past row {MAX_ROWS:,}, "
                              "further than a form of ringplan can; delete what lies below the "
                              "table, or send the form that 'ringplan plan' wrote", Where(name))
        values = tuple(getattr(c, "value", None) for c in row)
        formulas = tuple(i for i, c in enumerate(row) if getattr(c, "data_type", None) == "f")
        out.append((values, formulas))
    return out


def _letter(index: int) -> str:
    """Return the spreadsheet column letters of a 0-based column index (0 -> A, 26 -> AA)."""
    text = ""
    index += 1
    while index:
        index, rest = divmod(index - 1, 26)
        text = chr(65 + rest) + text
    return text


def cell_text(value: Any) -> str:
    """Return a cell as stripped text: '' for an empty cell, str() of any other value."""
    return "" if value is None else str(value).strip()

