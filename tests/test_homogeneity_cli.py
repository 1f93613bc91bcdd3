"""The host's homogeneity and stability checks through the command line, attacked the way a
careless coordinator or a host in a hurry would: the forms plan writes, recording them, the
shipping gate on the packing lists, the waiver, verify rebuilding the measuring order, and
what evaluation does with a batch that is not sufficiently homogeneous.

The figures are checked against numpy written out here from ISO 13528 B.2 (s_x, s_w, s_s) and
against the consensus uncertainty 1.25 s*/sqrt(p) of ISO 13528 §7.7 (C.2): a widened
u(x_pt) must be sqrt(u(x_pt)² + s_s²) of exactly those figures.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from conftest import LABS, ROUND, filled, homogeneity_filled, receive, run_cli, write

from planner import codes, homogeneity, plan
from planner.ledger import Ledger

INHOMOGENEOUS = "RE-MIX"


def _ok(runner, *args):
    result = run_cli(runner, *args)
    assert result.exit_code == 0, (args, result.stdout, result.stderr)
    return result


def _planned(runner, study_dir, *, between_units=None):
    if between_units is not None:
        spec_file = study_dir / "study.yaml"
        text = spec_file.read_text(encoding="utf-8")
        spec_file.write_text(text.replace("  pool_alpha: 0.25\n", "  pool_alpha: 0.25\n"
                                          f"  between_units: {between_units}\n"),
                             encoding="utf-8")
    _ok(runner, "plan", study_dir, "--round", ROUND, "--host", "kal")
    return plan.round_dir(study_dir, ROUND)


def _events(study_dir, kind):
    with Ledger.open(study_dir) as ledger:
        return ledger.events(ROUND, kind)


def _values(lines):
    """code -> [replicate values] of a filled single-measurand check form (CSV lines)."""
    sep = ";" if "# decimal: comma" in lines else ","
    rows = [ln.split(sep) for ln in lines if not ln.startswith("#")]
    out: dict[str, list[float]] = {}
    for row in rows[1:]:
        out.setdefault(codes.compact(row[1]), []).append(float(row[3].replace(",", ".")))
    return out


def _s_s(values):
    """ISO 13528 B.2 written out with numpy: s_s = sqrt(max(0, s_x² - s_w²/2))."""
    pairs = np.array(list(values), dtype=float)
    s_x = np.std(pairs.mean(axis=1), ddof=1)
    s_w = math.sqrt(np.mean(np.var(pairs, axis=1, ddof=1)))
    return math.sqrt(max(0.0, s_x ** 2 - s_w ** 2 / 2))


def test_plan_writes_the_host_forms_private_and_naming_no_material(example_dir, runner,
                                                                   passphrase, clock):
    folder = _planned(runner, example_dir)
    host = folder / "host"
    for name in ("homogeneity-form.csv", "homogeneity-form.xlsx", "stability-form.csv",
                 "stability-form.xlsx"):
        assert (host / name).stat().st_mode & 0o777 == 0o600, name
    assert host.stat().st_mode & 0o777 == 0o700
    text = (host / "homogeneity-form.csv").read_text(encoding="utf-8")
    with Ledger.open(example_dir) as ledger:
        checks = homogeneity.checks_of(ledger, ROUND)
        participants = {c for c, _, kind, *_ in ledger.units(ledger.current_round(ROUND).row)
                        if kind == "test"}
    assert len(checks["homogeneity"]) == 60 and len(checks["stability"]) == 12
    for material in {*checks["homogeneity"].values()}:
        assert material not in text  # the round folder names no material before the key
    shown = {codes.compact(ln.split(";")[1]) for ln in text.splitlines()[7:]}
    assert shown == set(checks["homogeneity"]) and not shown & participants


def test_record_prints_every_figure_and_json_has_the_names(example_dir, runner, passphrase,
                                                           clock, tmp_path):
    _planned(runner, example_dir)
    lines = homogeneity_filled(example_dir, off={INHOMOGENEOUS: 1.0})
    form = write(tmp_path, "h.csv", lines)
    result = _ok(runner, "homogeneity", example_dir, "--round", ROUND, form, "--json")
    found = json.loads(result.stdout)
    entry = found["measurands"]["value"][INHOMOGENEOUS]
    for name in ("g", "mean", "s_x", "s_w", "s_s", "sigma_pt", "sigma_pt_source", "criterion",
                 "F1", "F2", "c", "passes", "passes_extended", "verdict"):
        assert name in entry, name
    with Ledger.open(example_dir) as ledger:
        material_of = homogeneity.checks_of(ledger, ROUND)["homogeneity"]
    values = _values(lines)
    mine = [v for c, v in values.items() if material_of[c] == INHOMOGENEOUS]
    assert entry["s_s"] == pytest.approx(_s_s(mine), rel=1e-12)
    assert entry["sigma_pt"] == pytest.approx(0.05 * np.mean(mine))  # the example: 5 %
    assert entry["verdict"] == "not sufficiently homogeneous"
    assert found["packing_lists"].startswith("held: the homogeneity check did not pass")
    # the table the coordinator reads
    shown = _ok(runner, "homogeneity", example_dir, "--round", ROUND).stdout
    assert "FAILS" in shown and "F1 = 1.880, F2 = 1.010" in shown
    stored = list((plan.round_dir(example_dir, ROUND) / "host" / "checks").iterdir())
    assert [p.read_bytes() for p in stored] == [form.read_bytes()]


def test_a_bad_form_is_one_line_each_and_nothing_is_recorded(example_dir, runner, passphrase,
                                                             clock, tmp_path):
    _planned(runner, example_dir)
    lines = homogeneity_filled(example_dir)
    header = next(i for i, ln in enumerate(lines) if not ln.startswith("#"))
    cells = lines[header + 3].split(";")
    cells[3] = "12.5"  # a decimal point on a form written with a comma
    lines[header + 3] = ";".join(cells)
    form = write(tmp_path, "h.csv", lines)
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND, form)
    assert result.exit_code == 2
    assert result.stderr.startswith(f"error: {form}:{header + 4}: ") and "comma" in result.stderr
    assert _events(example_dir, "homogeneity-form") == []
    assert not (plan.round_dir(example_dir, ROUND) / "host" / "checks").exists()


def test_a_participants_code_or_another_rounds_form_is_refused(example_dir, runner,
                                                               passphrase, clock, tmp_path):
    folder = _planned(runner, example_dir)
    lines = homogeneity_filled(example_dir)
    header = next(i for i, ln in enumerate(lines) if not ln.startswith("#"))
    cells = lines[header + 1].split(";")
    participant = plan.read_manifest(folder)["labs"]["tor"]["trials"][0][0]
    cells[1] = codes.format(participant)
    forged = lines.copy()
    forged[header + 1] = ";".join(cells)
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND,
                     write(tmp_path, "forged.csv", forged))
    assert result.exit_code == 2 and "is not a homogeneity unit of this round" in result.stderr
    other = [ln.replace(f"# round: {ROUND}", "# round: 2026-3") for ln in lines]
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND,
                     write(tmp_path, "other.csv", other))
    assert result.exit_code == 2 and "expected '2027-1'" in result.stderr
    # the stability form is not the homogeneity form: its codes are the retained units
    stab = homogeneity_filled(example_dir, kind="stability")
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND,
                     write(tmp_path, "stab.csv", stab))
    assert result.exit_code == 2 and "is not a homogeneity unit" in result.stderr
    assert _events(example_dir, "homogeneity-form") == []


def test_the_gate_holds_the_packing_lists_until_a_pass_or_a_waiver(example_dir, runner,
                                                                   passphrase, clock,
                                                                   tmp_path):
    folder = _planned(runner, example_dir)
    lists = [folder / "labs" / lab / "packing-list.pdf" for lab in LABS]
    refused = run_cli(runner, "print", example_dir, "--round", ROUND, "--only", "packing")
    assert refused.exit_code == 2 and "packing lists are held" in refused.stderr
    assert "not recorded yet" in refused.stderr and _events(example_dir, "printed") == []
    one = run_cli(runner, "print", example_dir, "--round", ROUND, "--only", "packing",
                  "--lab", "tor")
    assert one.exit_code == 2 and not any(p.exists() for p in lists)
    # the whole print writes everything else and says what it held back
    whole = _ok(runner, "print", example_dir, "--round", ROUND)
    assert "held back: the packing lists" in whole.stdout
    assert not any(p.exists() for p in lists)
    assert (folder / "host" / "labels.pdf").is_file()
    assert all((folder / "labs" / lab / "run-sheet.pdf").is_file() for lab in LABS)
    status = " ".join(_ok(runner, "status", example_dir, "--round", ROUND).stdout.split())
    assert "homogeneity check: not recorded yet" in status and "packing lists: held" in status
    # an inhomogeneous batch keeps them held
    _ok(runner, "homogeneity", example_dir, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(example_dir, off={INHOMOGENEOUS: 1.0})))
    again = run_cli(runner, "print", example_dir, "--round", ROUND, "--only", "packing")
    assert again.exit_code == 2 and f"value/{INHOMOGENEOUS}: not sufficiently" in again.stderr
    # a waiver needs a sentence, and then opens the gate
    short = run_cli(runner, "homogeneity", example_dir, "--round", ROUND, "--waive", "ok")
    assert short.exit_code == 2 and _events(example_dir, "homogeneity-waived") == []
    reason = "RE-MIX is a recycled blend; its spread goes into u(x_pt)"
    _ok(runner, "homogeneity", example_dir, "--round", ROUND, "--waive", reason)
    _ok(runner, "print", example_dir, "--round", ROUND, "--only", "packing")
    assert all(p.is_file() for p in lists)


def test_a_passing_check_opens_the_gate_without_a_waiver(example_dir, runner, passphrase,
                                                         clock, tmp_path):
    folder = _planned(runner, example_dir)
    _ok(runner, "homogeneity", example_dir, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(example_dir)))
    _ok(runner, "print", example_dir, "--round", ROUND, "--only", "packing")
    assert (folder / "labs" / "crx" / "packing-list.pdf").is_file()
    assert _events(example_dir, "homogeneity-waived") == []


def test_the_spreadsheet_form_records_the_same_values(example_dir, runner, passphrase, clock,
                                                      tmp_path):
    from openpyxl import load_workbook

    folder = _planned(runner, example_dir)
    lines = homogeneity_filled(example_dir)
    wanted = _values(lines)
    book = load_workbook(folder / "host" / "homogeneity-form.xlsx")
    sheet = book.worksheets[0]
    head = next(r for r in sheet.iter_rows() if r[0].value == "run")
    col = {c.value: c.column for c in head}
    seen: dict[str, int] = {}
    for row in sheet.iter_rows(min_row=head[0].row + 1):
        code = codes.compact(str(row[col["code"] - 1].value))
        rep = int(row[col["replicate"] - 1].value)
        sheet.cell(row[0].row, col["value"]).value = wanted[code][rep - 1]
        seen[code] = seen.get(code, 0) + 1
    assert sheet.protection.sheet and sheet.cell(head[0].row + 1, col["code"]).protection.locked
    target = tmp_path / "h.xlsx"
    book.save(target)
    _ok(runner, "homogeneity", example_dir, "--round", ROUND, target)
    with Ledger.open(example_dir) as ledger:
        got = homogeneity.recorded(ledger, ROUND, "homogeneity")["values"]["value"]
    assert got == wanted  # the same floats: the CSV's decimals are what the cells hold


def _whole_round(runner, example_dir, tmp_path, off):
    _ok(runner, "homogeneity", example_dir, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(example_dir, off=off)))
    if off:
        _ok(runner, "homogeneity", example_dir, "--round", ROUND, "--waive",
            "shipped as it is; the evaluation takes the spread into account")
    _ok(runner, "print", example_dir, "--round", ROUND)
    forms = [write(tmp_path, f"{lab}.csv", filled(example_dir, lab)) for lab in LABS]
    assert receive(runner, example_dir, *forms).exit_code == 0
    _ok(runner, "homogeneity", example_dir, "--round", ROUND, "--stability",
        write(tmp_path, "s.csv", homogeneity_filled(example_dir, kind="stability", off=off)))
    _ok(runner, "unseal", example_dir, "--round", ROUND)
    _ok(runner, "evaluate", example_dir, "--round", ROUND)
    folder = plan.round_dir(example_dir, ROUND)
    return json.loads((folder / "report" / "statistics.json").read_text(encoding="utf-8"))


@pytest.mark.parametrize("into", ["uncertainty", "sigma_pt"])
def test_evaluation_widens_u_or_sigma_by_the_between_unit_sd(example_dir, runner, passphrase,
                                                             clock, tmp_path, into):
    _planned(runner, example_dir, between_units=into)
    stats = _whole_round(runner, example_dir, tmp_path, off={INHOMOGENEOUS: 1.0})
    checked = stats["homogeneity"]
    s_s = checked["measurands"]["value"][INHOMOGENEOUS]["s_s"]
    assert checked["widened"] == {"value": {INHOMOGENEOUS: {
        "into": into, "sd": pytest.approx(s_s), "why": f"the between-unit SD s_s = {s_s:.3g}"}}}
    assert checked["waiver"]["reason"].startswith("shipped as it is")
    sc = stats["measurands"]["value"]["scores"][INHOMOGENEOUS]
    plain = stats["measurands"]["value"]["scores"]["PP-C8"]
    if into == "uncertainty":
        # ISO 13528 C.2: u(x_pt) = 1.25 s*/sqrt(p) of the consensus, then widened
        u0 = 1.25 * sc["robust_sd"] / math.sqrt(sc["p"])
        assert sc["u_assigned_value"] == pytest.approx(math.hypot(u0, s_s), rel=1e-9)
        assert sc["sigma_pt"] == pytest.approx(0.05 * abs(sc["assigned_value"]), rel=1e-9)
    else:
        assert sc["sigma_pt"] == pytest.approx(
            math.hypot(0.05 * abs(sc["assigned_value"]), s_s), rel=1e-9)
    assert any("widened" in n for n in sc["notes"])
    assert not any("widened" in n for n in plain["notes"])  # the others stay as they were
    report = plan.round_dir(example_dir, ROUND) / "report" / "report.pdf"
    from tests.render.conftest import pdf_text

    text = " ".join(" ".join(pdf_text(report)).split())
    assert "Homogeneity and stability of the items" in text
    assert "shipped as it is; the evaluation takes the spread into account" in text
    assert f"value/{INHOMOGENEOUS}: {'u(x_pt)' if into == 'uncertainty' else 'sigma_pt'}" in text


def test_a_homogeneous_batch_changes_no_score(example_dir, runner, passphrase, clock,
                                              tmp_path):
    _planned(runner, example_dir)
    stats = _whole_round(runner, example_dir, tmp_path, off=None)
    assert stats["homogeneity"]["widened"] == {}
    assert stats["homogeneity"]["waiver"] is None
    for sc in stats["measurands"]["value"]["scores"].values():
        assert not any("widened" in n for n in sc["notes"])
    entry = stats["homogeneity"]["measurands"]["value"]["PP-H12"]
    assert entry["stability"]["verdict"].startswith("stable")


def test_verify_rebuilds_the_measuring_order_and_finds_an_edited_form(example_dir, runner,
                                                                      passphrase, clock,
                                                                      tmp_path):
    folder = _planned(runner, example_dir)
    _ok(runner, "homogeneity", example_dir, "--round", ROUND,
        write(tmp_path, "h.csv", homogeneity_filled(example_dir)))
    forms = [write(tmp_path, f"{lab}.csv", filled(example_dir, lab)) for lab in LABS]
    assert receive(runner, example_dir, *forms).exit_code == 0
    _ok(runner, "unseal", example_dir, "--round", ROUND)
    _ok(runner, "verify", example_dir, "--round", ROUND)
    # the host sorted its form by code to measure faster, and renumbered the runs
    path = folder / "host" / "homogeneity-form.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    head = next(i for i, ln in enumerate(lines) if not ln.startswith("#"))
    body = sorted(lines[head + 1:], key=lambda ln: ln.split(";")[1:3])
    body = [";".join([str(i), *ln.split(";")[1:]]) for i, ln in enumerate(body, start=1)]
    path.write_text("\n".join(lines[:head + 1] + body) + "\n", encoding="utf-8")
    result = run_cli(runner, "verify", example_dir, "--round", ROUND)
    assert result.exit_code == 1
    assert "host/homogeneity-form.csv: its run order is not the one the round secret draws" \
        in result.stderr


def test_a_round_without_check_units_has_no_gate(example_dir, runner, passphrase, clock,
                                                 tmp_path):
    spec_file = example_dir / "study.yaml"
    text = spec_file.read_text(encoding="utf-8")
    spec_file.write_text(text.replace("retained_by_host: 2", "retained_by_host: 0")
                         .replace("homogeneity_units: 10", "homogeneity_units: 0"),
                         encoding="utf-8")
    folder = _planned(runner, example_dir)
    assert not (folder / "host").exists()
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND)
    assert result.exit_code == 2 and "nothing to check" in result.stderr
    _ok(runner, "print", example_dir, "--round", ROUND, "--only", "packing")
    assert (folder / "labs" / "tor" / "packing-list.pdf").is_file()


def test_the_previous_rounds_sigma_pt_judges_a_check_before_any_result(example_dir, runner,
                                                                       passphrase, clock,
                                                                       tmp_path):
    spec_file = example_dir / "study.yaml"
    text = spec_file.read_text(encoding="utf-8")
    spec_file.write_text(text.replace("sigma_pt: {percent: 5}", "sigma_pt: participants"),
                         encoding="utf-8")
    _ok(runner, "plan", example_dir, "--round", "2026-9", "--host", "kal")
    waits = homogeneity_filled(example_dir, "2026-9")
    result = json.loads(_ok(runner, "homogeneity", example_dir, "--round", "2026-9",
                            write(tmp_path, "a.csv", waits), "--json").stdout)
    entry = result["measurands"]["value"]["PP-H12"]
    assert entry["verdict"] == "waits" and entry["sigma_pt"] is None
    # the verdict waits; the host's data is recorded, so the parcels may leave
    assert result["packing_lists"] == "may be printed"
    # a later round takes the sigma_pt of the newest evaluated round before it
    report = plan.round_dir(example_dir, "2026-9") / "report"
    report.mkdir()
    (report / "statistics.json").write_text(json.dumps({"measurands": {"value": {
        "scores": {"PP-H12": {"sigma_pt": 0.42}, "RE-MIX": {"skipped": "x"}}}}}),
        encoding="utf-8")
    _ok(runner, "plan", example_dir, "--round", ROUND, "--host", "tor")
    later = json.loads(_ok(runner, "homogeneity", example_dir, "--round", ROUND,
                           write(tmp_path, "b.csv", homogeneity_filled(example_dir)),
                           "--json").stdout)
    entry = later["measurands"]["value"]["PP-H12"]
    assert entry["sigma_pt"] == 0.42
    assert entry["sigma_pt_source"] == "the previous round's sigma_pt for this material"
    assert later["measurands"]["value"]["RE-MIX"]["verdict"] == "waits"


def test_the_blank_form_sent_back_unfilled_is_one_line(example_dir, runner, passphrase, clock):
    folder = _planned(runner, example_dir)
    blank = folder / "host" / "homogeneity-form.csv"
    result = run_cli(runner, "homogeneity", example_dir, "--round", ROUND, blank)
    assert result.exit_code == 2
    lines = result.stderr.strip().splitlines()
    assert len(lines) == 1 and "is empty" in lines[0] and "119 more rows" in lines[0], lines
    assert _events(example_dir, "homogeneity-form") == []


def test_a_disk_that_refuses_a_copy_records_neither_form_nor_waiver(example_dir, runner,
                                                                    passphrase, clock,
                                                                    tmp_path, monkeypatch):
    # Both forms and a waiver in one call, and the disk full when the second copy is
    # written: nothing is in the ledger, so the same call can simply be made again.
    import errno

    from planner import files

    _planned(runner, example_dir)
    form = write(tmp_path, "h.csv", homogeneity_filled(example_dir))
    stab = write(tmp_path, "s.csv", homogeneity_filled(example_dir, kind="stability"))
    real, calls = files.write_bytes, []

    def full(path, data, **kwargs):
        calls.append(path)
        if len(calls) == 2:
            raise files.explain(OSError(errno.ENOSPC, "No space left on device"), path)
        return real(path, data, **kwargs)

    monkeypatch.setattr(files, "write_bytes", full)
    args = ("homogeneity", example_dir, "--round", ROUND, form, "--stability", stab,
            "--waive", "the batch was checked by the supplier")
    result = run_cli(runner, *args)
    monkeypatch.undo()
    assert result.exit_code == 2
    assert "no space left on the disk" in result.stderr
    for kind in ("homogeneity-form", "stability-form", "homogeneity-waived"):
        assert _events(example_dir, kind) == [], kind
    _ok(runner, *args)
    assert [len(_events(example_dir, k)) for k in
            ("homogeneity-form", "stability-form", "homogeneity-waived")] == [1, 1, 1]
