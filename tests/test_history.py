"""Tests for planner.history: per-laboratory record over rounds and the host-effect estimate.

The statistics files are written here by hand (the fields ``evaluate`` writes:
``host``, ``round``, ``materials``, ``scores.<material>.assigned_value``,
``use_z_prime`` and ``labs.<lab>.mean/z/z_prime``), and their SHA-256 recorded
in the study's ledger as an "evaluated" event, as ``evaluate`` records it
(history reads no other file; tests/test_disclosure.py refuses the others);
expected means are worked out in the comments. One test feeds the real output of
planner.stats in.
"""

from __future__ import annotations

import hashlib
import json
from pathlib import Path

import pytest

from planner import history
from planner.errors import DataError


def _score(assigned: float, labs: dict[str, tuple[float, float]], *, prime: bool = False) -> dict:
    return {"assigned_value": assigned, "use_z_prime": prime,
            "labs": {lab: {"mean": mean, "z": None if prime else z, "z_prime": z if prime else None}
                     for lab, (mean, z) in labs.items()}}


def record_evaluation(study: Path, round_id: str) -> None:
    """Record in the study's ledger that ``evaluate`` wrote the round's statistics.json."""
    from planner.ledger import Ledger

    path = study / "rounds" / round_id / "report" / "statistics.json"
    with Ledger.open(study) as ledger, ledger.transaction():
        ledger.record_event(round_id, "evaluated", {
            "statistics_sha256": hashlib.sha256(path.read_bytes()).hexdigest()})


def _collect(study: Path, **options) -> dict:
    from planner.ledger import Ledger

    with Ledger.open(study) as ledger:
        return history.collect(study, ledger, **options)


def _write_round(study: Path, round_id: str, host: str, test_start: str | None,
                 scores: dict) -> None:
    from planner.ledger import Ledger

    Ledger.open(study).close()  # the ledger exists before any manifest, as after 'ringplan plan'
    folder = study / "rounds" / round_id
    (folder / "report").mkdir(parents=True)
    (folder / "report" / "statistics.json").write_text(json.dumps(
        {"round": round_id, "host": host, "materials": list(scores), "scores": scores}))
    record_evaluation(study, round_id)
    if test_start is not None:
        (folder / "manifest.json").write_text(json.dumps(
            {"round": round_id, "host": host, "dates": {"test_start": test_start}}))


@pytest.fixture
def four_rounds(tmp_path: Path) -> Path:
    # Lab 'a' hosts r1 and r3; 'b' hosts r2 and r4. Material M at 10.0, N at 20.0.
    _write_round(tmp_path, "r1", "a", "2026-01-10", {
        "M": _score(10.0, {"a": (10.5, 1.0), "b": (9.0, -2.0)}),
        "N": _score(20.0, {"a": (21.0, 2.0), "b": (20.0, 0.0)})})
    _write_round(tmp_path, "r2", "b", "2026-04-10", {
        "M": _score(10.0, {"a": (10.0, 0.0), "b": (10.1, 0.2)}),
        "N": _score(20.0, {"a": (19.0, -1.0), "b": (20.2, 0.4)})})
    _write_round(tmp_path, "r3", "a", "2026-07-10", {
        "M": _score(10.0, {"a": (11.0, 3.0), "b": (10.0, 0.0)}),
        "N": {"skipped": "too few results"}})
    _write_round(tmp_path, "r4", "b", "2026-10-10", {
        "M": _score(10.0, {"a": (9.5, -1.0), "b": (10.0, 0.0)}, prime=True),
        "N": _score(20.0, {"a": (20.0, 0.0), "b": (20.4, 0.8)})})
    return tmp_path


