"""planner.stats: reading a long CSV, evaluating a whole table, the screen summary."""

from __future__ import annotations

import json
import subprocess
import sys

import numpy as np
import pytest

from planner import stats
from planner.errors import DataError


def _aiag_rows(read_table):
    # AIAG MSA 4th ed. example (from memory; see the data file header): materials = parts,
    # laboratories = appraisers, trials = trials.
    return [{"material": f"P{int(r['part']):02d}", "lab": r["appraiser"], "trial": r["trial"],
             "value": float(r["value"])} for r in read_table("aiag_msa4_average_range_example.csv")]


def test_result_has_the_documented_structure_and_is_json(read_table):
    result = stats.evaluate_table(_aiag_rows(read_table), tolerance=4.0)
    assert set(result) == {"materials", "labs", "anova", "grr_anova", "grr_range", "sources",
                           "precision", "scores"}
    assert result["labs"] == ["A", "B", "C"] and len(result["materials"]) == 10
    json.dumps(result, allow_nan=False)
    a = result["anova"]["P01"]
    assert set(a) >= {"ss_between", "ss_within", "df_between", "df_within", "ms_between",
                      "ms_within", "f", "p"}
    g = result["grr_anova"]
    assert set(g) >= {"table", "model", "repeatability_sd", "reproducibility_sd",
                      "laboratory_sd", "material_x_laboratory_sd", "grr_sd", "material_sd",
                      "total_sd", "pct_variance", "pct_tv", "pct_tolerance", "multiplier",
                      "ndc", "materials", "laboratories", "trials"}
    assert set(g["table"]) == {"material", "laboratory", "material_x_laboratory",
                               "repeatability", "total"}
    assert not set(g) & {"pct_study_variation", "pct_contribution", "part_sd", "operator_sd",
                         "interaction_sd", "parts", "operators"}
    assert g["model"] == "pooled"
    assert set(result["grr_range"]) >= {"laboratory_means", "laboratory_r_bar"}
    pr = result["precision"]["P01"]
    assert set(pr) >= {"s_r", "s_L", "s_R", "r", "R", "cells", "mandel_h", "mandel_k",
                       "indicators", "cochran", "grubbs"}
    assert set(pr["indicators"]) == {"h_5", "h_1", "k_5", "k_1"}
    sc = result["scores"]["P01"]
    assert set(sc) >= {"assigned_value", "u_assigned_value", "robust_sd", "sigma_pt",
                       "method", "labs"}
    assert set(sc["labs"]["A"]) >= {"mean", "z", "z_prime", "En", "band"}


def test_table_reproduces_the_aiag_average_and_range_result(read_table):
    # Same published (remembered) figures as tests/stats/test_gauge_rr.py.
    gr = stats.evaluate_table(_aiag_rows(read_table))["grr_range"]
    assert gr["ev"] == pytest.approx(0.20188, abs=1e-4)
    assert gr["av"] == pytest.approx(0.22963, abs=1e-4)
    assert gr["pct_grr"] == pytest.approx(26.7, abs=0.05) and gr["ndc"] == 5
    assert gr["range_check"]["flagged"] == [{"material": "P04", "laboratory": "B",
                                             "range": pytest.approx(1.02)}]


def test_a_plain_proficiency_round_is_scored_and_the_rest_skipped():
    rows = [{"material": "M1", "lab": f"L{i}", "trial": 1, "value": v}
            for i, v in enumerate([1.69, 0.74, 2.05, 1.14, 2.19, 1.39, 1.52, 1.50])]
    result = stats.evaluate_table(rows, sigma_pt=0.4)
    json.dumps(result, allow_nan=False)
    sc = result["scores"]["M1"]
    assert sc["sigma_pt"] == 0.4 and sc["labs"]["L4"]["band"] == "satisfactory"
    for part in (result["anova"]["M1"], result["precision"]["M1"], result["grr_anova"],
                 result["grr_range"]):
        assert set(part) == {"skipped"} and "\n" not in part["skipped"]
    assert "replicates" in result["precision"]["M1"]["skipped"]


def test_unbalanced_table_skips_the_gauge_study_but_not_precision():
    rng = np.random.default_rng(1)
    rows = [{"material": m, "lab": lab, "trial": t, "value": float(rng.normal())}
            for m in ("M1", "M2") for lab in ("A", "B", "C") for t in (1, 2)]
    rows.append({"material": "M1", "lab": "A", "trial": 3, "value": 0.1})
    result = stats.evaluate_table(rows)
    assert "same number of trials" in result["grr_anova"]["skipped"]
    assert result["grr_range"] == result["grr_anova"]
    assert result["precision"]["M1"]["cells"]["A"]["n"] == 3


def test_sigma_pt_by_material_and_reference_lab():
    rows = [{"material": m, "lab": lab, "trial": 1, "value": v, "uncertainty": 0.2}
            for m in ("M1", "M2") for lab, v in (("R", 5.0), ("A", 5.5), ("B", 4.0))]
    result = stats.evaluate_table(rows, sigma_pt={"M1": 0.5}, assigned="reference",
                                  reference_lab="R")
    m1, m2 = result["scores"]["M1"], result["scores"]["M2"]
    assert m1["assigned_value"] == 5.0 and m1["labs"]["A"]["z"] == pytest.approx(1.0)
    assert m2["sigma_pt_source"].startswith("robust SD")
    assert m1["labs"]["A"]["En"] == pytest.approx(0.5 / np.sqrt(0.08))


