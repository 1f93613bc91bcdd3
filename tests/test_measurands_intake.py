"""Several measurands per round, from planning to intake: the forms (CSV and XLSX, both decimal
conventions, the laboratory's language) have a column per measurand and n/a where one is not
measured; receive records every value, or refuses a form with one located line.

The study is the example with three measurands: mfr (every material, uncertainty optional),
density (every material, uncertainty required) and ash (two materials only, no uncertainty).
Which unit holds which material is read from the planned round (``RoundPlan.units``), never
from the forms.
"""

from __future__ import annotations

import json
import re
import shutil

import pytest
from conftest import EXAMPLE, ROUND, plan_example_round, run_cli

from planner import codes, forms, language, plan, spec
from planner.ledger import Ledger

MEASURANDS = """measurands:
  - id: mfr
    name: melt mass-flow rate, 190 °C / 2.16 kg
    unit: g/10 min
    resolution: 0.01
    method: ISO 1133-1, procedure A
    evaluation:
      sigma_pt: {percent: 5}
  - id: density
    name: density, immersion method
    unit: g/cm3
    uncertainty: required
    evaluation:
      sigma_pt: 0.002
  - id: ash
    name: ash content, 600 °C
    unit: "%"
    materials: [RE-MIX, PP-FR]
    uncertainty: none
"""
ASHY = {"RE-MIX", "PP-FR"}
COLUMNS = ["trial", "position", "code", "mfr", "mfr uncertainty", "density",
           "density uncertainty", "ash", "date", "analyst", "remarks"]
DE = language.texts("de")


def several(text: str, block: str = MEASURANDS) -> str:
    """Turn the example's study.yaml into one with ``block``: study.measurand, study.unit and
    the evaluation section go, the measurands come before the laboratories."""
    text = re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", text)
    text = re.sub(r"\nevaluation:\n(  .*\n|\s*\n)*", "\n", text)
    return text.replace("\nlaboratories:", "\n" + block + "\nlaboratories:")


@pytest.fixture
def multi_dir(tmp_path):
    target = tmp_path / "norrvik-three"
    shutil.copytree(EXAMPLE, target)
    path = target / "study.yaml"
    path.write_text(several(path.read_text(encoding="utf-8")), encoding="utf-8")
    return target


@pytest.fixture
def multi(multi_dir, clock):
    """The three-measurand study with round ROUND planned (host kal): (folder, RoundPlan)."""
    return multi_dir, plan_example_round(multi_dir)


def material_of(round_plan):
    return {u.code: u.material for u in round_plan.units}


def form_lines(study_dir, lab):
    path = plan.round_dir(study_dir, ROUND) / "labs" / lab / "result-form.csv"
    return path.read_text(encoding="utf-8").splitlines()


def sep_of(lab):
    return "," if lab == "crx" else ";"


def number(x, lab):
    text = f"{x:.4f}"
    return text if lab == "crx" else text.replace(".", ",")


def fill(study_dir, lab, *, mfr=True, density=True, ash=True):
    """Return (lines, expected) of a laboratory's form with every open cell filled in;
    ``expected`` is code -> {measurand: (value, uncertainty)} as written."""
    lines = form_lines(study_dir, lab)
    sep = sep_of(lab)
    header = lines.index(sep.join(COLUMNS))
    expected = {}
    for n, i in enumerate(range(header + 1, len(lines)), start=1):
        cells = lines[i].split(sep)
        code = codes.compact(cells[2])
        got = {}
        if mfr:
            got["mfr"] = (10 + n / 8, 0.25 if n % 2 else None)
        if density:
            got["density"] = (0.9 + n / 1024, 0.0025)
        if ash and cells[7] != "n/a":
            got["ash"] = (1 + n / 16, None)
        for m, (v, u) in got.items():
            at = COLUMNS.index(m)
            cells[at] = number(v, lab)
            if u is not None:
                cells[at + 1] = number(u, lab)
        cells[8], cells[9] = "2027-01-25", "A. Analyst"
        lines[i] = sep.join(cells)
        expected[code] = got
    return lines, expected


def first_row(lines, lab):
    return lines.index(sep_of(lab).join(COLUMNS)) + 2  # 1-based line of the first data row


def edit(lines, line, column, text, lab):
    sep = sep_of(lab)
    cells = lines[line - 1].split(sep)
    cells[COLUMNS.index(column)] = text
    lines[line - 1] = sep.join(cells)


def cell(lines, line, column, lab):
    return lines[line - 1].split(sep_of(lab))[COLUMNS.index(column)]


def write(tmp_path, name, lines):
    path = tmp_path / name
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def receive(runner, study_dir, *paths):
    return run_cli(runner, "receive", study_dir, "--round", ROUND, *paths)


