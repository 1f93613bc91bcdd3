"""Where a round stands: the status table per laboratory, through the library and the CLI.

The round is planned from the example study with the fixed secret of conftest;
forms are the CSV that ``plan`` wrote, filled in by editing lines. Expected
values are the numbers the tests write into the forms and calendar arithmetic.
"""

from __future__ import annotations

from datetime import date

from conftest import LABS, ROUND, filled, manifest_of, receive, run_cli, write

from planner import codes, spec, status
from planner.ledger import Ledger


def test_status_rows_and_days_left(planned, runner, tmp_path):
    lines = filled(planned, "crx")
    lines.pop()                                       # one code left out
    receive(runner, planned, write(tmp_path, "crx.csv", lines))
    study = spec.load(planned)
    with Ledger.open(planned) as ledger:
        before = status.round_status_table(study, planned, ROUND, ledger, today=date(2027, 1, 30))
        after = status.round_status_table(study, planned, ROUND, ledger, today=date(2027, 2, 6))
    rows = {r["lab"]: r for r in before.rows}
    assert [r["lab"] for r in before.rows] == list(LABS)
    assert before.results_due == date(2027, 2, 4) and not before.may_open
    assert before.waiting_for == LABS  # crx left one code out: not complete
    # 2027-01-30 to 2027-02-04 is 5 calendar days; 2027-02-06 is 2 days past it
    assert rows["kal"] | {"missing_codes": None} == {
        "lab": "kal", "received": False, "complete": False, "version": None, "merged": False,
        "received_at": None, "values": 0,
        "failed": 0, "expected": 18, "missing": 18, "missing_codes": None, "late": False,
        "after_unseal": False, "spares_issued": 0, "days_left": 5}
    assert (rows["crx"]["received"], rows["crx"]["version"], rows["crx"]["values"],
            rows["crx"]["missing"], rows["crx"]["days_left"]) == (True, 1, 17, 1, None)
    assert rows["crx"]["missing_codes"] == [lines_last_code(planned)]
    late = {r["lab"]: (r["late"], r["days_left"]) for r in after.rows}
    assert late["kal"] == (True, -2) and late["crx"] == (False, None)


def lines_last_code(study_dir):
    return codes.format(manifest_of(study_dir)["labs"]["crx"]["trials"][-1][-1])


def test_status_cli_json(planned, runner):
    result = run_cli(runner, "status", planned, "--round", ROUND, "--json")
    assert result.exit_code == 0
    import json

    info = json.loads(result.stdout)
    assert info["may_open"] is False and len(info["rows"]) == 5


def test_status_of_an_unplanned_round(example_dir, runner):
    # A folder where nothing was planned: status says so and creates no ledger.
    result = run_cli(runner, "status", example_dir, "--round", "2030-1")
    assert result.exit_code == 2
    assert "no ledger here yet: no round has been planned" in result.stderr
    assert not (example_dir / "ledger.sqlite").exists()


def test_status_of_an_unplanned_round_beside_planned_ones(planned, runner):
    result = run_cli(runner, "status", planned, "--round", "2030-1")
    assert result.exit_code == 2
    assert "round '2030-1' has not been planned" in result.stderr
