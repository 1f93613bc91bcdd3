"""The host's homogeneity check and the shipping gate, attacked the way a careless coordinator,
a host in a hurry or a hostile file would: values that are no number or in another unit,
hostile workbooks and CSV files, mistyped and misplaced codes, a unit listed three times,
waivers that say nothing, a failing form replaced by a passing one, a deleted form before
verify, the ledger edited behind its guards, a path as round id, one laboratory's print while
the parcels are held, a study whose sigma_pt is the participants' own, and the statistics
against an independent one-way ANOVA.

Sources of the checks: s_x, s_w and s_s are checked against statsmodels' one-way ANOVA table
(``anova_lm``; for duplicates s_w² = MS_within and s_x² = MS_between / 2, so s_s² =
(MS_between - MS_within) / 2, ISO 13528 B.2 as METHODS §4 records it) and against scipy's
``f_oneway`` (F = MS_between / MS_within = 2 s_x² / s_w²). The criteria s_s <= 0.3 sigma_pt
and s_w < 0.5 sigma_pt are ISO 13528 B.2 as METHODS §4 records them.
"""

from __future__ import annotations

import json
import math
import time
import zipfile

import numpy as np
import pytest
from conftest import (LABS, ROUND, filled, homogeneity_filled, ledger_shell, plan_example_round,
                      receive, run_cli, write)
from hypothesis import given, settings
from hypothesis import strategies as st

from planner import codes, forms, homogeneity, plan, spec
from planner.errors import IntakeError
from planner.ledger import Ledger
from planner.stats import homogeneity as hom

INHOMOGENEOUS = "RE-MIX"


# --- helpers ---------------------------------------------------------------------

@pytest.fixture
def host_round(example_dir, clock, passphrase):
    """Round ROUND of the example planned with the fixed secret (host kal, decimal comma),
    no homogeneity form recorded yet."""
    plan_example_round(example_dir, ship=False)
    return example_dir


def _ok(runner, *args):
    result = run_cli(runner, *args)
    assert result.exit_code == 0, (args, result.stdout, result.stderr)
    return result


def _json(runner, study_dir, *args):
    return json.loads(_ok(runner, "homogeneity", study_dir, "--round", ROUND, *args,
                          "--json").stdout)


def _one_line(result, path=None) -> str:
    """Assert exit 2 and one line on stderr (naming ``path`` first); return the line."""
    assert result.exit_code == 2, (result.stdout, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in result.output, lines
    assert lines[0].startswith(f"error: {path}" if path else "error: "), lines[0]
    return lines[0]


def _material_of(study_dir, kind="homogeneity"):
    with Ledger.open(study_dir) as ledger:
        return homogeneity.checks_of(ledger, ROUND)[kind]


def _events(study_dir, kind):
    with Ledger.open(study_dir) as ledger:
        return ledger.events(ROUND, kind)


def _header(lines):
    return next(i for i, ln in enumerate(lines) if not ln.startswith("#"))


def _set(lines, row, column, text):
    """Return a copy of CSV form lines with data row ``row`` (0-based) of ``column`` set."""
    out = list(lines)
    head = _header(out)
    names = out[head].split(";")
    cells = out[head + 1 + row].split(";")
    cells[names.index(column)] = text
    out[head + 1 + row] = ";".join(cells)
    return out


def _rows(lines):
    """Return (line number, code, replicate) of each data row of CSV form lines."""
    head = _header(lines)
    return [(head + 2 + i, codes.compact(ln.split(";")[1]), int(ln.split(";")[2]))
            for i, ln in enumerate(lines[head + 1:])]


def _fill_with(lines, value_of):
    """Return form lines with every value replaced by value_of(code, replicate) (comma)."""
    out = list(lines)
    head = _header(out)
    for i, ln in enumerate(out[head + 1:], start=head + 1):
        cells = ln.split(";")
        v = value_of(codes.compact(cells[1]), int(cells[2]))
        if v is not None:
            cells[3] = repr(float(v)).replace(".", ",")
        out[i] = ";".join(cells)
    return out


def _nothing_recorded(study_dir):
    assert _events(study_dir, "homogeneity-form") == []
    assert not (plan.round_dir(study_dir, ROUND) / "host" / "checks").exists()
    return True


def _packing_held(runner, study_dir):
    """Return the line 'print --only packing' refuses with, after checking none was written."""
    result = run_cli(runner, "print", study_dir, "--round", ROUND, "--only", "packing")
    line = _one_line(result)
    folder = plan.round_dir(study_dir, ROUND)
    assert not any((folder / "labs" / lab / "packing-list.pdf").exists() for lab in LABS)
    return line


# --- values ----------------------------------------------------------------------

@pytest.mark.parametrize(("text", "fragment"), [
    ("nan", "'nan' is a marker"),
    ("inf", "'inf' is a marker"),
    ("1e400", "'1e400' is not a finite number"),
    ("1e200", "out of any plausible range"),
    ("-1e200", "out of any plausible range"),
    ("1_000", "'1_000' is not a number"),
    ("1.000,5", "thousands separators"),
    ("10 005", "thousands separators"),
    ("10.005", "has a decimal point, but this laboratory writes a decimal comma"),
    ("<0,5", "is a limit, not a result"),
    ("n.d.", "is a marker"),
    ("\u2013 10,5", "starts with a dash (U+2013), not a minus sign"),
    ("0x10", "is not a number"),
], ids=["nan", "inf", "1e400", "1e200", "-1e200", "underscore", "thousands", "grouped",
        "point", "limit", "marker", "en-dash", "hex"])
def test_a_value_that_is_no_usable_number_is_one_line_and_nothing_is_recorded(
        host_round, runner, tmp_path, text, fragment):
    # The same rules as the result forms (planner.intake): before this, 1e200 was read, its
    # square overflowed and every later command (status, print, evaluate) ended in a
    # traceback; '1_000' was read as 1000.
    lines = _set(homogeneity_filled(host_round), 0, "value", text)
    path = write(tmp_path, "h.csv", lines)
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, path),
                     f"{path}:{_rows(lines)[0][0]}: ")
    assert "column 'value' of " in line and fragment in line, line
    assert "convert" not in line and "float" not in line  # no Python words
    assert _nothing_recorded(host_round)