def recorded(study_dir):
    with Ledger.open(study_dir) as ledger:
        return ledger.submissions(ROUND)


def one_error(result, path, line=None):
    assert result.exit_code == 2, (result.stdout, result.stderr)
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1, lines
    prefix = f"error: {path}:{line}: " if line is not None else f"error: {path}: "
    assert lines[0].startswith(prefix), lines[0]
    return lines[0][len(prefix):]


def accepted(study_dir):
    from planner import evaluate

    with Ledger.open(study_dir) as ledger:
        study = plan.round_study(study_dir, ROUND, ledger)
        manifest = plan.read_manifest(plan.round_dir(study_dir, ROUND))
        return evaluate.accepted_results(study, ledger, ROUND, manifest=manifest)


# --- the shorthand stays as it was --------------------------------------------------------

def test_a_study_in_the_single_measurand_form_plans_as_before(planned):
    manifest = plan.read_manifest(plan.round_dir(planned, ROUND))
    assert "measurands" not in manifest and "not_measured" not in manifest
    assert manifest["measurand"] and manifest["unit"] == "g/10 min"
    lines = (plan.round_dir(planned, ROUND) / "labs" / "crx" / "result-form.csv").read_text(
        encoding="utf-8").splitlines()
    keys = [ln[2:].split(": ")[0] for ln in lines[:9]]
    assert keys == ["study", "round", "laboratory", "fingerprint", "unit", "decimal",
                    "measurand", "results due", "submission token"]
    assert lines[10] == ",".join(plan.FORM_COLUMNS)
    assert all(ln.split(",")[3:] == [""] * 5 for ln in lines[11:])
    with Ledger.open(planned) as ledger:
        assert "measured" not in ledger.events(ROUND, "planned")[-1].detail
    assert plan.form_columns(spec.load(planned)) == plan.FORM_COLUMNS


# --- planning and the forms ------------------------------------------------------------------

def test_the_manifest_lists_the_measurands_and_the_units_ash_is_not_measured_on(multi):
    folder, result = multi
    manifest = plan.read_manifest(plan.round_dir(folder, ROUND))
    assert "measurand" not in manifest and "unit" not in manifest
    assert [(m["id"], m["unit"], m["materials"], m["uncertainty"])
            for m in manifest["measurands"]] == [
        ("mfr", "g/10 min", None, "optional"), ("density", "g/cm3", None, "required"),
        ("ash", "%", ["RE-MIX", "PP-FR"], "none")]
    material = material_of(result)
    reported = [u.code for u in result.units if u.kind == "test"]
    assert manifest["not_measured"] == {
        "ash": sorted(c for c in reported if material[c] not in ASHY)}
    # 5 laboratories x 3 trials x 4 of 6 materials
    assert len(manifest["not_measured"]["ash"]) == 5 * 3 * 4


@pytest.mark.parametrize("lab, sep, decimal", [("crx", ",", "point"), ("kal", ";", "comma")],
                         ids=["decimal-point", "decimal-comma"])
def test_csv_form_has_a_column_per_measurand_and_n_a_where_ash_is_not_measured(
        multi, lab, sep, decimal):
    folder, result = multi
    lines = form_lines(folder, lab)
    identity = dict(ln[2:].split(": ", 1) for ln in lines if ln.startswith("# ")
                    and ln[2:].split(": ", 1)[0] in plan.FORM_IDENTITY)
    assert identity["measurands"] == "mfr [g/10 min]; density [g/cm3]; ash [%]"
    assert identity["decimal"] == decimal
    assert "unit" not in identity and "measurand" not in identity
    assert "# mfr = melt mass-flow rate, 190 °C / 2.16 kg, in g/10 min; method: ISO 1133-1, " \
           "procedure A" in lines
    assert "# density uncertainty = expanded uncertainty (k = 2) of density, in g/cm3; " \
           "required" in lines
    header = lines.index(sep.join(COLUMNS))
    rows = [ln.split(sep) for ln in lines[header + 1:]]
    assert len(rows) == 6 * 3
    material = material_of(result)
    for row in rows:
        ashy = material[codes.compact(row[2])] in ASHY
        assert row[3:] == [""] * 4 + ["" if ashy else "n/a"] + [""] * 3


def test_a_german_laboratory_gets_its_notes_in_german(multi):
    folder, _ = multi
    lines = form_lines(folder, "hel")
    assert "# " + DE("form.note_several", decimal=DE("common.decimal_comma")) in lines
    assert "# density uncertainty = erweiterte Messunsicherheit (k = 2) von density, in " \
           "g/cm3; anzugeben" in lines
    assert ";".join(COLUMNS) in lines  # the column names stay as intake reads them


