"""Checking returned result forms: through the CLI, XLSX forms, numbers, messages.

Every round here is planned from the example study with the fixed secret of
conftest; forms are the CSV that ``plan`` wrote, filled in by editing lines.
Expected values are the numbers the tests write into the forms themselves.
"""

from __future__ import annotations

import hashlib
from datetime import date

import pytest
from conftest import (
    FIRST_ROW,
    HEADER_LINE,
    ROUND,
    filled,
    get_cell,
    manifest_of,
    mistype,
    nothing_recorded,
    one_error,
    plan_example_round,
    receive,
    set_cell,
    value_of,
    write,
)

from planner import codes, forms, intake, plan, spec
from planner.errors import IntakeError
from planner.ledger import Ledger

# --- bad forms through the CLI: one line, exit 2, nothing recorded -----------------

def _other_lab_code(m):
    return codes.format(m["labs"]["tor"]["trials"][0][0])



CASES = [
    # id, lab, edit(lines, manifest), line, fragment, extra CLI args
    ("wrong-lab-option", "kal", None, 3,
     "the form is from laboratory 'kal', not 'tor' as --lab says", ("--lab", "tor")),
    ("lab-line-of-another-lab", "kal",
     lambda ls, m: ls.__setitem__(2, "# laboratory: tor"), 3,
     "the form says laboratory 'tor' but its codes are those of laboratory 'kal'", ()),
    ("unknown-lab", "kal", lambda ls, m: ls.__setitem__(2, "# laboratory: kall"), 3,
     "laboratory 'kall' is not in round '2027-1'; did you mean 'kal'?", ()),
    ("code-of-another-lab", "kal",
     lambda ls, m: set_cell(ls, FIRST_ROW, "code", _other_lab_code(m), "kal"), FIRST_ROW,
     "belongs to laboratory 'tor', not to 'kal'", ()),
    ("mistyped-check-character", "kal",
     lambda ls, m: set_cell(ls, 12, "code", mistype(get_cell(ls, 12, "code", "kal")), "kal"),
     12, "check character does not match", ()),
    ("duplicate-code", "kal",
     lambda ls, m: set_cell(ls, 14, "code", get_cell(ls, FIRST_ROW, "code", "kal"), "kal"), 14,
     f"appears twice (first on line {FIRST_ROW})", ()),
    ("text-in-value", "kal", lambda ls, m: set_cell(ls, 14, "value", "twelve", "kal"), 14,
     "value 'twelve' is not a number", ()),
    ("decimal-comma-in-point-lab", "crx",
     lambda ls, m: set_cell(ls, 15, "value", '"12,5"', "crx"), 15,
     "value '12,5' has a decimal comma, but this laboratory writes a decimal point", ()),
    ("decimal-comma-unquoted", "crx", lambda ls, m: set_cell(ls, 15, "value", "12,5", "crx"),
     15, "the row has 9 fields but the header has 8", ()),
    ("decimal-point-in-comma-lab", "kal", lambda ls, m: set_cell(ls, 15, "value", "12.5", "kal"),
     15, "has a decimal point, but this laboratory writes a decimal comma", ()),
    ("thousands-in-comma-lab", "kal", lambda ls, m: set_cell(ls, 16, "value", "1.234,5", "kal"),
     16, "thousands separators, which are ambiguous", ()),
    ("thousands-in-point-lab", "crx",
     lambda ls, m: set_cell(ls, 16, "value", '"1,234.5"', "crx"), 16,
     "thousands separators, which are ambiguous", ()),
    ("thousands-space", "kal", lambda ls, m: set_cell(ls, 16, "value", "1 234,5", "kal"), 16,
     "thousands separators", ()),
    ("empty-value-without-remark", "kal", lambda ls, m: set_cell(ls, 17, "value", "", "kal"),
     17, "value is empty; enter the result, or say in remarks why there is none", ()),
    ("uncertainty-not-positive", "kal",
     lambda ls, m: set_cell(ls, 18, "uncertainty", "0", "kal"), 18, "is not above 0", ()),
    ("date-before-window", "kal", lambda ls, m: set_cell(ls, 19, "date", "2027-01-05", "kal"),
     19, "before the test window (2027-01-19 to 2027-01-28)", ()),
    ("date-not-a-date", "kal", lambda ls, m: set_cell(ls, 19, "date", "2027-02-30", "kal"), 19,
     "date '2027-02-30' is not a calendar date", ()),
    ("date-after-receipt", "kal", lambda ls, m: set_cell(ls, 19, "date", "2027-01-31", "kal"),
     19, "after the day the form was received (2027-01-30)", ()),
    ("wrong-unit", "kal", lambda ls, m: ls.__setitem__(4, "# unit: g/min"), 5,
     "the form reports in 'g/min', but the study's unit is 'g/10 min'", ()),
    ("wrong-fingerprint", "kal", lambda ls, m: ls.__setitem__(3, "# fingerprint: " + "0" * 64),
     4, "is not this round's", ()),
    ("wrong-study", "kal", lambda ls, m: ls.__setitem__(0, "# study: nvp-other"), 1,
     "the form is for study 'nvp-other', not 'nvp-mfr'", ()),
    ("identity-line-removed", "kal", lambda ls, m: ls.pop(0), 1,
     "the form has no '# study: ...' line", ()),
    ("trial-of-another-slot", "kal", lambda ls, m: set_cell(ls, FIRST_ROW, "trial", "2", "kal"), FIRST_ROW,
     "is trial 1, position 1 of the run order, but the row says trial '2'", ()),
    ("row-without-code", "kal", lambda ls, m: set_cell(ls, FIRST_ROW, "code", "", "kal"), FIRST_ROW,
     "the row has no code", ()),
    ("unit-kept-by-host", "kal",
     lambda ls, m: set_cell(ls, FIRST_ROW, "code", codes.format(m["host_units"]["retained"][0]), "kal"),
     FIRST_ROW, "is a unit kept by the host", ()),
    ("spare-not-issued", "tor",
     lambda ls, m: set_cell(ls, FIRST_ROW, "code", codes.format(m["host_units"]["spare"][0]),
                            "tor"),
     FIRST_ROW, "is a spare kept by the host that was not issued to laboratory 'tor'; run "
     "'ringplan spare' for the damaged unit first", ()),
    ("misspelt-column", "kal", lambda ls, m: ls.__setitem__(
        HEADER_LINE - 1, ls[HEADER_LINE - 1].replace("remarks", "remark")), HEADER_LINE, "did you mean 'remarks'?", ()),
]


