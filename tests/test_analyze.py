"""`ringplan analyze`: the round statistics on any long-format CSV, through the CLI."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import stats as sps

from conftest import run_cli

# Invented data: 2 materials x 3 laboratories x 2 trials, plus an ignored extra column.
SMALL = """material,lab,trial,value,operator
A,l1,1,10.1,x
A,l1,2,10.3,x
A,l2,1,10.6,x
A,l2,2,10.5,x
A,l3,1,9.9,x
A,l3,2,10.0,x
B,l1,1,20.2,x
B,l1,2,20.5,x
B,l2,1,21.0,x
B,l2,2,20.8,x
B,l3,1,19.9,x
B,l3,2,20.1,x
"""

ONE_PER_LAB = """material,lab,trial,value
A,l1,1,10.1
A,l2,1,10.4
A,l3,1,9.8
A,l4,1,10.0
A,l5,1,11.9
"""


@pytest.fixture
def small(tmp_path):
    path = tmp_path / "small.csv"
    path.write_text(SMALL, encoding="utf-8")
    return path


def test_json_has_the_structure_of_statistics_json(small, runner):
    res = run_cli(runner, "analyze", small, "--json", "--tolerance", "2")
    assert res.exit_code == 0, res.stderr
    out = json.loads(res.stdout)
    for k in ("materials", "labs", "anova", "grr_anova", "grr_range", "precision", "scores"):
        assert k in out
    assert out["materials"] == ["A", "B"] and out["labs"] == ["l1", "l2", "l3"]
    # one-way ANOVA per material against scipy.stats.f_oneway (independent library)
    groups = {"A": [[10.1, 10.3], [10.6, 10.5], [9.9, 10.0]],
              "B": [[20.2, 20.5], [21.0, 20.8], [19.9, 20.1]]}
    for m, g in groups.items():
        ref = sps.f_oneway(*g)
        assert out["anova"][m]["f"] == pytest.approx(ref.statistic, rel=1e-9)
        assert out["anova"][m]["p"] == pytest.approx(ref.pvalue, rel=1e-9)
    assert out["grr_anova"]["tolerance"] == 2.0


def test_sigma_pt_gives_z_by_its_definition(small, runner):
    # Three laboratories: a consensus of 3 supports no band, so the assigned value is the
    # reference laboratory l1's mean (10.2).
    res = run_cli(runner, "analyze", small, "--json", "--sigma-pt", "0.5",
                  "--reference-lab", "l1")
    out = json.loads(res.stdout)
    sc = out["scores"]["A"]
    assert sc["sigma_pt"] == 0.5 and sc["assigned_value"] == pytest.approx(10.2, rel=1e-12)
    # z = (x - x_pt) / sigma_pt on the laboratory mean (ISO 13528 §9; arithmetic here)
    mean_l2 = np.mean([10.6, 10.5])
    assert sc["labs"]["l2"]["z"] == pytest.approx((mean_l2 - 10.2) / 0.5)
    assert sc["labs"]["l1"]["reference"] is True and sc["labs"]["l1"]["z"] is None


def test_a_consensus_of_three_gives_no_band_and_says_why(small, runner):
    res = run_cli(runner, "analyze", small, "--sigma-pt", "0.5")
    assert res.exit_code == 0
    text = " ".join(res.stdout.split())
    assert "no z-score bands for A, B: the assigned value is the consensus of only 3" in text
    assert "name a reference laboratory" in text


def test_table_on_screen(small, runner):
    res = run_cli(runner, "analyze", small)
    assert res.exit_code == 0
    assert res.stdout.startswith("2 material(s), 3 laboratory(ies)")
    assert "gauge R&R, ANOVA" in res.stdout


def test_one_result_per_laboratory_scores_and_says_what_is_skipped(tmp_path, runner):
    path = tmp_path / "pt.csv"
    path.write_text(ONE_PER_LAB, encoding="utf-8")
    res = run_cli(runner, "analyze", path)
    assert res.exit_code == 0, res.stderr
    lines = res.stdout.splitlines()
    skipped = lines[lines.index("not computed") + 1:]
    assert len(skipped) == 3  # precision of A, and both gauge methods: one line each
    assert skipped[0].strip().startswith("precision A: one result per laboratory")
    assert all(s.startswith("  gauge R&R") for s in skipped[1:])
    out = json.loads(run_cli(runner, "analyze", path, "--json").stdout)
    assert set(out["scores"]["A"]["labs"]) == {"l1", "l2", "l3", "l4", "l5"}


@pytest.mark.parametrize("text, expected", [
    ("material,lab,value\nA,l1,1.0\n",
     "error: {path}:1: missing column 'trial' (the header has 'material', 'lab', 'value'); "
     "expected material, lab, trial, value and optionally uncertainty"),
    ("material,lab,trial,value\nA,l1,1,abc\n",
     "error: {path}:2: value: 'abc' is not a number; use digits with a decimal point, e.g. 12.5"),
], ids=["missing-column", "not-a-number"])
def test_bad_csv_is_one_line_and_exit_2(tmp_path, runner, text, expected):
    path = tmp_path / "bad.csv"
    path.write_text(text, encoding="utf-8")
    res = run_cli(runner, "analyze", path)
    assert res.exit_code == 2
    assert res.stderr.strip().splitlines() == [expected.format(path=path)]


def test_negative_sigma_pt_is_refused(small, runner):
    res = run_cli(runner, "analyze", small, "--sigma-pt", "-1")
    assert res.exit_code == 2
    assert res.stderr.strip() == "error: --sigma-pt -1.0 must be a number above 0"