def _workbook(folder, lab):
    from openpyxl import load_workbook

    from planner.render import result_form

    path = plan.round_dir(folder, ROUND) / "labs" / lab / "result-form.xlsx"
    return path, load_workbook(path)[result_form.SHEET]


@pytest.mark.parametrize("lab", ["crx", "kal", "hel"])
def test_xlsx_form_locks_and_greys_the_n_a_cells_and_checks_each_result_column(
        multi, runner, lab):
    folder, result = multi
    assert run_cli(runner, "print", folder, "--round", ROUND, "--only", "forms").exit_code == 0
    path, sheet = _workbook(folder, lab)
    grid = [[c.value for c in row] for row in sheet.iter_rows()]
    at = next(i for i, row in enumerate(grid) if row[:len(COLUMNS)] == COLUMNS) + 1
    assert forms.read_form(path).columns == tuple(COLUMNS)
    letters = {name: sheet.cell(at, i + 1).column_letter for i, name in enumerate(COLUMNS)}
    material = material_of(result)
    rules = {str(dv.sqref): dv for dv in sheet.data_validations.dataValidation}
    for r in range(at + 1, sheet.max_row + 1):
        ashy = material[codes.compact(sheet.cell(r, 3).value)] in ASHY
        ash = sheet[f"{letters['ash']}{r}"]
        assert (ash.value == "n/a") is (not ashy)
        assert ash.protection.locked is (not ashy)
        assert (ash.fill.fgColor.rgb == "00D9DCDD") is (not ashy)
        for name in ("mfr", "mfr uncertainty", "density", "density uncertainty", "date",
                     "analyst", "remarks"):
            assert sheet[f"{letters[name]}{r}"].protection.locked is False, (name, r)
        for name in ("trial", "position", "code"):
            assert sheet[f"{letters[name]}{r}"].protection.locked is not False
        # the numeric rule of each result column covers its open cells and no n/a cell
        for name in ("mfr", "density uncertainty", "ash"):
            ref = f"{letters[name]}{r}"
            covered = [dv for sq, dv in rules.items() if any(
                ref in rng for rng in _cells(sq))]
            assert len(covered) == (0 if name == "ash" and not ashy else 1), (name, r)
            if covered:
                assert covered[0].type == "decimal"
    german = lab == "hel"
    headings = grid[at - 2][:len(COLUMNS)]
    if german:
        assert headings[3:8] == ["mfr (g/10 min)", "Messunsicherheit mfr", "density (g/cm3)",
                                 "Messunsicherheit density", "ash (%)"]
        assert DE("form.locked_several") in [row[0] for row in grid]
    else:
        assert headings[0] is None  # the blank row: no headings above the header in English


def _cells(sqref):
    """Return every cell reference of a data validation's ranges, e.g. 'D12:D14 D16:D16'."""
    out = []
    for rng in sqref.split():
        first, _, last = rng.partition(":")
        last = last or first
        column = re.match(r"[A-Z]+", first).group()
        top, bottom = int(first[len(column):]), int(last[len(column):])
        out.append([f"{column}{r}" for r in range(top, bottom + 1)])
    return out


def test_no_language_reads_its_headings_as_the_header_row():
    # forms._read_xlsx takes the first row with 'code' and 'value' or 'trial' for the header;
    # the row of headings in the laboratory's words stands above it
    for code in language.available():
        if code == language.DEFAULT:
            continue  # an English form has no row of headings
        t = language.texts(code)
        words = {t(f"form.column.{n}").lower() for n in plan.FORM_COLUMNS}
        words |= {t("form.heading_measurand", id="mfr", unit="%").lower(),
                  t("form.heading_uncertainty", id="mfr").lower()}
        assert not ("code" in words and {"value", "trial"} & words), code


# --- receiving -----------------------------------------------------------------------------