def test_each_round_of_each_laboratory_with_hosted_rounds_marked(four_rounds):
    record = _collect(four_rounds, labs=["b", "a"])
    assert [r["round"] for r in record["rounds"]] == ["r1", "r2", "r3", "r4"]
    assert [r["host"] for r in record["rounds"]] == ["a", "b", "a", "b"]
    assert list(record["labs"]) == ["b", "a"]
    a = record["labs"]["a"]
    assert a["hosted"] == ["r1", "r3"]
    r1 = a["rounds"]["r1"]
    assert r1["hosted"] is True
    assert r1["materials"]["M"] == {"z": 1.0, "score": "z", "bias": 0.5, "bias_pct": 5.0}
    assert r1["mean_abs_z"] == pytest.approx(1.5)             # (1 + 2) / 2
    assert r1["mean_z"] == pytest.approx(1.5)
    assert r1["mean_bias_pct"] == pytest.approx(5.0)          # (5 % + 5 %) / 2
    assert list(a["rounds"]["r3"]["materials"]) == ["M"]      # N skipped that round
    assert a["rounds"]["r4"]["materials"]["M"]["score"] == "z'"
    assert a["rounds"]["r4"]["materials"]["M"]["z"] == -1.0


def test_host_effect_per_laboratory_and_pooled(four_rounds):
    effect = _collect(four_rounds, labs=["a", "b"])["host_effect"]
    a = effect["labs"]["a"]
    # Hosting r1 (|z| 1.5, bias 5 %) and r3 (3.0, 10 %): 2.25 and 7.5 %.
    # Not hosting r2 (|z| 0.5, bias (0 - 5) / 2 = -2.5 %) and r4 (0.5, (-5 + 0) / 2 = -2.5 %).
    assert a["hosting"]["rounds"] == 2 and a["not_hosting"]["rounds"] == 2
    assert a["hosting"]["mean_abs_z"] == pytest.approx(2.25)
    assert a["not_hosting"]["mean_abs_z"] == pytest.approx(0.5)
    assert a["difference"]["mean_abs_z"] == pytest.approx(1.75)
    assert a["hosting"]["mean_bias_pct"] == pytest.approx(7.5)
    assert a["difference"]["mean_bias_pct"] == pytest.approx(10.0)
    assert a["statement"].startswith("laboratory 'a': mean |z| 2.25 over 2 rounds hosting "
                                     "against 0.50 over 2 not hosting (+1.75)")
    # b hosting r2 (|z| 0.3) and r4 (0.4) -> 0.35; not hosting r1 (1.0) and r3 (0.0) -> 0.5.
    assert effect["labs"]["b"]["difference"]["mean_abs_z"] == pytest.approx(-0.15)
    pooled = effect["pooled"]
    assert pooled["hosting"]["rounds"] == 4
    assert pooled["hosting"]["mean_abs_z"] == pytest.approx((1.5 + 3.0 + 0.3 + 0.4) / 4)
    assert pooled["not_hosting"]["mean_abs_z"] == pytest.approx((0.5 + 0.5 + 1.0 + 0.0) / 4)


def test_too_few_rounds_are_said_plainly(tmp_path):
    _write_round(tmp_path, "r1", "a", "2026-01-10", {"M": _score(10.0, {"a": (10.5, 1.0),
                                                                       "b": (9.0, -2.0)})})
    _write_round(tmp_path, "r2", "b", "2026-04-10", {"M": _score(10.0, {"a": (10.0, 0.0),
                                                                       "b": (10.1, 0.2)})})
    effect = _collect(tmp_path)["host_effect"]
    assert effect["labs"]["a"]["difference"] is None
    assert effect["labs"]["a"]["statement"] == (
        "too few rounds to say anything about laboratory 'a': 1 round hosting and 1 not "
        "hosting; at least 2 of each are needed")
    assert effect["pooled"]["statement"].startswith("all hosts together: mean |z|")


def test_rounds_are_ordered_by_test_start_not_by_name(tmp_path):
    _write_round(tmp_path, "b-first", "a", "2025-01-10", {"M": _score(1.0, {"a": (1.0, 0.0)})})
    _write_round(tmp_path, "a-later", "a", "2026-01-10", {"M": _score(1.0, {"a": (1.0, 0.0)})})
    assert [r["round"] for r in _collect(tmp_path)["rounds"]] == ["b-first", "a-later"]


