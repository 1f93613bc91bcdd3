"""The host's homogeneity and stability checks on a planned example round: the form, its
order from the round secret, recording, the verdicts, the shipping gate and the waiver."""

from __future__ import annotations

import numpy as np
import pytest

from conftest import SECRET, fill_check, plan_example_round
from planner import codes, homogeneity, spec
from planner.errors import IntakeError, PlannerError
from planner.ledger import Ledger

INHOMOGENEOUS = "RE-MIX"


@pytest.fixture
def round_(example_dir, clock):
    result = plan_example_round(example_dir, ship=False)
    checks = homogeneity.host_checks(result.units)
    return spec.load(example_dir), example_dir, checks


def _fill(text: str, values, checks, *, remark_for=None) -> str:
    """Fill the CSV check form: values(code, material, replicate) -> number or None; the
    form names no material, ``checks`` (code -> material) does."""
    return "\n".join(fill_check(text.splitlines(), checks,
                                lambda code, material, rep, run: values(code, material, rep),
                                remark=remark_for)) + "\n"


def _simulated(spread_of):
    rng = np.random.default_rng(5)
    unit_effect: dict[str, float] = {}

    def values(code, material, rep):
        truth = {"HD-BM5": 0.32, "LL-F1": 1.05, "PP-H12": 12.0, "PP-C8": 7.8, "RE-MIX": 2.6,
                 "PP-FR": 24.0}[material]
        if code not in unit_effect:
            unit_effect[code] = float(rng.normal(0, spread_of(material)))
        return truth * (1 + unit_effect[code] + float(rng.normal(0, 0.002)))
    return values


def test_the_form_lists_every_unit_twice_in_an_order_the_secret_rebuilds(round_):
    study, _, checks = round_
    assert len(checks["homogeneity"]) == 6 * study.design.homogeneity_units
    assert len(checks["stability"]) == 6 * study.design.retained_by_host
    text = homogeneity.form_text(study, "2027-1", "homogeneity", checks["homogeneity"], SECRET)
    rows = [ln.split(",") for ln in text.splitlines() if not ln.startswith("#")][1:]
    assert len(rows) == 2 * len(checks["homogeneity"])
    pairs = [(codes.compact(r[1]), int(r[2])) for r in rows]
    assert sorted(pairs) == sorted((c, k) for c in checks["homogeneity"] for k in (1, 2))
    assert pairs == homogeneity.run_order(SECRET, list(checks["homogeneity"]))
    # not material by material: the order mixes materials and replicates
    materials = [checks["homogeneity"][codes.compact(r[1])] for r in rows]
    assert sum(a != b for a, b in zip(materials, materials[1:])) > len(rows) / 2
    assert homogeneity.run_order(bytes(32), list(checks["homogeneity"])) != pairs


def test_record_assess_and_the_gate(round_, tmp_path):
    study, folder, checks = round_
    text = homogeneity.form_text(study, "2027-1", "homogeneity", checks["homogeneity"], SECRET)
    with Ledger.open(folder) as ledger:
        assert "not recorded yet" in homogeneity.shipping_gate(study, ledger, "2027-1", checks)
        # one material with a between-unit SD of 3 % against sigma_pt = 5 %: s_s >> 0.3 sigma_pt
        filled = tmp_path / "h.csv"
        filled.write_text(_fill(text, _simulated(
            lambda m: 0.03 if m == INHOMOGENEOUS else 0.0005), checks["homogeneity"]),
            encoding="utf-8")
        data = homogeneity.read_values(study, "2027-1", "homogeneity", checks["homogeneity"],
                                       filled)
        homogeneity.record(ledger, "2027-1", "homogeneity", data)
        found = homogeneity.assess(study, checks, ledger, "2027-1")
        per = found["measurands"]["value"]
        assert per[INHOMOGENEOUS]["verdict"] == "not sufficiently homogeneous"
        assert all(e["verdict"].startswith("sufficiently") for m, e in per.items()
                   if m != INHOMOGENEOUS)
        entry = per["PP-C8"]
        assert entry["sigma_pt"] == pytest.approx(0.05 * entry["mean"])
        assert "5 % of the homogeneity mean" in entry["sigma_pt_source"]
        assert entry["g"] == study.design.homogeneity_units and entry["F1"] == pytest.approx(
            homogeneity_f1(entry["g"]))
        gate = homogeneity.shipping_gate(study, ledger, "2027-1", checks)
        assert gate is not None and f"value/{INHOMOGENEOUS}: not sufficiently" in gate
        with pytest.raises(PlannerError, match="reason"):
            homogeneity.waive(ledger, "2027-1", "ok")
        homogeneity.waive(ledger, "2027-1", "batch RE-MIX re-blended; checked again by hand")
        assert homogeneity.shipping_gate(study, ledger, "2027-1", checks) is None
        assert homogeneity.waiver(ledger, "2027-1")["reason"].startswith("batch RE-MIX")