def test_filled_csv_and_xlsx_forms_record_every_value(multi, runner, tmp_path):
    folder, result = multi
    assert run_cli(runner, "print", folder, "--round", ROUND, "--only", "forms").exit_code == 0
    expected = {}
    paths = []
    for lab in ("crx", "kal", "tor", "lin"):
        lines, got = fill(folder, lab)
        expected[lab] = got
        paths.append(write(tmp_path, f"{lab}.csv", lines))
    # hel fills in its workbook: numbers as the spreadsheet stores them
    path, sheet = _workbook(folder, "hel")
    book = sheet.parent
    at = next(r for r in range(1, sheet.max_row + 1)
              if [sheet.cell(r, i + 1).value for i in range(len(COLUMNS))] == COLUMNS)
    expected["hel"] = {}
    for n, r in enumerate(range(at + 1, sheet.max_row + 1), start=1):
        code = codes.compact(sheet.cell(r, 3).value)
        got = {"mfr": (20 + n / 8, None), "density": (0.95 + n / 1024, 0.003)}
        sheet.cell(r, 4).value = got["mfr"][0]
        sheet.cell(r, 6).value, sheet.cell(r, 7).value = got["density"]
        if sheet.cell(r, 8).value != "n/a":
            got["ash"] = (2 + n / 16, None)
            sheet.cell(r, 8).value = got["ash"][0]
        sheet.cell(r, 9).value = "2027-01-26"
        expected["hel"][code] = got
    book.save(tmp_path / "hel.xlsx")
    done = receive(runner, folder, *paths, tmp_path / "hel.xlsx")
    assert done.exit_code == 0, done.stderr
    # 18 units x (mfr + density) + 6 ash units (RE-MIX and PP-FR in 3 trials)
    assert "crx: recorded version 1" in done.stdout and "42 values, 0 without value" in done.stdout
    status = json.loads(run_cli(runner, "status", folder, "--round", ROUND, "--json").stdout)
    assert [r["complete"] for r in status["rows"]] == [True] * 5
    assert status["rows"][0]["measurands"] == {
        "mfr": {"values": 18, "empty": 0, "missing": 0},
        "density": {"values": 18, "empty": 0, "missing": 0},
        "ash": {"values": 6, "empty": 0, "missing": 0}}
    assert status["may_open"] is True
    material = material_of(result)
    records = accepted(folder)
    assert len(records) == 5 * 18
    for record in records:
        assert record["value"] is None and record["uncertainty"] is None
        want = expected[record["lab"]][record["code"]]
        assert set(record["measurements"]) == (
            {"mfr", "density", "ash"} if material[record["code"]] in ASHY else {"mfr", "density"})
        for m, (v, u) in want.items():
            got_v, got_u = record["measurements"][m]
            assert got_v == pytest.approx(v, abs=5e-5) and (
                got_u is None if u is None else got_u == pytest.approx(u, abs=5e-5)), (m, record)
    with Ledger.open(folder) as ledger:
        (count,) = ledger.db.execute("SELECT COUNT(*) FROM result_values").fetchone()
        (values,) = ledger.db.execute("SELECT COUNT(*) FROM result_rows WHERE value IS NOT NULL"
                                      ).fetchone()
    assert count == 5 * 42 and values == 0


def test_a_blank_with_a_remark_is_recorded_as_no_value(multi, runner, tmp_path):
    folder, _ = multi
    lines, _ = fill(folder, "crx")
    row = first_row(lines, "crx")
    code = codes.compact(cell(lines, row, "code", "crx"))
    edit(lines, row, "density", "", "crx")
    edit(lines, row, "density uncertainty", "", "crx")
    edit(lines, row, "remarks", "specimen cracked", "crx")
    done = receive(runner, folder, write(tmp_path, "crx.csv", lines))
    assert done.exit_code == 0, done.stderr
    record = next(r for r in accepted(folder) if r["code"] == code)
    assert record["measurements"]["density"] == (None, None)
    assert record["remarks"] == "specimen cracked"
    status = json.loads(run_cli(runner, "status", folder, "--round", ROUND, "--json").stdout)
    crx = next(r for r in status["rows"] if r["lab"] == "crx")
    assert crx["complete"] and crx["measurands"]["density"]["empty"] == 1


# Each mistake in one cell: one line naming the file and line, exit 2, nothing recorded.
MISTAKES = [
    ("density", "", "density is empty; enter the result, or say in remarks why there is none"),
    ("density uncertainty", "0", "density uncertainty '0' is not above 0; give the expanded "
                                 "uncertainty (k = 2), or leave it empty"),
    ("density uncertainty", "", "density uncertainty is empty, but every density result needs "
                                "its expanded uncertainty (k = 2); give it"),
    ("mfr", "12.5", "mfr '12.5' has a decimal point, but this laboratory writes a decimal comma "
                    "(its 'decimal' in study.yaml); write '12,5'"),
    ("mfr uncertainty", "n.d.", "mfr uncertainty 'n.d.' is a marker (such as 'not determined'), "
                                "not a number; leave the mfr uncertainty empty"),
    ("density", "<0,5", "density '<0,5' is a limit, not a result, and cannot be scored; leave "
                        "the density empty and write it under remarks"),
]


@pytest.mark.parametrize("column, text, message", MISTAKES,
                         ids=["blank-without-remark", "uncertainty-zero",
                              "required-uncertainty-missing",
                              "decimal-point-in-comma-lab", "marker-in-uncertainty",
                              "limit-in-value"])