def test_a_unicode_minus_and_a_no_break_space_are_read(host_round, runner, tmp_path):
    lines = homogeneity_filled(host_round)
    lines = _set(lines, 0, "value", "\u221210,25")
    lines = _set(lines, 1, "value", "\u00a010,5\u00a0")
    _ok(runner, "homogeneity", host_round, "--round", ROUND, write(tmp_path, "h.csv", lines))
    rows = _rows(lines)
    with Ledger.open(host_round) as ledger:
        got = homogeneity.recorded(ledger, ROUND, "homogeneity")["values"]["value"]
    assert got[rows[0][1]][rows[0][2] - 1] == -10.25
    assert got[rows[1][1]][rows[1][2] - 1] == 10.5


def test_one_value_typed_in_another_unit_holds_the_parcels(host_round, runner, tmp_path):
    # One replicate 1000 times too large: s_w explodes, s_s is forced to 0 and the extended
    # criterion passes anything, so before the fix the gate opened on the typo itself.
    lines = homogeneity_filled(host_round)
    value = float(lines[_header(lines) + 1].split(";")[3].replace(",", "."))
    lines = _set(lines, 0, "value", f"{value * 1000:.1f}".replace(".", ","))
    line_no, code, _ = _rows(lines)[0]
    material = _material_of(host_round)[code]
    found = _json(runner, host_round, write(tmp_path, "h.csv", lines))
    entry = found["measurands"]["value"][material]
    assert entry["repeatability_ok"] is False and entry["s_w"] > 0.5 * entry["sigma_pt"]
    assert entry["widest_unit"] == codes.format(code)
    assert found["packing_lists"].startswith("held: the homogeneity check cannot tell")
    assert f"replicates differ most on unit {codes.format(code)}" in found["packing_lists"]
    line = _packing_held(runner, host_round)
    assert f"value/{material}: s_w = " in line and "mistyped value" in line
    status = " ".join(_ok(runner, "status", host_round, "--round", ROUND).stdout.split())
    assert "packing lists: held: the homogeneity check cannot tell" in status
    # the corrected form opens the gate; the report will say a first form was replaced
    fixed = _json(runner, host_round, write(tmp_path, "fixed.csv",
                                            homogeneity_filled(host_round)))
    assert fixed["packing_lists"] == "may be printed"
    assert fixed["replaced"][0]["file"] == "h.csv"
    assert fixed["replaced"][0]["not_passing"] == [
        f"value/{material}: s_w = {entry['s_w']:.3g} is not below 0.5 sigma_pt = "
        f"{0.5 * entry['sigma_pt']:.3g} (replicates differ most on unit {codes.format(code)})"]


def test_a_whole_unit_in_another_unit_fails_the_check(host_round, runner, tmp_path):
    lines = homogeneity_filled(host_round)
    rows = _rows(lines)
    code = rows[0][1]
    material = _material_of(host_round)[code]
    lines = _fill_with(lines, lambda c, r: 10005.0 if c == code else None)
    found = _json(runner, host_round, write(tmp_path, "h.csv", lines))
    assert found["measurands"]["value"][material]["verdict"] == "not sufficiently homogeneous"
    assert f"value/{material}: not sufficiently homogeneous" in _packing_held(runner, host_round)


def test_a_material_whose_values_are_all_zero_cannot_be_judged(host_round, runner, tmp_path):
    # sigma_pt is 5 % of the homogeneity mean: 0. Before the fix the verdict 'waited' (for a
    # sigma_pt that would never come from this policy) and the parcels could leave.
    material_of = _material_of(host_round)
    lines = _fill_with(homogeneity_filled(host_round),
                       lambda c, r: 0.0 if material_of[c] == "PP-FR" else None)
    found = _json(runner, host_round, write(tmp_path, "h.csv", lines))
    entry = found["measurands"]["value"]["PP-FR"]
    assert entry["verdict"] == "cannot be computed" and "is 0" in entry["why"]
    assert "value/PP-FR: cannot be computed" in _packing_held(runner, host_round)


def test_values_beyond_the_readers_range_in_the_ledger_give_no_traceback(host_round, runner):
    # Recorded by a library call that skipped the form reader: the statistics overflow, and
    # every command still answers in one line or a table.
    material_of = _material_of(host_round)
    values = {c: [1e200 * (i + 1), 1e200] for i, c in enumerate(material_of)}
    with Ledger.open(host_round) as ledger:
        homogeneity.record(ledger, ROUND, "homogeneity", {
            "values": {"value": values}, "remarks": {}, "sha256": "0" * 64, "file": "x.csv"})
    found = _json(runner, host_round)
    assert {e["verdict"] for e in found["measurands"]["value"].values()} == {
        "cannot be computed"}
    assert found["packing_lists"].startswith("held: the homogeneity check did not pass")
    _ok(runner, "status", host_round, "--round", ROUND)


