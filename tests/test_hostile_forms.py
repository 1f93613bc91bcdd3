"""Result forms made to hurt: each ends in one line, exit status 2, quickly, nothing recorded.

Written as a hostile participant would build them: a workbook whose XML declares a billion
laughs (the classic entity expansion attack), a workbook of a few hundred kB that would unpack
to hundreds of MB, a sheet reaching past the row limit, a value cell with a formula whose
stored result differs from what it computes, a file larger than any form, a CSV of more lines
than any form. Also the number markers a careless laboratory writes (n.d., a limit, a dash
for a minus) and the ones that are read (the minus sign U+2212, no-break spaces).
"""

from __future__ import annotations

import time
import zipfile

import pytest
from conftest import ROUND, filled, nothing_recorded, one_error, receive, set_cell, write
from test_intake import _xlsx_form

from planner import forms, plan
from planner.ledger import Ledger

FIRST = 12  # the first data line of the example's blank CSV form


def _one_line(result, path) -> str:
    assert result.exit_code == 2, (result.stdout, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.stderr, lines
    assert lines[0].startswith(f"error: {path}"), lines[0]
    return lines[0]


def _rezip(source, target, replace: dict[str, bytes], *, level: int = 6) -> None:
    """Copy a workbook, with some parts' bytes replaced."""
    with zipfile.ZipFile(source) as old, zipfile.ZipFile(
            target, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=level) as new:
        for info in old.infolist():
            new.writestr(info.filename, replace.get(info.filename, old.read(info.filename)))


def _sheet(planned, tmp_path) -> tuple:
    """Return a good filled workbook of kal, the name of its sheet part and that part's XML."""
    good, _ = _xlsx_form(planned, tmp_path, "kal")
    with zipfile.ZipFile(good) as z:
        part = next(n for n in z.namelist() if n.startswith("xl/worksheets/sheet"))
        return good, part, z.read(part)


def test_an_entity_expansion_in_a_workbook_is_refused_before_parsing(planned, runner, tmp_path):
    good, part, raw = _sheet(planned, tmp_path)
    xml = raw.decode("utf-8")
    lol = ['<!ENTITY lol0 "lol">'] + [
        f'<!ENTITY lol{i} "{("&lol" + str(i - 1) + ";") * 10}">' for i in range(1, 10)]
    head, _, body = xml.partition("?>")
    bomb = f'{head}?><!DOCTYPE worksheet [{"".join(lol)}]>{body}'.replace(
        "B. Analyst", "&lol9;", 1)
    path = tmp_path / "bomb.xlsx"
    _rezip(good, path, {part: bomb.encode()})
    started = time.perf_counter()
    line = _one_line(receive(runner, planned, path), path)
    assert time.perf_counter() - started < 5
    assert "declares XML entities" in line and part in line
    assert nothing_recorded(planned)


def test_a_workbook_that_would_unpack_to_hundreds_of_mb_is_refused(planned, runner, tmp_path):
    good, part, xml = _sheet(planned, tmp_path)
    # 250 MB of blank rows compress to a few hundred kB.
    filler = b"<row/>" * (250_000_000 // 6)
    bomb = xml.replace(b"</sheetData>", filler + b"</sheetData>")
    path = tmp_path / "inflating.xlsx"
    _rezip(good, path, {part: bomb}, level=9)
    assert path.stat().st_size < 2_000_000
    started = time.perf_counter()
    line = _one_line(receive(runner, planned, path), path)
    assert time.perf_counter() - started < 10
    assert "would unpack to" in line
    assert nothing_recorded(planned)


def test_a_sheet_reaching_past_the_row_limit_is_refused(planned, runner, tmp_path):
    good, part, xml = _sheet(planned, tmp_path)
    far = f'<row r="{forms.MAX_ROWS + 5}"><c r="A{forms.MAX_ROWS + 5}" t="inlineStr"><is><t>x'
    far += "</t></is></c></row>"
    path = tmp_path / "long.xlsx"
    _rezip(good, path, {part: xml.replace(b"</sheetData>", far.encode() + b"</sheetData>")})
    line = _one_line(receive(runner, planned, path), path)
    assert f"reaches past row {forms.MAX_ROWS:,}" in line
    assert nothing_recorded(planned)


def test_a_formula_in_a_value_cell_is_refused_with_its_row(planned, runner, tmp_path):
    from openpyxl import load_workbook

    path, header = _xlsx_form(planned, tmp_path, "kal")
    book = load_workbook(path)
    sheet = book.active
    sheet.cell(header + 2, 4).value = "=10.5*2"
    book.save(path)
    line = _one_line(receive(runner, planned, path), path)
    assert f"row {header + 2}: the cell in column 'value' holds a formula (=10.5*2)" in line
    assert nothing_recorded(planned)


def test_a_file_larger_than_any_form_is_refused_unread(planned, runner, tmp_path):
    path = tmp_path / "huge.csv"
    with open(path, "wb") as out:  # sparse: the size is on record, the disk stays empty
        out.truncate(forms.MAX_BYTES + 1)
    line = _one_line(receive(runner, planned, path), path)
    assert "more than a form of ringplan can be" in line
    assert nothing_recorded(planned)


def test_a_csv_of_more_lines_than_any_form_is_refused(planned, runner, tmp_path):
    lines = filled(planned, "kal") + ["# padding"] * forms.MAX_ROWS
    path = write(tmp_path, "long.csv", lines)
    line = _one_line(receive(runner, planned, path), path)
    assert "more than a form of ringplan can have" in line
    assert nothing_recorded(planned)


@pytest.mark.parametrize(("text", "fragment"), [
    ("n.d.", "value 'n.d.' is a marker (such as 'not determined'), not a number; leave the "
             "value empty and write it under remarks"),
    ("<0,5", "value '<0,5' is a limit, not a result, and cannot be scored; leave the value "
             "empty and write it under remarks"),
    ("\u2013 10,5", "value '\u2013 10,5' starts with a dash (U+2013), not a minus sign; write "
                    "'-10,5'"),
], ids=["n.d.", "limit", "dash"])
def test_markers_are_named_for_what_they_are(planned, runner, tmp_path, text, fragment):
    lines = filled(planned, "kal")
    set_cell(lines, FIRST, "value", text, "kal")
    path = write(tmp_path, "kal.csv", lines)
    assert one_error(receive(runner, planned, path), path, FIRST) == fragment
    assert nothing_recorded(planned)


def test_a_unicode_minus_and_no_break_spaces_are_read(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    set_cell(lines, FIRST, "value", "\u221210,25", "kal")
    set_cell(lines, FIRST + 1, "value", "\u00a010,5\u00a0", "kal")
    path = write(tmp_path, "kal.csv", lines)
    done = receive(runner, planned, path)
    assert done.exit_code == 0, done.stderr
    with Ledger.open(planned) as ledger:
        rows = ledger.result_rows(ledger.submissions(ROUND)[0].row)
    values = sorted(r.value for r in rows if r.value is not None)
    assert values[0] == -10.25 and 10.5 in values
    assert (plan.round_dir(planned, ROUND) / "results").is_dir()


def test_an_honest_workbook_passes_the_part_scan_and_reads_as_before(planned, tmp_path):
    path, _ = _xlsx_form(planned, tmp_path, "kal")
    form = forms.read_form(path)
    assert form.kind == "xlsx" and len(form.rows) == 18  # 6 materials x 3 trials
    assert form.data == path.read_bytes()


@pytest.mark.parametrize("column", ["trial", "position"])
def test_an_overflowing_trial_or_position_is_one_line(planned, runner, tmp_path, column):
    # Found by tests/test_fuzz.py: '1E400' in the trial column ended in an OverflowError.
    lines = filled(planned, "kal")
    set_cell(lines, FIRST, column, "1E400", "kal")
    path = write(tmp_path, "kal.csv", lines)
    message = one_error(receive(runner, planned, path), path, FIRST)
    assert f"{column} '1E400'" in message
    assert nothing_recorded(planned)


def test_a_batch_with_one_bad_form_says_that_nothing_was_recorded(planned, runner, tmp_path):
    good = write(tmp_path, "kal.csv", filled(planned, "kal"))
    bad = tmp_path / "hel.csv"
    bad.write_text("garbage\n", encoding="utf-8")
    done = receive(runner, planned, good, bad)
    assert done.exit_code == 2
    lines = done.stderr.strip().splitlines()
    assert lines[0].startswith(f"error: {bad}:1: expected the header row")
    assert lines[-1].startswith("error: nothing was recorded: the 2 forms are recorded together")
    assert nothing_recorded(planned)