def test_a_mistake_in_one_measurand_cell_is_one_located_line(multi, runner, tmp_path, column,
                                                             text, message):
    folder, _ = multi
    lines, _ = fill(folder, "kal")
    row = first_row(lines, "kal") + 4
    edit(lines, row, column, text, "kal")
    if column == "density" and not text:
        edit(lines, row, "density uncertainty", "", "kal")  # a blank result has none
    path = write(tmp_path, "kal.csv", lines)
    assert one_error(receive(runner, folder, path), path, row) == message
    assert recorded(folder) == []


def test_a_value_in_an_n_a_cell_is_refused_with_its_row_and_column(multi, runner, tmp_path):
    folder, _ = multi
    lines, _ = fill(folder, "kal")
    row = next(i + 1 for i, ln in enumerate(lines) if ln.split(";")[7:8] == ["n/a"])
    edit(lines, row, "ash", "1,5", "kal")
    path = write(tmp_path, "kal.csv", lines)
    assert one_error(receive(runner, folder, path), path, row) == (
        "ash '1,5' is given for a unit that ash is not measured on (the form marks the cell "
        "n/a); leave it n/a")
    assert recorded(folder) == []
    # emptied instead of n/a: taken, since nothing is claimed for the unit
    edit(lines, row, "ash", "", "kal")
    assert receive(runner, folder, write(tmp_path, "kal2.csv", lines)).exit_code == 0


def test_a_value_in_an_n_a_cell_of_a_workbook_names_its_row(multi, runner, tmp_path):
    folder, _ = multi
    assert run_cli(runner, "print", folder, "--round", ROUND, "--only", "forms").exit_code == 0
    lines, _ = fill(folder, "crx")
    path, sheet = _workbook(folder, "crx")
    at = next(r for r in range(1, sheet.max_row + 1)
              if [sheet.cell(r, i + 1).value for i in range(len(COLUMNS))] == COLUMNS)
    body = [ln.split(",") for ln in lines[lines.index(",".join(COLUMNS)) + 1:]]
    for r, cells in enumerate(body, start=at + 1):
        for i, text in enumerate(cells[3:], start=4):
            if text and text != "n/a":
                sheet.cell(r, i).value = text if i >= 9 else float(text)
    bad = next(r for r in range(at + 1, sheet.max_row + 1) if sheet.cell(r, 8).value == "n/a")
    sheet.cell(bad, 8).value = 0.7
    sheet.parent.save(tmp_path / "crx.xlsx")
    done = receive(runner, folder, tmp_path / "crx.xlsx")
    assert done.exit_code == 2
    assert done.stderr.strip() == (
        f"error: {tmp_path / 'crx.xlsx'}: row {bad}: ash '0.7' is given for a unit that ash is "
        "not measured on (the form marks the cell n/a); leave it n/a")
    assert recorded(folder) == []


def test_a_form_reporting_a_measurand_in_another_unit_is_refused(multi, runner, tmp_path):
    folder, _ = multi
    lines, _ = fill(folder, "crx")
    at = next(i for i, ln in enumerate(lines) if ln.startswith("# measurands: "))
    lines[at] = "# measurands: mfr [g/10 min]; density [kg/m3]; ash [%]"
    path = write(tmp_path, "crx.csv", lines)
    assert one_error(receive(runner, folder, path), path, at + 1) == (
        "the form reports density in 'kg/m3', but the study's unit for density is 'g/cm3'; "
        "report density in 'g/cm3'")
    lines[at] = "# unit: g/10 min"
    path = write(tmp_path, "crx2.csv", lines)
    assert one_error(receive(runner, folder, path), path, 1) == (
        "the form has no '# measurands: ...' line; send the result form that 'ringplan plan' "
        "wrote, with its first lines unchanged")
    assert recorded(folder) == []


def test_a_form_without_the_column_of_a_required_uncertainty_is_refused(multi, runner,
                                                                        tmp_path):
    folder, _ = multi
    lines, _ = fill(folder, "crx")
    header = lines.index(",".join(COLUMNS))
    drop = COLUMNS.index("density uncertainty")
    for i in range(header, len(lines)):
        cells = lines[i].split(",")
        del cells[drop]
        lines[i] = ",".join(cells)
    path = write(tmp_path, "crx.csv", lines)
    assert one_error(receive(runner, folder, path), path, header + 1) == (
        "the form has no 'density uncertainty' column, but every density result needs its "
        "expanded uncertainty (k = 2); add the column as on the blank form")
    assert recorded(folder) == []


# --- the gate --------------------------------------------------------------------------------