@settings(max_examples=60)
@given(text=st.text(max_size=12))
def test_any_text_in_a_value_cell_is_read_or_refused_never_a_crash(tmp_path_factory, text):
    # Any cell: a number the statistics can take, or an IntakeError; never another exception.
    folder = tmp_path_factory.getbasetemp() / "fuzz-round"
    if not folder.exists():
        import shutil

        from conftest import EXAMPLE

        shutil.copytree(EXAMPLE, folder)
        plan_example_round(folder, ship=False)
    study = spec.load(folder)
    checks = _material_of(folder)
    lines = homogeneity_filled(folder)
    head = _header(lines)
    cells = lines[head + 1].split(";")
    cells[3] = text.replace(";", "").replace("\n", "").replace("\r", "").replace('"', "")
    lines[head + 1] = ";".join(cells)
    path = folder / "fuzz.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    try:
        data = homogeneity.read_values(study, ROUND, "homogeneity", checks, path)
    except IntakeError:
        return
    pairs = [p for p in data["values"]["value"].values() if None not in p]
    result = hom.homogeneity(pairs, 1.0)  # a value read is one the statistics can take
    assert all(math.isfinite(result[k]) for k in ("mean", "s_x", "s_w", "s_s"))


# --- hostile files through 'ringplan homogeneity' --------------------------------------

def _workbook(study_dir, tmp_path, name="h.xlsx"):
    """Fill the host's XLSX form with the values of homogeneity_filled; return its path and
    the row and column of the first value cell."""
    from openpyxl import load_workbook

    lines = homogeneity_filled(study_dir)
    wanted = {(c, r): float(ln.split(";")[3].replace(",", "."))
              for (_, c, r), ln in zip(_rows(lines), lines[_header(lines) + 1:])}
    book = load_workbook(plan.round_dir(study_dir, ROUND) / "host" / homogeneity.FORM_XLSX)
    sheet = book.worksheets[0]
    head = next(r for r in sheet.iter_rows() if r[0].value == "run")
    col = {c.value: c.column for c in head}
    for row in sheet.iter_rows(min_row=head[0].row + 1):
        key = (codes.compact(str(row[col["code"] - 1].value)),
               int(row[col["replicate"] - 1].value))
        sheet.cell(row[0].row, col["value"]).value = wanted[key]
    path = tmp_path / name
    book.save(path)
    return path, head[0].row + 1, col["value"]


def test_a_formula_in_a_value_cell_of_the_workbook_is_refused(host_round, runner, tmp_path):
    from openpyxl import load_workbook

    path, row, column = _workbook(host_round, tmp_path)
    _ok(runner, "homogeneity", host_round, "--round", ROUND, path, "--json")  # the good one
    book = load_workbook(path)
    book.worksheets[0].cell(row, column).value = "=10.001*1000"
    book.save(path)
    with Ledger.open(host_round) as ledger:
        before = len(ledger.events(ROUND, "homogeneity-form"))
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, path),
                     f"{path}: row {row}: ")
    assert "the cell in column 'value' holds a formula (=10.001*1000)" in line
    assert len(_events(host_round, "homogeneity-form")) == before


def _rezip(source, target, replace, *, level=6):
    with zipfile.ZipFile(source) as old, zipfile.ZipFile(
            target, "w", compression=zipfile.ZIP_DEFLATED, compresslevel=level) as new:
        for info in old.infolist():
            new.writestr(info.filename, replace.get(info.filename, old.read(info.filename)))


def test_a_workbook_that_unpacks_to_hundreds_of_mb_is_refused_quickly(host_round, runner,
                                                                       tmp_path):
    good, _, _ = _workbook(host_round, tmp_path)
    with zipfile.ZipFile(good) as z:
        part = next(n for n in z.namelist() if n.startswith("xl/worksheets/sheet"))
        xml = z.read(part)
    bomb = xml.replace(b"</sheetData>", b"<row/>" * (250_000_000 // 6) + b"</sheetData>")
    path = tmp_path / "inflating.xlsx"
    _rezip(good, path, {part: bomb}, level=9)
    assert path.stat().st_size < 2_000_000
    started = time.perf_counter()
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, path), path)
    assert time.perf_counter() - started < 10
    assert "would unpack to" in line and f"{forms.MAX_UNPACKED:,}" in line
    assert _nothing_recorded(host_round)


def test_a_workbook_declaring_xml_entities_is_refused(host_round, runner, tmp_path):
    good, _, _ = _workbook(host_round, tmp_path)
    with zipfile.ZipFile(good) as z:
        part = next(n for n in z.namelist() if n.startswith("xl/worksheets/sheet"))
        xml = z.read(part).decode("utf-8")
    lol = ['<!ENTITY a0 "lol">'] + [f'<!ENTITY a{i} "{("&a" + str(i - 1) + ";") * 10}">'
                                    for i in range(1, 10)]
    head, _, body = xml.partition("?>")
    path = tmp_path / "laughs.xlsx"
    _rezip(good, path, {part: f'{head}?><!DOCTYPE worksheet [{"".join(lol)}]>{body}'.encode()})
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, path), path)
    assert "declares XML entities" in line
    assert _nothing_recorded(host_round)