@pytest.mark.parametrize("case", CASES, ids=[c[0] for c in CASES])
def test_bad_form_is_one_line_and_nothing_is_recorded(planned, runner, tmp_path, case):
    name, lab, edit, line, fragment, extra = case
    lines = filled(planned, lab)
    if edit is not None:
        edit(lines, manifest_of(planned))
    path = write(tmp_path, f"{name}.csv", lines)
    message = one_error(receive(runner, planned, path, extra=extra), path, line)
    assert fragment in message
    assert nothing_recorded(planned)


def test_suggested_spelling_of_a_decimal_comma(planned, runner, tmp_path):
    lines = filled(planned, "crx")
    set_cell(lines, 15, "value", '"12,5"', "crx")
    path = write(tmp_path, "comma.csv", lines)
    assert "write '12.5'" in one_error(receive(runner, planned, path), path, 15)


def test_empty_file(planned, runner, tmp_path):
    path = tmp_path / "empty.csv"
    path.write_bytes(b"")
    assert "the file is empty" in one_error(receive(runner, planned, path), path, 1)
    assert nothing_recorded(planned)


def test_form_of_another_round(planned, runner, tmp_path):
    plan_example_round(planned, round_id="2027-2", host="tor", receive_by=date(2027, 4, 20))
    path = write(tmp_path, "next-round.csv", filled(planned, "kal", round_id="2027-2"))
    message = one_error(receive(runner, planned, path), path, 2)
    assert message.startswith("the form is for round '2027-2', not '2027-1'")
    assert nothing_recorded(planned)


def test_code_of_another_round(planned, runner, tmp_path):
    plan_example_round(planned, round_id="2027-2", host="tor", receive_by=date(2027, 4, 20))
    lines = filled(planned, "kal")
    set_cell(lines, FIRST_ROW, "code", codes.format(manifest_of(planned, "2027-2")["labs"]["tor"]
                                             ["trials"][0][0]), "kal")
    path = write(tmp_path, "mixed.csv", lines)
    assert "belongs to round '2027-2', not to '2027-1'" in one_error(
        receive(runner, planned, path), path, FIRST_ROW)