def _without(lines, names, lab):
    """Return the form's lines without the columns ``names``."""
    sep = sep_of(lab)
    header = lines.index(sep.join(COLUMNS))
    drop = sorted((COLUMNS.index(n) for n in names), reverse=True)
    out = list(lines[:header])
    for line in lines[header:]:
        cells = line.split(sep)
        for i in drop:
            del cells[i]
        out.append(sep.join(cells))
    return out


def test_a_measurand_left_out_keeps_the_units_open_until_a_correction_brings_it(
        multi, runner, tmp_path, passphrase):
    folder, _ = multi
    for lab in ("kal", "tor", "hel", "lin"):
        assert receive(runner, folder, write(tmp_path, f"{lab}.csv",
                                             fill(folder, lab)[0])).exit_code == 0
    full, expected = fill(folder, "crx")
    partial = _without(full, ["density", "density uncertainty"], "crx")
    done = receive(runner, folder, write(tmp_path, "crx.csv", partial))
    assert done.exit_code == 0, done.stderr
    assert "outstanding: density on 18 codes has neither a value nor a remark yet" in done.stdout
    status = run_cli(runner, "status", folder, "--round", ROUND, "--json")
    crx = next(r for r in json.loads(status.stdout)["rows"] if r["lab"] == "crx")
    assert crx["received"] and not crx["complete"] and crx["missing"] == 18
    assert crx["measurands"]["density"] == {"values": 0, "empty": 0, "missing": 18}
    assert crx["measurands"]["mfr"]["missing"] == 0
    shown = run_cli(runner, "status", folder, "--round", ROUND)
    assert "crx: still without a value or remark: density on 18 codes" in shown.stdout
    assert "the key stays sealed: waiting for crx" in shown.stdout
    early = run_cli(runner, "unseal", folder, "--round", ROUND)
    assert early.exit_code == 2 and "missing or incomplete from crx" in early.stderr
    assert "for each measurand measured on it" in early.stderr
    assert not (plan.round_dir(folder, ROUND) / "key.json").exists()
    # the correction carries the density columns only: mfr and ash stay as recorded
    fix = _without(full, ["mfr", "mfr uncertainty", "ash"], "crx")
    done = receive(runner, folder, write(tmp_path, "crx-density.csv", fix))
    assert done.exit_code == 0, done.stderr and "outstanding" not in done.stdout
    status = json.loads(run_cli(runner, "status", folder, "--round", ROUND, "--json").stdout)
    assert status["may_open"] is True
    assert run_cli(runner, "unseal", folder, "--round", ROUND).exit_code == 0
    mine = {r["code"]: r["measurements"] for r in accepted(folder) if r["lab"] == "crx"}
    for code, want in expected.items():
        assert {m: v for m, (v, _) in mine[code].items()} == pytest.approx(
            {m: v for m, (v, _) in want.items()}, abs=5e-5)


def test_a_key_forced_open_hands_on_the_measurand_never_reported_as_no_value(
        multi, runner, tmp_path, passphrase):
    folder, result = multi
    for lab in ("kal", "tor", "hel", "lin"):
        assert receive(runner, folder, write(tmp_path, f"{lab}.csv",
                                             fill(folder, lab)[0])).exit_code == 0
    partial = _without(fill(folder, "crx")[0], ["density", "density uncertainty"], "crx")
    assert receive(runner, folder, write(tmp_path, "crx.csv", partial)).exit_code == 0
    receipt = (plan.round_dir(folder, ROUND) / "results" / "receipt-crx-v1.txt").read_text()
    assert "this form: 24 results with a value, 0 without" in receipt  # 18 mfr + 6 ash
    assert "in force for the laboratory: 18 units; still outstanding: 18 codes" in receipt
    forced = run_cli(runner, "unseal", folder, "--round", ROUND, "--force", "--reason",
                     "density of crx follows")
    assert forced.exit_code == 0, forced.stderr
    material = material_of(result)
    for record in accepted(folder):
        if record["lab"] != "crx":
            continue
        assert record["measurements"]["density"] == (None, None)
        assert record["measurements"]["mfr"][0] is not None
        assert ("ash" in record["measurements"]) is (material[record["code"]] in ASHY)


def test_the_host_spare_takes_the_place_of_the_damaged_unit_n_a_and_all(multi, runner,
                                                                         tmp_path, passphrase):
    folder, result = multi
    material = material_of(result)
    lines, _ = fill(folder, "crx")
    row = next(i + 1 for i, ln in enumerate(lines) if ln.split(",")[7:8] == ["n/a"])
    damaged = cell(lines, row, "code", "crx")
    done = run_cli(runner, "spare", folder, "--round", ROUND, "--lab", "crx", "--damaged",
                   damaged)
    assert done.exit_code == 0, done.stderr
    with Ledger.open(folder) as ledger:
        spare = ledger.events(ROUND, "spare-swap")[-1].detail["spare"]
    assert material[spare] == material[codes.compact(damaged)] not in ASHY
    edit(lines, row, "code", codes.format(spare), "crx")
    edit(lines, row, "ash", "0.5", "crx")
    path = write(tmp_path, "crx.csv", lines)
    assert "ash '0.5' is given for a unit that ash is not measured on" in one_error(
        receive(runner, folder, path), path, row)
    edit(lines, row, "ash", "n/a", "crx")
    assert receive(runner, folder, write(tmp_path, "crx2.csv", lines)).exit_code == 0
    record = next(r for r in accepted(folder) if r["code"] == spare)
    assert set(record["measurements"]) == {"mfr", "density"}