def test_a_file_larger_than_any_form_and_a_csv_of_too_many_lines(host_round, runner, tmp_path):
    huge = tmp_path / "huge.csv"
    with open(huge, "wb") as out:  # sparse: the size is on record, the disk stays empty
        out.truncate(forms.MAX_BYTES + 1)
    assert "more than a form of ringplan can be" in _one_line(
        run_cli(runner, "homogeneity", host_round, "--round", ROUND, huge), huge)
    long = write(tmp_path, "long.csv", homogeneity_filled(host_round)
                 + ["# padding"] * forms.MAX_ROWS)
    assert "more than a form of ringplan can have" in _one_line(
        run_cli(runner, "homogeneity", host_round, "--round", ROUND, long), long)
    # and as the stability form
    assert "more than a form of ringplan can have" in _one_line(
        run_cli(runner, "homogeneity", host_round, "--round", ROUND, "--stability", long), long)
    assert _nothing_recorded(host_round) and _events(host_round, "stability-form") == []


# --- codes and rows --------------------------------------------------------------

def test_a_unit_listed_three_times_is_refused(host_round, runner, tmp_path):
    lines = homogeneity_filled(host_round)
    head = _header(lines)
    first = lines[head + 1]
    again = write(tmp_path, "again.csv", lines + [first])
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, again),
                     f"{again}:{len(lines) + 1}: ")
    code = codes.format(_rows(lines)[0][1])
    assert f"{code} replicate {_rows(lines)[0][2]} is given twice; keep one" in line
    cells = first.split(";")
    cells[2] = "3"
    third = write(tmp_path, "third.csv", lines + [";".join(cells)])
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND, third),
                     f"{third}:{len(lines) + 1}: ")
    assert f"replicate '3' of {code} is not 1 to 2" in line
    assert _nothing_recorded(host_round)


def test_a_code_mistyped_by_one_character_names_the_check_character(host_round, runner,
                                                                    tmp_path):
    lines = homogeneity_filled(host_round)
    line_no, code, _ = _rows(lines)[0]
    shown = codes.format(code)
    other = next(ch for ch in "23456789" if ch != shown[2])
    typo = shown[:2] + other + shown[3:]
    swapped = shown[:1] + shown[2] + shown[1] + shown[3:]
    for wrong in (typo, swapped) if shown[1] != shown[2] else (typo,):
        path = write(tmp_path, "typo.csv", _set(lines, 0, "code", wrong))
        result = run_cli(runner, "homogeneity", host_round, "--round", ROUND, path)
        assert result.exit_code == 2
        first = result.stderr.strip().splitlines()[0]
        assert first == (f"error: {path}:{line_no}: check character does not match in "
                         f"{wrong!r}: a character was mistyped or two were swapped; copy the "
                         "code from the homogeneity form")
    assert _nothing_recorded(host_round)


def test_a_value_without_a_code_is_not_skipped(host_round, runner, tmp_path):
    lines = homogeneity_filled(host_round)
    path = write(tmp_path, "nocode.csv", lines + ["61;;1;10,002;"])
    result = run_cli(runner, "homogeneity", host_round, "--round", ROUND, path)
    assert result.exit_code == 2
    assert f"{path}:{len(lines) + 1}: the row has a value but no code" in result.stderr
    assert _nothing_recorded(host_round)


def test_each_form_only_as_its_own_kind(host_round, runner, tmp_path):
    # The stability form as the homogeneity form is refused (test_homogeneity_cli); here the
    # reverse: the homogeneity form given with --stability.
    path = write(tmp_path, "h.csv", homogeneity_filled(host_round))
    result = run_cli(runner, "homogeneity", host_round, "--round", ROUND, "--stability", path)
    assert result.exit_code == 2 and "is not a stability unit of this round" in result.stderr
    assert _events(host_round, "stability-form") == []


# --- the waiver --------------------------------------------------------------------

@pytest.mark.parametrize("reason", [" " * 10, "." * 12, "1234567890 12", "\t\n  \u00a0  x",
                                    "shipped as it is\x1b[2J"],
                         ids=["spaces", "dots", "digits", "blank-ish", "escape"])
def test_a_waiver_that_says_nothing_is_refused(host_round, runner, reason):
    line = _one_line(run_cli(runner, "homogeneity", host_round, "--round", ROUND,
                             "--waive", reason))
    assert line == ("error: --waive: give the reason for waiving the homogeneity check in a "
                    "sentence (it is printed in the report)")
    assert _events(host_round, "homogeneity-waived") == []
    _packing_held(runner, host_round)


def test_a_waiver_is_kept_on_one_line(host_round, runner):
    _ok(runner, "homogeneity", host_round, "--round", ROUND, "--waive",
        "  the host's balance\nis broken;   shipped unchecked  ")
    assert _events(host_round, "homogeneity-waived")[0].detail["reason"] == (
        "the host's balance is broken; shipped unchecked")


def test_a_waiver_before_anything_was_recorded_opens_the_gate_and_the_report_says_when(
        host_round, runner, tmp_path, clock):
    from planner.render import report

    _ok(runner, "homogeneity", host_round, "--round", ROUND, "--waive",
        "the host's instrument is in repair; shipped unchecked")
    _ok(runner, "print", host_round, "--round", ROUND, "--only", "packing")
    clock["now"] = "2027-01-31T09:00:00+00:00"
    # the host measures later, and the check fails: the report says all of it
    _ok(runner, "homogeneity", host_round, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(host_round, off={INHOMOGENEOUS: 1.0})))
    study = spec.load(host_round)
    with Ledger.open(host_round) as ledger:
        found = homogeneity.assess(study, homogeneity.checks_of(ledger, ROUND), ledger, ROUND)
    assert found["after_shipping"] and found["waiver"]["before_any_form"]
    assert not found["waiver"]["after_shipping"]
    text = " ".join(report.items_lines({"homogeneity": found}))
    assert ("The homogeneity check was recorded after the first packing lists were printed"
            in text)
    assert ("waived the homogeneity check before shipping, before any homogeneity form was "
            "recorded" in text)
    assert f"not sufficiently homogeneous: value/{INHOMOGENEOUS}." in text