def test_text_that_is_not_utf8(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    path = tmp_path / "latin1.csv"
    text = "\n".join(lines).replace("A. Analyst", "Sjöberg", 1) + "\n"
    path.write_bytes(text.encode("latin-1"))
    # the first byte that is not UTF-8 is the degree sign of the measurand, line 7
    assert "not UTF-8" in one_error(receive(runner, planned, path), path, 7)


def test_all_problems_of_a_form_at_once(planned, runner, tmp_path):
    lines = filled(planned, "kal")
    set_cell(lines, 12, "value", "abc", "kal")
    set_cell(lines, 20, "value", "1.5", "kal")
    path = write(tmp_path, "two.csv", lines)
    result = receive(runner, planned, path)
    assert result.exit_code == 2
    assert [ln.split(": ")[1] for ln in result.stderr.strip().splitlines()] == [
        f"{path}:12", f"{path}:20"]
    assert nothing_recorded(planned)


def test_one_bad_form_stops_the_good_one_too(planned, runner, tmp_path):
    good = write(tmp_path, "good.csv", filled(planned, "crx"))
    lines = filled(planned, "kal")
    set_cell(lines, 12, "value", "abc", "kal")
    bad = write(tmp_path, "bad.csv", lines)
    done = receive(runner, planned, good, bad)
    assert done.exit_code == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 2 and lines[0].startswith(f"error: {bad}:12: ")
    assert lines[1].startswith("error: nothing was recorded")
    assert nothing_recorded(planned)


# --- XLSX forms ----------------------------------------------------------------------

def _xlsx_form(study_dir, tmp_path, lab, *, value_for=None):
    """Render the XLSX twin of the blank CSV form and fill it as a spreadsheet user would."""
    from openpyxl import load_workbook

    from planner.render import result_form

    csv_path = plan.round_dir(study_dir, ROUND) / "labs" / lab / "result-form.csv"
    path = result_form.render(tmp_path / f"{lab}.xlsx", csv_path.read_text(encoding="utf-8"))
    book = load_workbook(path)
    sheet = book[result_form.SHEET]
    header = next(r for r in range(1, sheet.max_row + 1)
                  if [c.value for c in sheet[r]][:4] == ["trial", "position", "code", "value"])
    for n, r in enumerate(range(header + 1, sheet.max_row + 1), start=1):
        sheet.cell(r, 4).value = value_for(n) if value_for else value_of(n)
        sheet.cell(r, 6).value = date(2027, 1, 21)
        sheet.cell(r, 7).value = "B. Analyst"
    book.save(path)
    return path, header


def test_xlsx_form_round_trip(planned, runner, tmp_path):
    path, _ = _xlsx_form(planned, tmp_path, "kal")
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    assert (plan.round_dir(planned, ROUND) / "results" / f"{sha}.xlsx").is_file()
    runs = manifest_of(planned)["labs"]["kal"]["trials"]
    in_order = [c for run in runs for c in run]
    with Ledger.open(planned) as ledger:
        rows = {r.code: r for r in ledger.result_rows(ledger.submissions(ROUND)[0].row)}
    assert [rows[c].value for c in in_order] == [value_of(n) for n in range(1, 19)]
    assert {r.date for r in rows.values()} == {"2027-01-21"}


def test_xlsx_text_value_names_the_row(planned, runner, tmp_path):
    path, header = _xlsx_form(planned, tmp_path, "kal",
                              value_for=lambda n: "n/a" if n == 3 else value_of(n))
    result = receive(runner, planned, path)
    assert result.exit_code == 2
    assert result.stderr.strip().splitlines() == [
        (f"error: {path}: row {header + 3}: value 'n/a' is a marker (such as 'not determined'), "
         "not a number; leave the value empty and write it under remarks")]
    assert nothing_recorded(planned)


# --- library details -------------------------------------------------------------------

@pytest.mark.parametrize("text, decimal, expected", [
    ("12,5", "comma", 12.5), ("12.5", "point", 12.5), ("-0,25", "comma", -0.25),
    ("\u22120,25", "comma", -0.25), ("\u00a012,5\u00a0", "comma", 12.5),
    (",5", "comma", 0.5), ("1e-3", "point", 0.001), ("7", "comma", 7.0),
], ids=str)
def test_numbers_in_the_laboratory_convention(text, decimal, expected):
    assert intake.read_number(text, decimal, "value") == expected


@pytest.mark.parametrize("text, decimal, fragment", [
    ("1,234.5", "point", "thousands"), ("1.234,5", "comma", "thousands"),
    ("1.234.567", "point", "thousands"), ("1'234", "point", "thousands"),
    ("1,5", "point", "decimal comma"), ("1.5", "comma", "decimal point"),
    ("nan", "point", "not a number"), ("inf", "point", "not a number"),
    ("1_000", "point", "not a number"), ("<0.1", "point", "is a limit, not a result"),
    ("n.d.", "comma", "is a marker"), ("\u2013 0,5", "comma", "starts with a dash"),
    ("1e999", "point", "not a finite number"),
], ids=str)
def test_numbers_refused(text, decimal, fragment):
    with pytest.raises(IntakeError, match=fragment):
        intake.read_number(text, decimal, "value")


def test_check_form_lists_problems_with_places(planned, tmp_path):
    lines = filled(planned, "kal")
    set_cell(lines, 12, "value", "abc", "kal")
    form = forms.read_form(write(tmp_path, "f.csv", lines))
    problems = intake.check_form(spec.load(planned), manifest_of(planned), form,
                                 today=date(2027, 1, 30))
    assert [(p.where.line, type(p).__name__) for p in problems] == [(12, "IntakeError")]


# --- odd but valid files, and the ledger tables ------------------------------------------

def test_windows_line_ends_and_byte_order_mark(planned, runner, tmp_path):
    path = tmp_path / "excel.csv"
    path.write_bytes(b"\xef\xbb\xbf" + "\r\n".join(filled(planned, "kal")).encode() + b"\r\n")
    result = receive(runner, planned, path)
    assert result.exit_code == 0, result.stderr
    assert "18 values" in result.stdout


def test_a_problem_on_many_rows_is_one_line():
    from planner.errors import IntakeError, Where

    message = "date 2027-01-20 is after the day the form was received"
    problems = [IntakeError(message, Where("f.csv", n)) for n in (11, 12, 13, 14)] + [IntakeError("other", Where("f.csv", 12))]
    assert intake.condense(problems) == [
        "f.csv:11: date 2027-01-20 is after the day the form was received (and 3 more rows with "
        "the same problem, up to line 14)", "f.csv:12: other"]
    assert intake.condense(problems[:2]) == [str(p) for p in problems[:2]]