def homogeneity_f1(g):
    from scipy.stats import chi2

    return chi2.ppf(0.95, g - 1) / (g - 1)


def test_a_homogeneous_batch_opens_the_gate_and_stability_is_judged(round_, tmp_path):
    study, folder, checks = round_
    text = homogeneity.form_text(study, "2027-1", "homogeneity", checks["homogeneity"], SECRET)
    path = tmp_path / "h.csv"
    path.write_text(_fill(text, _simulated(lambda m: 0.0005), checks["homogeneity"]),
                    encoding="utf-8")
    later = homogeneity.form_text(study, "2027-1", "stability", checks["stability"], SECRET)
    drift = tmp_path / "s.csv"
    drift.write_text(_fill(later, lambda c, m, k: {"HD-BM5": 0.32, "LL-F1": 1.05,
                                                   "PP-H12": 12.0, "PP-C8": 7.8,
                                                   "RE-MIX": 2.6 * 1.04,  # 4 % lower MFR
                                                   "PP-FR": 24.0}[m], checks["stability"]),
                     encoding="utf-8")
    with Ledger.open(folder) as ledger:
        homogeneity.record(ledger, "2027-1", "homogeneity", homogeneity.read_values(
            study, "2027-1", "homogeneity", checks["homogeneity"], path))
        assert homogeneity.shipping_gate(study, ledger, "2027-1", checks) is None
        homogeneity.record(ledger, "2027-1", "stability", homogeneity.read_values(
            study, "2027-1", "stability", checks["stability"], drift))
        per = homogeneity.assess(study, checks, ledger, "2027-1")["measurands"]["value"]
    assert per["RE-MIX"]["stability"]["verdict"] == "not stable"
    assert per["PP-C8"]["stability"]["verdict"].startswith("stable")


def test_form_mistakes_are_located(round_, tmp_path):
    study, _, checks = round_
    text = homogeneity.form_text(study, "2027-1", "homogeneity", checks["homogeneity"], SECRET)
    good = _fill(text, _simulated(lambda m: 0.0005), checks["homogeneity"])
    lines = good.splitlines()
    first = next(i for i, ln in enumerate(lines) if not ln.startswith("#")) + 1
    cells = lines[first].split(",")
    cells[3] = ""  # run, code, replicate, value
    lines[first] = ",".join(cells)
    path = tmp_path / "blank.csv"
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    with pytest.raises(IntakeError) as info:
        homogeneity.read_values(study, "2027-1", "homogeneity", checks["homogeneity"], path)
    assert f"{path}:{first + 1}:" in str(info.value) and "is empty" in str(info.value)
    path.write_text(good.replace("# round: 2027-1", "# round: 2027-2"), encoding="utf-8")
    with pytest.raises(IntakeError, match="expected '2027-1'"):
        homogeneity.read_values(study, "2027-1", "homogeneity", checks["homogeneity"], path)
    path.write_text("\n".join(lines[:first] + lines[first + 1:]) + "\n", encoding="utf-8")
    with pytest.raises(IntakeError):
        homogeneity.read_values(study, "2027-1", "homogeneity", checks["homogeneity"], path)