# --- a failing form replaced by a passing one ---------------------------------------

def _whole_round(runner, study_dir, tmp_path, labs=LABS):
    _ok(runner, "print", study_dir, "--round", ROUND)
    forms_ = [write(tmp_path, f"{lab}.csv", filled(study_dir, lab)) for lab in labs]
    assert receive(runner, study_dir, *forms_).exit_code == 0
    _ok(runner, "unseal", study_dir, "--round", ROUND)
    _ok(runner, "evaluate", study_dir, "--round", ROUND)
    folder = plan.round_dir(study_dir, ROUND) / "report"
    from tests.render.conftest import pdf_text

    stats = json.loads((folder / "statistics.json").read_text(encoding="utf-8"))
    return stats, " ".join(" ".join(pdf_text(folder / "report.pdf")).split())


def test_a_failing_form_replaced_by_a_passing_one_is_told_in_the_report(host_round, runner,
                                                                        tmp_path, clock):
    # A host may measure again until the batch passes; the gate takes the newest form, the
    # report names the one it replaced and what it found, so the reader can judge.
    failing = _json(runner, host_round, write(tmp_path, "first.csv", homogeneity_filled(
        host_round, off={INHOMOGENEOUS: 1.0})))
    assert failing["packing_lists"].startswith("held")
    clock["now"] = "2027-01-30T11:00:00+00:00"
    passing = _json(runner, host_round, write(tmp_path, "second.csv",
                                              homogeneity_filled(host_round)))
    assert passing["packing_lists"] == "may be printed"
    assert passing["replaced"] == [{
        "file": "first.csv", "sha256": failing["sha256"], "at": "2027-01-30T09:00:00+00:00",
        "not_passing": [f"value/{INHOMOGENEOUS}: not sufficiently homogeneous"]}]
    shown = " ".join(_ok(runner, "homogeneity", host_round, "--round", ROUND).stdout.split())
    assert (f"replaced: the form first.csv recorded on 2027-01-30T09:00:00+00:00 (did not "
            f"pass: value/{INHOMOGENEOUS}: not sufficiently homogeneous)") in shown
    stats, text = _whole_round(runner, host_round, tmp_path)
    assert stats["homogeneity"]["replaced"][0]["file"] == "first.csv"
    assert stats["homogeneity"]["widened"] == {}
    assert ("An earlier homogeneity form (first.csv, recorded 2027-01-30 09:00 UTC) was "
            "replaced by a later one, whose figures are shown; on the earlier form "
            f"value/{INHOMOGENEOUS}: not sufficiently homogeneous.") in text
    assert "recorded after the first packing lists" not in text


# --- verify and the ledger -----------------------------------------------------------

def test_verify_says_when_the_host_form_is_gone_or_the_recorded_form_changed(
        host_round, runner, tmp_path):
    _ok(runner, "homogeneity", host_round, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(host_round)))
    _ok(runner, "print", host_round, "--round", ROUND)
    forms_ = [write(tmp_path, f"{lab}.csv", filled(host_round, lab)) for lab in LABS]
    assert receive(runner, host_round, *forms_).exit_code == 0
    _ok(runner, "unseal", host_round, "--round", ROUND)
    _ok(runner, "verify", host_round, "--round", ROUND)
    folder = plan.round_dir(host_round, ROUND)
    blank = folder / "host" / homogeneity.FORM_CSV
    kept = blank.read_bytes()
    blank.unlink()
    result = run_cli(runner, "verify", host_round, "--round", ROUND)
    assert result.exit_code == 1
    assert ("host/homogeneity-form.csv: missing, so the host's measuring order cannot be "
            "compared with the one the round secret draws") in result.stderr
    blank.write_bytes(kept)
    _ok(runner, "verify", host_round, "--round", ROUND)
    # the filled form kept under host/checks, renumbered after it was recorded
    stored = next((folder / "host" / "checks").iterdir())
    lines = stored.read_text(encoding="utf-8").splitlines()
    head = _header(lines)
    body = sorted(lines[head + 1:], key=lambda ln: ln.split(";")[1:3])
    body = [";".join([str(i), *ln.split(";")[1:]]) for i, ln in enumerate(body, start=1)]
    stored.write_text("\n".join(lines[:head + 1] + body) + "\n", encoding="utf-8")
    result = run_cli(runner, "verify", host_round, "--round", ROUND)
    assert result.exit_code == 1
    assert (f"host/checks/{stored.name}: the homogeneity form recorded on "
            "2027-01-30T09:00:00+00:00 is missing or is not the file the ledger recorded"
            in result.stderr)


