"""The XLSX result form mirrors the planner's CSV; read back with openpyxl."""

from __future__ import annotations

import csv
import io

from planner.render import result_form


def _csv_parts(text):
    from planner.plan import FORM_IDENTITY

    identity = [line[2:].split(": ", 1) for line in text.splitlines()
                if line.startswith("# ") and line[2:].split(": ")[0] in FORM_IDENTITY]
    body = [line for line in text.splitlines() if line and not line.startswith("#")]
    delimiter = ";" if ";" in body[0] else ","
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=delimiter))
    return identity, rows[0], rows[1:], delimiter


def _sheet(printed, lab):
    from openpyxl import load_workbook

    book = load_workbook(printed.folder / "labs" / lab / "result-form.xlsx")
    return book[result_form.SHEET]


def test_xlsx_holds_the_csv_identity_header_and_rows(printed):
    for lab in printed.manifest["labs"]:
        text = (printed.folder / "labs" / lab / "result-form.csv").read_text(encoding="utf-8")
        identity, header, rows, _ = _csv_parts(text)
        sheet = _sheet(printed, lab)
        values = [[c.value for c in row] for row in sheet.iter_rows()]
        assert [v[:2] for v in values[:len(identity)]] == [list(p) for p in identity]
        at = next(i for i, v in enumerate(values) if v[:len(header)] == header)
        got = values[at + 1:]
        assert len(got) == len(rows)
        for mine, theirs in zip(got, rows, strict=True):
            assert [str(mine[0]), str(mine[1]), mine[2]] == theirs[:3]
            assert all(v is None for v in mine[3:8])


def test_csv_follows_the_laboratory_decimal_convention(printed):
    # study.yaml: crx writes a decimal point, kal a decimal comma (';' separates fields then)
    for lab, delimiter in (("crx", ","), ("kal", ";")):
        text = (printed.folder / "labs" / lab / "result-form.csv").read_text(encoding="utf-8")
        identity, _, _, found = _csv_parts(text)
        assert found == delimiter
        assert dict(identity)["decimal"] == printed.study.lab(lab).decimal


def test_value_column_accepts_numbers_only_and_prefilled_cells_are_locked(printed):
    sheet = _sheet(printed, "tor")
    assert sheet.protection.sheet
    header_row = next(r for r in sheet.iter_rows() if r[0].value == "trial")[0].row
    column = {c.value: c.column_letter for c in sheet[header_row]}
    first = header_row + 1
    checks = {str(dv.sqref): dv for dv in sheet.data_validations.dataValidation}
    value = next(dv for ref, dv in checks.items() if ref.startswith(column["value"]))
    assert value.type == "decimal" and value.showErrorMessage
    assert next(dv for ref, dv in checks.items()
                if ref.startswith(column["uncertainty"])).type == "decimal"
    assert next(dv for ref, dv in checks.items() if ref.startswith(column["date"])).type == "date"
    assert f"{column['value']}{first}" in value.sqref
    assert sheet[f"{column['code']}{first}"].protection.locked
    assert sheet[f"{column['trial']}{first}"].protection.locked
    assert sheet["B1"].protection.locked
    for name in ("value", "uncertainty", "date", "analyst", "remarks"):
        assert not sheet[f"{column[name]}{first}"].protection.locked, name


def test_read_csv_takes_either_separator():
    text = "# study: s\n# round: r\n# a note, with comma\ntrial;position;code\n1;2;ABCD-EFGHJ\n"
    identity, notes, header, rows = result_form.read_csv(text)
    assert identity == [("study", "s"), ("round", "r")]
    assert notes == ["a note, with comma"]
    assert header == ["trial", "position", "code"] and rows == [["1", "2", "ABCD-EFGHJ"]]