def test_no_rounds_gives_an_empty_record(tmp_path):
    record = _collect(tmp_path, labs=["a"])
    assert record["rounds"] == [] and record["labs"]["a"]["rounds"] == {}
    assert record["host_effect"]["labs"] == {}


def test_unreadable_statistics_is_a_data_error(tmp_path):
    folder = tmp_path / "rounds" / "r1" / "report"
    folder.mkdir(parents=True)
    (folder / "statistics.json").write_text("{not json")
    record_evaluation(tmp_path, "r1")
    with pytest.raises(DataError, match="not valid JSON"):
        _collect(tmp_path)


def test_reads_the_score_structure_planner_stats_writes(tmp_path):
    from planner import stats

    values = {"a": (2.30, 2.34), "b": (2.00, 2.02), "c": (2.10, 2.06), "d": (1.98, 2.04)}
    rows = [{"material": "M", "lab": lab, "trial": str(t + 1), "value": v, "uncertainty": None}
            for lab, pair in values.items() for t, v in enumerate(pair)]
    scores = stats.evaluate_table(rows, sigma_pt=0.1)["scores"]
    _write_round(tmp_path, "r1", "a", "2026-01-10", scores)
    got = _collect(tmp_path)["labs"]["a"]["rounds"]["r1"]["materials"]["M"]
    assigned = scores["M"]["assigned_value"]
    # The score the band is read from: z' when the round used it (here u(x_pt) is large).
    prime = scores["M"]["use_z_prime"]
    assert got["z"] == scores["M"]["labs"]["a"]["z_prime" if prime else "z"]
    assert got["score"] == ("z'" if prime else "z")
    # Bias from the raw values: mean of a's two results minus the assigned value.
    assert got["bias"] == pytest.approx((2.30 + 2.34) / 2 - assigned)
    assert got["bias_pct"] == pytest.approx(100 * ((2.30 + 2.34) / 2 - assigned) / assigned)




# --- through the command line ------------------------------------------------------

EXAMPLE = Path(__file__).resolve().parent.parent / "examples" / "norrvik-mfr"


def _run(*args):
    from typer.testing import CliRunner

    from planner.cli import app

    return CliRunner().invoke(app, [str(a) for a in args])


def test_history_command_prints_json_and_writes_the_page(tmp_path):
    (tmp_path / "study.yaml").write_text((EXAMPLE / "study.yaml").read_text(encoding="utf-8"),
                                         encoding="utf-8")
    _write_round(tmp_path, "2027-1", "kal", "2027-01-19",
                 {"HD-BM5": _score(10.0, {"kal": (10.5, 1.0), "crx": (9.0, -2.0)})})
    result = _run("history", tmp_path, "--json")
    assert result.exit_code == 0, result.output
    data = json.loads(result.stdout)
    assert list(data["labs"]) == ["kal", "tor", "hel", "lin", "crx"]   # the spec's order
    assert data["labs"]["kal"]["hosted"] == ["2027-1"]
    assert (tmp_path / "history.pdf").read_bytes().startswith(b"%PDF")


def test_history_command_reports_a_broken_file_in_one_line(tmp_path):
    (tmp_path / "study.yaml").write_text((EXAMPLE / "study.yaml").read_text(encoding="utf-8"),
                                         encoding="utf-8")
    folder = tmp_path / "rounds" / "2027-1" / "report"
    folder.mkdir(parents=True)
    (folder / "statistics.json").write_text("{not json")
    record_evaluation(tmp_path, "2027-1")
    result = _run("history", tmp_path, "--no-pdf")
    assert result.exit_code == 2
    assert result.stderr == (f"error: {folder / 'statistics.json'}: the file is not valid JSON; "
                             "evaluate the round again\n")