@pytest.mark.parametrize("statement", [
    # the failing form made to pass: RE-MIX's values set to one number
    "UPDATE events SET detail = json_set(detail, '$.values.value', json('{}')) "
    "WHERE kind = 'homogeneity-form'",
    # the failing form removed, so that no check is on record
    "DELETE FROM events WHERE kind = 'homogeneity-form'",
    # a waiver nobody gave
    "INSERT INTO events (round, kind, at, detail) VALUES ('2027-1', 'homogeneity-waived', "
    "'2027-01-30T10:00:00+00:00', '{\"reason\": \"the batch is fine, trust me\"}')",
], ids=["values-changed", "form-deleted", "waiver-inserted"])
def test_the_check_changed_in_the_ledger_behind_its_guards_is_refused(host_round, runner,
                                                                      tmp_path, statement):
    _ok(runner, "homogeneity", host_round, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(host_round, off={INHOMOGENEOUS: 1.0})))
    ledger_shell(host_round, statement)
    for args in (("status",), ("print", "--only", "packing"), ("homogeneity",)):
        line = _one_line(run_cli(runner, *args, host_round, "--round", ROUND))
        assert "ledger" in line, line
    assert not (plan.round_dir(host_round, ROUND) / "labs" / "tor" / "packing-list.pdf").exists()


# --- options and rounds --------------------------------------------------------------

@pytest.mark.parametrize("round_id", ["../x", "a/b", ""])
def test_a_path_as_round_id_is_refused_before_anything_is_opened(example_dir, runner,
                                                                 round_id):
    line = _one_line(run_cli(runner, "homogeneity", example_dir, "--round", round_id,
                             "--waive", "a sentence long enough to be a reason"))
    assert f"--round {round_id!r} is not a usable round id" in line
    assert not (example_dir / "ledger.sqlite").exists()


def test_a_round_with_retained_units_only_takes_a_stability_form(example_dir, runner,
                                                                 tmp_path, clock, passphrase):
    spec_file = example_dir / "study.yaml"
    spec_file.write_text(spec_file.read_text(encoding="utf-8").replace(
        "homogeneity_units: 10", "homogeneity_units: 0"), encoding="utf-8")
    plan_example_round(example_dir, ship=False)
    host = plan.round_dir(example_dir, ROUND) / "host"
    assert not (host / homogeneity.FORM_CSV).exists() and (host / homogeneity.STABILITY_CSV
                                                           ).is_file()
    stab = write(tmp_path, "s.csv", homogeneity_filled(example_dir, kind="stability"))
    line = _one_line(run_cli(runner, "homogeneity", example_dir, "--round", ROUND, stab),
                     f"{stab}: ")
    assert "has no homogeneity units; there is no homogeneity form to record" in line
    _ok(runner, "print", example_dir, "--round", ROUND, "--only", "packing")  # no gate
    found = _json(runner, example_dir, "--stability", stab)
    assert found["recorded"] is False and found["packing_lists"] == "may be printed"
    assert len(_events(example_dir, "stability-form")) == 1


def test_one_laboratorys_print_while_held_leaves_out_its_packing_list(host_round, runner,
                                                                     tmp_path):
    folder = plan.round_dir(host_round, ROUND)
    result = _ok(runner, "print", host_round, "--round", ROUND, "--lab", "tor")
    assert "held back: the packing lists" in result.stdout
    assert (folder / "labs" / "tor" / "run-sheet.pdf").is_file()
    assert not any((folder / "labs" / lab / "packing-list.pdf").exists() for lab in LABS)
    printed = _events(host_round, "printed")
    assert printed and not any(str(d).endswith("packing-list.pdf")
                               for e in printed for d in e.detail["documents"])
    _packing_held(runner, host_round)
    _ok(runner, "homogeneity", host_round, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(host_round)))
    _ok(runner, "print", host_round, "--round", ROUND, "--only", "packing", "--lab", "tor")
    assert [lab for lab in LABS if (folder / "labs" / lab / "packing-list.pdf").exists()] == [
        "tor"]


# --- which sigma_pt judges the check ----------------------------------------------------

def _participants_sigma(study_dir):
    spec_file = study_dir / "study.yaml"
    spec_file.write_text(spec_file.read_text(encoding="utf-8").replace(
        "sigma_pt: {percent: 5}", "sigma_pt: participants"), encoding="utf-8")


def test_a_failing_check_by_the_previous_rounds_sigma_pt_holds_the_parcels(
        example_dir, runner, tmp_path, clock, passphrase):
    # The command showed FAILS with the previous round's sigma_pt, but the gate (print,
    # status) judged without it, saw 'waits' and let the packing lists out.
    _participants_sigma(example_dir)
    plan_example_round(example_dir, "2026-9", ship=False)
    report = plan.round_dir(example_dir, "2026-9") / "report"
    report.mkdir()
    (report / "statistics.json").write_text(json.dumps({"measurands": {"value": {
        "scores": {"PP-H12": {"sigma_pt": 0.42}}}}}), encoding="utf-8")
    plan_example_round(example_dir, ROUND, host="tor", ship=False)
    found = _json(runner, example_dir, write(tmp_path, "h.csv", homogeneity_filled(
        example_dir, off={"PP-H12": 1.0})))
    entry = found["measurands"]["value"]["PP-H12"]
    assert entry["sigma_pt"] == 0.42 and entry["verdict"] == "not sufficiently homogeneous"
    assert found["measurands"]["value"]["PP-C8"]["verdict"] == "waits"
    assert found["packing_lists"].startswith("held: the homogeneity check did not pass "
                                             "(value/PP-H12: not sufficiently homogeneous)")
    assert "value/PP-H12: not sufficiently homogeneous" in _packing_held(runner, example_dir)
    status = " ".join(_ok(runner, "status", example_dir, "--round", ROUND).stdout.split())
    assert "not sufficiently homogeneous: value/PP-H12" in status
    assert "packing lists: held: the homogeneity check did not pass" in status