def test_bad_tables_raise_data_errors():
    with pytest.raises(DataError, match="no results"):
        stats.evaluate_table([])
    with pytest.raises(DataError, match="did you mean 'L1'"):
        stats.check_reference([stats.Row("M", "L1", "1", 1.0)], "L11")
    with pytest.raises(DataError, match="needs a reference laboratory"):
        stats.evaluate_table([{"material": "M", "lab": "L1", "trial": 1, "value": 1.0}],
                             assigned="reference")
    with pytest.raises(DataError, match="not a finite number"):
        stats.evaluate_table([{"material": "M", "lab": "L1", "trial": 1, "value": float("nan")}])
    with pytest.raises(DataError, match="no 'lab'"):
        stats.evaluate_table([{"material": "M", "trial": 1, "value": 1.0}])
    with pytest.raises(DataError, match="appears twice"):
        stats.evaluate_table([stats.Row("M", "L", "1", 1.0), stats.Row("M", "L", "1", 2.0)])


# --- read_long_csv ----------------------------------------------------------------------

def _write(tmp_path, text):
    path = tmp_path / "results.csv"
    path.write_text(text, encoding="utf-8")
    return path


def test_read_long_csv_reads_rows_ignoring_comments_and_extra_columns(tmp_path):
    path = _write(tmp_path, "# exported by hand\nmaterial,lab,trial,value,uncertainty,note\n"
                            "M1,L1,1,10.5,0.2,ok\n\nM1,L2,1,10.7,,late\n")
    rows = stats.read_long_csv(path)
    assert rows == [stats.Row("M1", "L1", "1", 10.5, 0.2, 3),
                    stats.Row("M1", "L2", "1", 10.7, None, 5)]


@pytest.mark.parametrize("text, message", [
    ("", "{f}:1: the file is empty; expected a header line 'material,lab,trial,value' "
         "and one line per result"),
    ("material,lab,value\nM1,L1,1.0\n",
     "{f}:1: missing column 'trial' (the header has 'material', 'lab', 'value'); expected "
     "material, lab, trial, value and optionally uncertainty"),
    ("material,lab,trial,value\nM1,L1,1,1.0\nM1,L2,1,abc\n",
     "{f}:3: value: 'abc' is not a number; use digits with a decimal point, e.g. 12.5"),
    ("material,lab,trial,value\nM1,L1,1,\n",
     "{f}:2: value: is empty; expected a number (remove the line if there is no result)"),
    ("material,lab,trial,value\nM1,L1,1,2\nM1,L1,1,3\n",
     "{f}:3: material 'M1', lab 'L1', trial '1' appears twice (first on line 2)"),
    ("material,lab,trial,value\n", "{f}:1: the file has a header but no results"),
    ("material,lab,trial,value,uncertainty\nM1,L1,1,2,-1\n",
     "{f}:2: uncertainty: '-1' is negative; an expanded uncertainty is 0 or more"),
], ids=["empty", "missing-column", "not-a-number", "blank-value", "duplicate", "no-rows",
        "negative-u"])
def test_read_long_csv_errors_are_one_line_with_file_and_line(tmp_path, text, message):
    path = _write(tmp_path, text)
    with pytest.raises(DataError) as err:
        stats.read_long_csv(path)
    assert str(err.value) == message.format(f=path)


def test_read_long_csv_missing_file(tmp_path):
    with pytest.raises(DataError, match="cannot read the file"):
        stats.read_long_csv(tmp_path / "nope.csv")


# --- summary ----------------------------------------------------------------------------

def test_summary_text_has_aligned_columns(read_table):
    text = stats.summary_text(stats.evaluate_table(_aiag_rows(read_table)))
    lines = text.splitlines()
    head = next(i for i, ln in enumerate(lines) if ln.startswith("material"))
    block = lines[head:head + 11]
    col = block[0].index("x_pt")
    assert all(len(ln) > col and ln[col - 2:col] == "  " and ln[col] != " " for ln in block)
    assert "ndc 5" in text and "above UCL_R" in text


def test_summary_text_gives_grr_against_tv_and_k_grr_against_the_tolerance(read_table):
    result = stats.evaluate_table(_aiag_rows(read_table), tolerance=4.0)
    ga = result["grr_anova"]
    text = stats.summary_text(result)
    assert f"%GRR {ga['pct_tv']['grr']:.3g} (100 GRR/TV)" in text
    assert f"6 GRR = {ga['pct_tolerance']['grr']:.3g} % of the tolerance 4" in text
    assert "study variation" not in text and "part sd" not in text


def test_importing_the_package_leaves_numpy_unloaded():
    probe = ("import sys, planner.stats; heavy = {'numpy', 'scipy', 'statsmodels'}; "
             "print(sorted(heavy & {m.partition('.')[0] for m in sys.modules}))")
    run = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True, check=True)
    assert run.stdout.strip() == "[]"
