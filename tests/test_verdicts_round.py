"""Verdicts through a whole round: what the report, statistics.json and letters say when the
data cannot support a band, when a material has its own sigma_pt, and with a reference
laboratory (scored against nobody, or absent)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from conftest import PASSPHRASE, SECRET
from planner import audit, evaluate, results, spec
from planner import plan as planning
from planner.ledger import Ledger

ROUND = "2027-1"
POLICY = "  sigma_pt: {percent: 5}\n"


def _round(folder: Path, evaluation: str, *, drop: str | None = None,
           assigned: str = "consensus"):
    """Plan the example with ``evaluation`` lines in place of its sigma_pt, feed results
    (crx 20 % high; ``drop``: a laboratory whose results are left out), evaluate."""
    from test_evaluate import _records

    path = folder / "study.yaml"
    text = path.read_text(encoding="utf-8")
    assert POLICY in text
    text = text.replace("  assigned_value: consensus\n", f"  assigned_value: {assigned}\n")
    path.write_text(text.replace(POLICY, evaluation), encoding="utf-8")
    study = spec.load(folder)
    dates, route = planning.dates_for(study, "kal")
    result = planning.plan_round(study, round_id=ROUND, host="kal", dates=dates, secret=SECRET,
                                 route=route)
    records = [r for r in _records(result, shift={"crx": 0.2}) if r["lab"] != drop]
    with Ledger.open(folder) as ledger:
        planning.write_round(study, folder, result, ledger, passphrase=PASSPHRASE)
        audit.unseal_round(study, folder, ROUND, ledger, passphrase=PASSPHRASE,
                           force=True, reason="test")
        out = evaluate.evaluate_round(study, folder, ROUND, ledger, results=records)
    stats = json.loads((out / evaluate.STATISTICS_NAME).read_text(encoding="utf-8"))
    return out, results.measurand_view(stats, "value")  # the single-measurand form


def _text(path: Path) -> str:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)


def test_five_laboratories_get_no_band_from_their_own_spread(example_dir):
    out, s = _round(example_dir, "  sigma_pt: participants\n")
    for m in s["materials"]:
        sc = s["scores"][m]
        assert sc["banded"] is False and sc["sigma_pt"] is None
        assert "only 5 participants" in sc["no_band"] and "fewer than 8" in sc["no_band"]
        assert all(e["z"] is None and e["band"] is None for e in sc["labs"].values())
        # D% is still there: crx reads about 20 % high against a consensus it pulls up.
        assert 10 < sc["labs"]["crx"]["D_percent"] < 25
    report = _text(out / evaluate.REPORT_NAME)
    assert "no z-score bands for any material: sigma_pt would be the robust SD of only 5" in report
    assert "every laboratory is in the satisfactory band" not in report
    letter = _text(out / "letter-crx.pdf")
    assert "No z score of this round carries a band" in letter
    assert "scores satisfactory" not in letter  # no count of bands that were never given
    assert "no band" in letter


def test_a_material_keeps_its_own_sigma_pt(example_dir):
    own = POLICY + "  by_material:\n    PP-H12: {sigma_pt: 0.5}\n"
    _, s = _round(example_dir, own)
    assert s["scores"]["PP-H12"]["sigma_pt"] == 0.5
    assert s["settings"]["sigma_pt"]["PP-H12"].startswith("fixed at 0.5")
    x_pt = s["scores"]["HD-BM5"]["assigned_value"]
    assert s["scores"]["HD-BM5"]["sigma_pt"] == pytest.approx(0.05 * x_pt, rel=1e-12)
    assert s["settings"]["sigma_pt"]["HD-BM5"] == "5 % of the assigned value"


def test_the_reference_laboratory_is_not_scored_against_itself(example_dir):
    out, s = _round(example_dir, POLICY, assigned="reference")
    for m in s["materials"]:
        kal = s["scores"][m]["labs"]["kal"]
        assert kal["reference"] is True and kal["z"] is None and kal["band"] is None
        assert s["scores"][m]["assigned_value"] == pytest.approx(kal["mean"], rel=1e-12)
    assert "Your laboratory is the reference" in _text(out / "letter-kal.pdf")
    assert "Your laboratory is the reference" not in _text(out / "letter-crx.pdf")


def test_a_reference_laboratory_without_results_leaves_the_rest_of_the_round(example_dir):
    out, s = _round(example_dir, POLICY, assigned="reference", drop="kal")
    for m in s["materials"]:
        why = s["scores"][m]["skipped"]
        assert "reference laboratory 'kal' has no result" in why and "consensus" in why
        assert "s_R" in s["precision"][m]  # the precision statistics still stand
    assert (out / evaluate.REPORT_NAME).is_file()