def _more_labs(study_dir, n=3):
    """Add n participants (decimal comma), so that the participants' robust SD can serve as
    sigma_pt (8 laboratories at least, the example's own comment)."""
    spec_file = study_dir / "study.yaml"
    extra = "".join(
        f"  - id: xl{i}\n    name: Extra Laboratory {i}\n    address: [Street {i}, Town]\n"
        f"    contact: {{name: Person {i}, email: p{i}@lab.example}}\n    country: SE\n"
        "    can_host: false\n    decimal: comma\n    transit_days: 1\n" for i in range(n))
    text = spec_file.read_text(encoding="utf-8")
    spec_file.write_text(text.replace("\nmaterials:\n", extra + "\nmaterials:\n"),
                         encoding="utf-8")
    return [f"xl{i}" for i in range(n)]


def test_with_the_participants_sigma_pt_the_parcels_leave_and_evaluation_judges(
        example_dir, runner, tmp_path, clock, passphrase):
    _participants_sigma(example_dir)
    labs = [*LABS, *_more_labs(example_dir)]
    plan_example_round(example_dir, ship=False)
    found = _json(runner, example_dir, write(tmp_path, "h.csv", homogeneity_filled(
        example_dir, off={INHOMOGENEOUS: 20.0})))
    assert {e["verdict"] for e in found["measurands"]["value"].values()} == {"waits"}
    assert found["packing_lists"] == "may be printed"  # the data is on record: it may ship
    stats, text = _whole_round(runner, example_dir, tmp_path, labs)
    checked = stats["homogeneity"]["measurands"]["value"]
    for material, entry in checked.items():
        sigma = stats["measurands"]["value"]["scores"][material]
        assert entry["judged_at_evaluation"] is True
        assert entry["sigma_pt_source"] == "the round's sigma_pt (given at evaluation)"
        # widened or not, the check is judged with the robust SD before any widening
        assert entry["sigma_pt"] == pytest.approx(sigma["robust_sd"], rel=1e-9)
        assert entry["passes"] == (entry["s_s"] <= 0.3 * entry["sigma_pt"])
    assert checked[INHOMOGENEOUS]["verdict"] == "not sufficiently homogeneous"
    assert INHOMOGENEOUS in stats["homogeneity"]["widened"]["value"]
    assert ("its verdict was given at evaluation with the round's own sigma_pt" in text)
    assert f"not sufficiently homogeneous: value/{INHOMOGENEOUS}." in text


def test_with_too_few_laboratories_for_a_sigma_pt_the_report_claims_no_pass(
        example_dir, runner, tmp_path, clock, passphrase):
    # Five laboratories give no sigma_pt of their own: the verdicts wait for ever. Before the
    # fix the report said 'every material passes' and 'every material checked is stable'.
    _participants_sigma(example_dir)
    plan_example_round(example_dir, ship=False)
    _ok(runner, "homogeneity", example_dir, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(example_dir, off={INHOMOGENEOUS: 20.0})))
    _ok(runner, "print", example_dir, "--round", ROUND)
    forms_ = [write(tmp_path, f"{lab}.csv", filled(example_dir, lab)) for lab in LABS]
    assert receive(runner, example_dir, *forms_).exit_code == 0
    _ok(runner, "homogeneity", example_dir, "--round", ROUND, "--stability",
        write(tmp_path, "s.csv", homogeneity_filled(example_dir, kind="stability")))
    _ok(runner, "unseal", example_dir, "--round", ROUND)
    _ok(runner, "evaluate", example_dir, "--round", ROUND)
    from tests.render.conftest import pdf_text

    text = " ".join(" ".join(pdf_text(plan.round_dir(example_dir, ROUND) / "report"
                                      / "report.pdf")).split())
    assert "every material passes" not in text and "every material checked is stable" \
        not in text
    every = ", ".join(f"value/{m.id}" for m in spec.load(example_dir).materials)
    assert f"Homogeneity: no verdict, as no sigma_pt was known even at evaluation: {every}." \
        in text
    assert f"Stability: no verdict, as no sigma_pt was known: {every}." in text


# --- the statistics against an independent one-way ANOVA ----------------------------------

def _statsmodels_anova(pairs):
    """(s_x, s_w, s_s) of duplicates from statsmodels' one-way ANOVA table: s_w² =
    MS_within, s_x² = MS_between / 2, s_s² = max(0, MS_between - MS_within) / 2."""
    import pandas as pd
    from statsmodels.formula.api import ols
    from statsmodels.stats.anova import anova_lm

    x = np.asarray(pairs, dtype=float)
    frame = pd.DataFrame({"unit": np.repeat(np.arange(len(x)), 2).astype(str),
                          "y": x.ravel()})
    table = anova_lm(ols("y ~ C(unit)", data=frame).fit())
    ms_b, ms_w = table["mean_sq"].iloc[0], table["mean_sq"].iloc[1]
    return math.sqrt(ms_b / 2), math.sqrt(ms_w), math.sqrt(max(0.0, ms_b - ms_w) / 2)