# --- tampering and the audit ------------------------------------------------------------------

def test_a_manifest_whose_n_a_units_were_edited_is_refused(multi, runner):
    folder, _ = multi
    path = plan.round_dir(folder, ROUND) / plan.MANIFEST_NAME
    manifest = json.loads(path.read_text(encoding="utf-8"))
    manifest["not_measured"]["ash"].pop()
    path.write_text(json.dumps(manifest), encoding="utf-8")
    done = run_cli(runner, "status", folder, "--round", ROUND)
    assert done.exit_code == 2
    assert "its measurands, or the units each is not measured on, are not the ones the " \
           "ledger recorded" in done.stderr


def test_verify_checks_the_n_a_units_against_the_key(multi):
    from planner import audit, seal

    folder, result = multi
    key_json = seal.canonical(plan.key_of(result))
    manifest = plan.read_manifest(plan.round_dir(folder, ROUND))
    study = spec.load(folder)
    ok = audit.verify_key(key_json, manifest, fingerprint=result.fingerprint,
                          path=folder / "key.json", study=study)
    assert ok.differences == ()
    moved = json.loads(json.dumps(manifest))
    moved["not_measured"]["ash"][0] = next(u.code for u in result.units if u.kind == "test"
                                           and u.material in ASHY)
    found = audit.verify_key(key_json, moved, fingerprint=None, path=folder / "key.json")
    assert any("not measured for a measurand" in d for d in found.differences)


# --- the warning ------------------------------------------------------------------------------

def test_check_and_plan_warn_of_a_measurand_measured_on_some_materials(multi_dir, runner,
                                                                      passphrase):
    warning = ("warning: measurand 'ash' is measured on RE-MIX, PP-FR only: the result forms "
               "mark its cells n/a and the run sheets show a dash for every other unit, so a "
               "laboratory can tell which of its units hold one of these 2 materials and which "
               "do not; measure it on every material to hide that")
    checked = run_cli(runner, "check", multi_dir)
    assert checked.exit_code == 0 and warning in checked.stderr.splitlines()
    assert "measured on" not in checked.stderr.replace(warning, "")
    planned = run_cli(runner, "plan", multi_dir, "--round", ROUND, "--host", "kal")
    assert planned.exit_code == 0 and warning in planned.stderr.splitlines()


def test_no_warning_when_every_measurand_covers_every_material(tmp_path, runner):
    target = tmp_path / "s"
    shutil.copytree(EXAMPLE, target)
    block = MEASURANDS.replace("    materials: [RE-MIX, PP-FR]\n", "")
    (target / "study.yaml").write_text(several((EXAMPLE / "study.yaml").read_text(
        encoding="utf-8"), block), encoding="utf-8")
    checked = run_cli(runner, "check", target)
    assert checked.exit_code == 0 and "measurand 'ash'" not in checked.stderr
    assert "ash content, 600 °C" in checked.stdout


# --- the run sheet ------------------------------------------------------------------------------

def test_the_run_sheet_has_a_column_per_measurand_and_a_dash_where_ash_is_not_measured(
        multi, runner):
    from tests.render.conftest import pdf_text

    folder, result = multi
    assert run_cli(runner, "print", folder, "--round", ROUND, "--only",
                   "runsheets").exit_code == 0
    material = material_of(result)
    for lab, words in (("crx", ("mfr: melt mass-flow rate, 190 °C / 2.16", "ash (%)")),
                       ("hel", ("Ein Strich kennzeichnet", "ash (%)"))):
        pages = pdf_text(plan.round_dir(folder, ROUND) / "labs" / lab / "run-sheet.pdf")
        text = " ".join(" ".join(pages).split())
        for word in words:
            assert word in text, (lab, word)
        dashes = sum(line.count("\u2013") for page in pages for line in page.splitlines()
                     if re.search(r"[0-9A-Z]{4}-[0-9A-Z]{5}", line))
        manifest = plan.read_manifest(plan.round_dir(folder, ROUND))
        mine = [c for run in manifest["labs"][lab]["trials"] for c in run]
        assert dashes == sum(1 for c in mine if material[c] not in ASHY) == 12
        for secret in ASHY | {m.id for m in spec.load(folder).materials}:
            assert secret not in text  # the materials themselves stay unnamed