# Invented duplicates, each set written out by hand for one situation.
CASES = {
    # clear between-unit differences, g = 10
    "between": [(10.1, 10.2), (10.6, 10.5), (9.8, 9.9), (10.3, 10.3), (10.9, 11.0),
                (10.0, 10.2), (9.6, 9.7), (10.4, 10.2), (10.7, 10.8), (10.2, 10.1)],
    # s_x² < s_w²/2: the unit means agree better than the duplicates do (s_s forced to 0)
    "forced-zero": [(10.0, 10.8), (10.7, 10.1), (9.9, 10.9), (10.8, 10.0), (10.2, 10.6),
                    (10.9, 9.9), (10.1, 10.7), (10.6, 10.2), (10.0, 10.8), (10.5, 10.3),
                    (10.3, 10.5), (10.8, 10.0)],
    # negative values far from zero, g = 7
    "negative": [(-250.31, -250.35), (-250.12, -250.18), (-250.44, -250.40),
                 (-250.27, -250.21), (-250.33, -250.36), (-250.05, -250.09),
                 (-250.38, -250.30)],
    # a large offset with small differences: no cancellation in the sums of squares
    "offset": [(1e6 + 0.013, 1e6 + 0.011), (1e6 + 0.018, 1e6 + 0.021),
               (1e6 + 0.007, 1e6 + 0.009), (1e6 + 0.015, 1e6 + 0.012),
               (1e6 + 0.010, 1e6 + 0.014), (1e6 + 0.020, 1e6 + 0.017),
               (1e6 + 0.009, 1e6 + 0.006), (1e6 + 0.016, 1e6 + 0.016),
               (1e6 + 0.012, 1e6 + 0.010), (1e6 + 0.011, 1e6 + 0.015)],
}


@pytest.mark.parametrize("name", list(CASES))
def test_sx_sw_ss_match_statsmodels_and_scipy(name):
    from scipy.stats import f_oneway

    pairs = CASES[name]
    got = hom.homogeneity([list(p) for p in pairs], sigma_pt=1.0)
    s_x, s_w, s_s = _statsmodels_anova(pairs)
    rel = 1e-6 if name == "offset" else 1e-10  # statsmodels' least squares at 1e6
    assert got["s_x"] == pytest.approx(s_x, rel=rel)
    assert got["s_w"] == pytest.approx(s_w, rel=rel)
    assert got["s_s"] == pytest.approx(s_s, rel=rel, abs=1e-12)
    # scipy's F of the same one-way layout: F = MS_between / MS_within = 2 s_x² / s_w²
    f = f_oneway(*[np.asarray(p, dtype=float) for p in pairs]).statistic
    assert 2 * got["s_x"] ** 2 / got["s_w"] ** 2 == pytest.approx(f, rel=rel)
    assert got["s_s_forced_zero"] == (f < 1.0)
    if name == "forced-zero":
        assert got["s_x"] ** 2 < got["s_w"] ** 2 / 2 and got["s_s"] == 0.0
        assert got["verdict"] == "sufficiently homogeneous"


def test_the_figures_through_the_form_match_statsmodels(host_round, runner, tmp_path):
    # The invented pairs typed into the host's form for two materials, end to end: what the
    # command prints in JSON is what the ANOVA gives for exactly those values.
    material_of = _material_of(host_round)
    chosen = {"PP-C8": CASES["between"], "PP-FR": CASES["forced-zero"][:10]}
    pair_of = {}
    for material, pairs in chosen.items():
        units = sorted(c for c, m in material_of.items() if m == material)
        pair_of.update(dict(zip(units, pairs)))
    lines = _fill_with(homogeneity_filled(host_round),
                       lambda c, r: pair_of[c][r - 1] if c in pair_of else None)
    found = _json(runner, host_round, write(tmp_path, "h.csv", lines))
    for material, pairs in chosen.items():
        entry = found["measurands"]["value"][material]
        s_x, s_w, s_s = _statsmodels_anova(pairs)
        assert (entry["s_x"], entry["s_w"], entry["s_s"]) == pytest.approx(
            (s_x, s_w, s_s), rel=1e-10, abs=1e-12)
        assert entry["mean"] == pytest.approx(np.mean(pairs), rel=1e-14)
        sigma = 0.05 * entry["mean"]  # the example's policy: 5 % of the homogeneity mean
        assert entry["sigma_pt"] == pytest.approx(sigma, rel=1e-12)
        assert entry["passes"] == (s_s <= 0.3 * sigma)
    assert found["measurands"]["value"]["PP-FR"]["s_s_forced_zero"] is True
    # 'between': s_s is about 0.39 against 0.3 sigma_pt of about 0.155: it fails
    assert found["measurands"]["value"]["PP-C8"]["verdict"] == "not sufficiently homogeneous"


@settings(max_examples=80)
@given(st.lists(st.tuples(st.floats(-1e3, 1e3), st.floats(-1e3, 1e3)), min_size=2,
                max_size=25))
def test_sx_sw_ss_match_a_numpy_anova_for_any_duplicates(pairs):
    x = np.asarray(pairs, dtype=float)
    g = len(x)
    ms_b = 2 * np.sum((x.mean(axis=1) - x.mean()) ** 2) / (g - 1)
    ms_w = np.sum((x - x.mean(axis=1, keepdims=True)) ** 2) / g
    got = hom.homogeneity([list(p) for p in pairs], sigma_pt=1.0)
    scale = max(1.0, float(np.abs(x).max()))
    assert got["s_x"] == pytest.approx(math.sqrt(ms_b / 2), rel=1e-9, abs=1e-12 * scale)
    assert got["s_w"] == pytest.approx(math.sqrt(ms_w), rel=1e-9, abs=1e-12 * scale)
    assert got["s_s"] == pytest.approx(math.sqrt(max(0.0, ms_b - ms_w) / 2), rel=1e-6,
                                       abs=1e-6 * scale)