# --- an old ledger --------------------------------------------------------------------------

def test_a_ledger_of_the_schema_before_result_values_opens_and_its_chain_checks(
        example_dir, clock, runner, tmp_path):
    """A ledger as the code before schema 3 wrote it (its first two migrations, its five
    chained tables): a round planned and a form recorded through the ledger's API. Today's
    code opens it, migrates it, and its chain and rows hold."""
    import sqlite3

    from conftest import filled
    from conftest import plan_example_round as plan_shorthand
    from conftest import write as write_lines

    from planner import ledger as ledger_module
    from planner.ledger import ResultRow

    try:
        with pytest.MonkeyPatch.context() as before:
            before.setattr(ledger_module, "_MIGRATIONS", ledger_module._MIGRATIONS[:2])
            before.setattr(ledger_module, "SCHEMA_VERSION", 2)
            before.setattr(ledger_module, "_CHAINED", ledger_module._FIRST)
            ledger_module._expected_schema.cache_clear()
            plan_shorthand(example_dir)
            manifest = plan.read_manifest(plan.round_dir(example_dir, ROUND))
            rows = [ResultRow(code, trial, position, 10 + position / 4, None, "2027-01-25",
                              "A. Analyst", "", ())
                    for trial, run in enumerate(manifest["labs"]["crx"]["trials"], start=1)
                    for position, code in enumerate(run, start=1)]
            with Ledger.open(example_dir) as old:
                with old.transaction():
                    old.add_submission(round_id=ROUND, lab="crx", sha256="0" * 64,
                                       file_name="crx.csv", late=False, after_unseal=False,
                                       reason=None, rows=rows)
                    old.record_event(ROUND, "received", {"lab": "crx", "version": 1,
                                                         "sha256": "0" * 64})
                heads = old.heads()
    finally:
        ledger_module._expected_schema.cache_clear()  # today's schema again
    db = sqlite3.connect(example_dir / "ledger.sqlite")
    assert db.execute("PRAGMA user_version").fetchone()[0] == 2
    assert "result_values" not in {n for (n,) in db.execute("SELECT name FROM sqlite_master")}
    db.close()
    with Ledger.open(example_dir) as ledger:
        assert ledger.db.execute("PRAGMA user_version").fetchone()[0] == 3
        assert ledger.heads() == heads  # the migration adds no row, so no link
        ledger.check()
        stored = ledger.result_rows(ledger.submissions(ROUND)[0].row)
    assert sorted(stored, key=lambda r: (r.trial, r.position)) == rows
    status = run_cli(runner, "status", example_dir, "--round", ROUND, "--json")
    assert status.exit_code == 0, status.stderr
    crx = next(r for r in json.loads(status.stdout)["rows"] if r["lab"] == "crx")
    assert crx["complete"] and crx["values"] == 18 and "measurands" not in crx
    again = run_cli(runner, "receive", example_dir, "--round", ROUND,
                    write_lines(tmp_path, "kal.csv", filled(example_dir, "kal")))
    assert again.exit_code == 0, again.stderr
    with Ledger.open(example_dir) as ledger:
        assert ledger.heads()[:len(heads)] == heads and len(ledger.heads()) == len(heads) + 1


def test_a_measurand_value_changed_behind_dropped_guards_is_detected(multi, runner, tmp_path):
    """A coordinator with the sqlite3 shell drops the guards, raises one density value in
    result_values and puts the guards back: every command refuses the ledger in one line."""
    import sqlite3

    folder, _ = multi
    assert run_cli(runner, "print", folder, "--round", ROUND, "--only", "forms").exit_code == 0
    lines, _ = fill(folder, "kal")
    assert receive(runner, folder, write(tmp_path, "kal.csv", lines)).exit_code == 0
    db = sqlite3.connect(folder / "ledger.sqlite", isolation_level=None)
    guards = db.execute("SELECT name, sql FROM sqlite_master WHERE type = 'trigger'").fetchall()
    for name, _ in guards:
        db.execute(f"DROP TRIGGER {name}")
    db.execute("UPDATE result_values SET value = value + 0.01 WHERE measurand = 'density' "
               "AND rowid = (SELECT MIN(rowid) FROM result_values WHERE measurand = 'density')")
    for _, sql in guards:
        db.execute(sql)
    db.close()
    result = run_cli(runner, "status", folder, "--round", ROUND)
    assert result.exit_code == 2 and "Traceback" not in result.output
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "result_values" in lines[0], lines
