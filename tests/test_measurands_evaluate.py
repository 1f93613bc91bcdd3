"""Evaluation of a round with several measurands: per measurand and material, against
computations written here from the published formulas.

The study is the example's five laboratories and six materials, with three measurands
in place of the one: melt flow rate (``mfr``; PP-H12 and LL-F1 have known values, as a
certified reference material would give them), density (``density``, fixed sigma_pt,
expanded uncertainties required) and ash content (``ash``, only on RE-MIX and PP-FR).
The results are drawn with numpy from a known model (true value per measurand and
material, a bias per laboratory and measurand, normal repeatability) and rounded to each
measurand's resolution, as a laboratory reports them. Independent checks, each named
beside it:

- s_r and s_R per material: one-way ANOVA by statsmodels (``ols`` + ``anova_lm``), with
  s_L^2 = (MS_between - MS_within) / n0, n0 = (N - sum n_i^2 / N) / (p - 1), the
  unbalanced one-way random-effects estimator that ISO 5725-2 §7.4 reduces to;
- the consensus: Algorithm A of ISO 13528:2015 Annex C.3.1 written again in plain numpy
  (start median and 1.483 MAD, winsorize at 1.5 s*, s* = 1.134 SD), u(x_pt) = 1.25 s*/sqrt(p);
- z, z' and En against the known values by hand from ISO 13528 §9 (z = (x - x_pt)/sigma_pt,
  z' = (x - x_pt)/sqrt(sigma_pt^2 + u^2(x_pt)) when u(x_pt) > 0.3 sigma_pt, En = (x -
  x_pt)/sqrt(U_lab^2 + U(x_pt)^2), U(x_pt) = 2 u(x_pt));
- the gauge study's sums of squares: statsmodels' two-way ANOVA with interaction.
"""

from __future__ import annotations

import csv
import json
import math
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from conftest import EXAMPLE, PASSPHRASE, SECRET, run_cli
from planner import audit, circulate, evaluate, history, language, results, spec, stats
from planner import plan as planning
from planner.errors import DataError
from planner.ledger import Ledger
from planner.render import letter, report
from planner.stats import iso13528

ROUND = "2027-1"
HOST = "kal"
MATERIALS = ("HD-BM5", "LL-F1", "PP-H12", "PP-C8", "RE-MIX", "PP-FR")
ASH_ON = ("RE-MIX", "PP-FR")
KNOWN = {"PP-H12": (12.1, 0.05, "certificate of CRM NV-12"), "LL-F1": (1.0, 0.03, "")}

MEASURANDS = """
measurands:
  - id: mfr
    name: melt mass-flow rate, 190 °C / 2.16 kg
    unit: g/10 min
    resolution: 0.01
    method: ISO 1133-1
    evaluation:
      tolerance: 4.0
      sigma_pt: {percent: 5}
      by_material:
        PP-H12: {known_value: {value: 12.1, u: 0.05, source: certificate of CRM NV-12}}
        LL-F1: {known_value: {value: 1.0, u: 0.03}}
  - id: density
    name: density, 23 °C
    unit: g/cm3
    resolution: 0.0001
    uncertainty: required
    evaluation:
      sigma_pt: 0.002
  - id: ash
    name: ash content
    unit: "%"
    resolution: 0.01
    materials: [RE-MIX, PP-FR]
    uncertainty: none
    evaluation:
      sigma_pt: {percent: 6}
"""
# The model the results are drawn from.
TRUE = {"mfr": {"HD-BM5": 0.31, "LL-F1": 1.02, "PP-H12": 12.2, "PP-C8": 7.9, "RE-MIX": 2.6,
                "PP-FR": 24.0},
        "density": {"HD-BM5": 0.955, "LL-F1": 0.919, "PP-H12": 0.905, "PP-C8": 0.900,
                    "RE-MIX": 0.938, "PP-FR": 1.042},
        "ash": {"RE-MIX": 1.8, "PP-FR": 21.5}}
BIAS = {"mfr": {"kal": 0.01, "tor": -0.01, "hel": 0.0, "lin": 0.02, "crx": -0.015},
        "density": {"kal": 0.0002, "tor": -0.0003, "hel": 0.0, "lin": 0.0001, "crx": 0.009},
        "ash": {"kal": 0.01, "tor": -0.02, "hel": 0.0, "lin": 0.015, "crx": -0.01}}
RELATIVE = {"mfr": True, "density": False, "ash": True}  # bias and SD relative or absolute
SD = {"mfr": 0.006, "density": 0.0004, "ash": 0.01}
DECIMALS = {"mfr": 2, "density": 4, "ash": 2}
BLANK = ("density", "PP-C8", "tor", 2)  # reported blank, with a remark


def _spec_text() -> str:
    text = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    text = re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", text)
    head, _, rest = text.partition("\nevaluation:\n")
    tail = rest[rest.index("\nhistory:"):]
    return head + "\n" + MEASURANDS + tail


def _decimal(x: float, places: int) -> float:
    return float(f"{x:.{places}f}")


def _records(result) -> list[dict]:
    """One record per test unit with a measurement of every measurand of its material."""
    rng = np.random.default_rng(15)
    out = []
    for u in result.units:
        if u.kind != "test":
            continue
        measurements = {}
        for m in ("mfr", "density", "ash"):
            if m == "ash" and u.material not in ASH_ON:
                continue
            true = TRUE[m][u.material]
            if RELATIVE[m]:
                x = true * (1 + BIAS[m][u.lab] + rng.normal(0, SD[m]))
            else:
                x = true + BIAS[m][u.lab] + rng.normal(0, SD[m])
            value = _decimal(x, DECIMALS[m])
            unc = {"mfr": _decimal(0.04 * value, 3), "density": 0.0006, "ash": None}[m]
            if (m, u.material, u.lab, u.trial) == BLANK:
                value, unc = None, None
            measurements[m] = (value, unc)
        out.append({"lab": u.lab, "code": u.code, "value": None, "uncertainty": None,
                    "remarks": "balance out of order" if "density" in measurements
                    and measurements["density"][0] is None else "",
                    "measurements": measurements})
    return out


@pytest.fixture(scope="module")
def round3(tmp_path_factory):
    """The 3-measurand round planned, unsealed and evaluated (report and letters written)."""
    folder = tmp_path_factory.mktemp("measurands") / "study"
    shutil.copytree(EXAMPLE, folder)
    (folder / "study.yaml").write_text(_spec_text(), encoding="utf-8")
    study = spec.load(folder)
    dates, route = planning.dates_for(study, HOST)
    result = planning.plan_round(study, round_id=ROUND, host=HOST, dates=dates, secret=SECRET,
                                 route=route)
    records = _records(result)
    with Ledger.open(folder) as ledger:
        planning.write_round(study, folder, result, ledger, passphrase=PASSPHRASE)
        audit.unseal_round(study, folder, ROUND, ledger, passphrase=PASSPHRASE, force=True,
                           reason="test")
        out = evaluate.evaluate_round(study, folder, ROUND, ledger, results=records, workers=1)
    raw = json.loads((out / evaluate.STATISTICS_NAME).read_text(encoding="utf-8"))
    units = {u.code: u for u in result.units}
    return {"study": study, "folder": folder, "out": out, "stats": raw, "records": records,
            "units": units, "key": planning.key_of(result)}


def _values(r, measurand, material, lab=None):
    """The values of a measurand on a material from the records, per laboratory."""
    out: dict[str, list[float]] = {}
    for rec in r["records"]:
        u = r["units"][rec["code"]]
        pair = rec["measurements"].get(measurand)
        if u.material != material or pair is None or pair[0] is None:
            continue
        out.setdefault(u.lab, []).append(pair[0])
    return out if lab is None else out[lab]


def _uncertainties(r, measurand, material):
    out: dict[str, list[float]] = {}
    for rec in r["records"]:
        u = r["units"][rec["code"]]
        pair = rec["measurements"].get(measurand)
        if u.material == material and pair is not None and pair[1] is not None:
            out.setdefault(u.lab, []).append(pair[1])
    return out


def _algorithm_a(x):
    """ISO 13528:2015 Annex C.3.1, written again here: returns (x*, s*)."""
    x = np.asarray(x, dtype=float)
    xs = float(np.median(x))
    s = 1.483 * float(np.median(np.abs(x - xs)))
    for _ in range(10_000):
        delta = 1.5 * s
        w = np.clip(x, xs - delta, xs + delta)
        new_x, new_s = float(w.mean()), 1.134 * float(w.std(ddof=1))
        if abs(new_x - xs) <= 1e-14 * max(1.0, abs(new_x)) and abs(new_s - s) <= 1e-14 * new_s:
            return new_x, new_s
        xs, s = new_x, new_s
    return xs, s


# --- unblinding ---------------------------------------------------------------------------

def test_unblind_gives_one_row_per_measurement(round3):
    rows = evaluate.unblind(round3["key"], round3["records"])
    n_units = len(round3["records"])
    ash_units = sum(1 for rec in round3["records"] if "ash" in rec["measurements"])
    assert len(rows) == 2 * n_units + ash_units
    assert {r.measurand for r in rows} == {"mfr", "density", "ash"}
    assert {r.material for r in rows if r.measurand == "ash"} == set(ASH_ON)
    by = {(r.code, r.measurand): r for r in rows}
    for rec in round3["records"]:
        for m, (value, unc) in rec["measurements"].items():
            row = by[(rec["code"], m)]
            assert (row.value, row.uncertainty) == (value, unc)
            assert row.material == round3["units"][rec["code"]].material


def test_unblind_refuses_a_measurement_that_is_not_a_pair(round3):
    bad = dict(round3["records"][0], measurements={"mfr": 1.5})
    with pytest.raises(DataError, match=r"for measurand 'mfr' is 1.5, not a \(value, "
                                         r"uncertainty\) pair"):
        evaluate.unblind(round3["key"], [bad])


def test_round_statistics_refuse_a_measurand_the_study_or_material_does_not_have(round3):
    rows = evaluate.unblind(round3["key"], round3["records"])
    other = next(r for r in rows if r.measurand == "mfr")
    stray = results.Unblinded(other.material, other.lab, other.trial, other.code, 1.0, None,
                              (), "colour")
    with pytest.raises(DataError, match="measurand 'colour', which this study does not have"):
        evaluate.round_statistics(round3["study"], round3["key"], [*rows, stray])
    off = next(r for r in rows if r.material == "HD-BM5")
    wrong = results.Unblinded("HD-BM5", off.lab, off.trial, off.code, 1.0, None, (), "ash")
    with pytest.raises(DataError, match="'ash', which is not measured on material 'HD-BM5'"):
        evaluate.round_statistics(round3["study"], round3["key"], [*rows, wrong])


# --- statistics.json ----------------------------------------------------------------------

def test_statistics_json_has_a_block_per_measurand_in_spec_order(round3):
    s = round3["stats"]
    assert s["format"] == "ringplan-statistics/3"
    assert list(s["measurands"]) == ["mfr", "density", "ash"]
    mfr, density, ash = (s["measurands"][m] for m in ("mfr", "density", "ash"))
    assert (mfr["name"], mfr["unit"], mfr["resolution"], mfr["method"]) == (
        "melt mass-flow rate, 190 °C / 2.16 kg", "g/10 min", 0.01, "ISO 1133-1")
    assert mfr["materials"] == list(MATERIALS) and ash["materials"] == list(ASH_ON)
    assert ash["measured_on"] == list(ASH_ON)
    assert set(ash["scores"]) == set(ASH_ON) and set(ash["precision"]) == set(ASH_ON)
    # counts: every value of every measurand at the top, each measurand's own below
    n_labs, trials = 5, 3
    assert mfr["results"]["count"] == 6 * n_labs * trials
    assert density["results"]["count"] == 6 * n_labs * trials - 1  # the blank one
    assert ash["results"]["count"] == 2 * n_labs * trials
    assert s["results"]["count"] == sum(b["results"]["count"] for b in s["measurands"].values())
    assert "known from outside the round" in s["sources"]["iso13528"]
    assert "measurand" not in s and "scores" not in s


def test_a_blank_measurement_is_missing_under_its_measurand(round3):
    missing = round3["stats"]["results"]["missing"]
    m, material, lab, trial = BLANK
    assert [(d["measurand"], d["material"], d["lab"], d["trial"], d["why"]) for d in missing] == [
        (m, material, lab, trial, "reported without a value")]
    assert results.measurand_view(round3["stats"], "mfr")["results"]["missing"] == []


@pytest.mark.parametrize("measurand", ["mfr", "density", "ash"])
def test_repeatability_and_reproducibility_match_statsmodels(round3, measurand):
    import pandas as pd
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    block = round3["stats"]["measurands"][measurand]
    for material in block["materials"]:
        by_lab = _values(round3, measurand, material)
        frame = pd.DataFrame([{"lab": lab, "y": v} for lab, vs in by_lab.items() for v in vs])
        table = anova_lm(smf.ols("y ~ C(lab)", data=frame).fit())
        ms_between, ms_within = table["mean_sq"].iloc[0], table["mean_sq"].iloc[1]
        counts = np.array([len(vs) for vs in by_lab.values()], dtype=float)
        big_n, p = counts.sum(), len(counts)
        n0 = (big_n - (counts ** 2).sum() / big_n) / (p - 1)
        s_r = math.sqrt(ms_within)
        s_l2 = max(0.0, (ms_between - ms_within) / n0)
        pr = block["precision"][material]
        assert pr["s_r"] == pytest.approx(s_r, rel=1e-9), material
        assert pr["s_R"] == pytest.approx(math.sqrt(s_r ** 2 + s_l2), rel=1e-9), material


@pytest.mark.parametrize("measurand", ["mfr", "density", "ash"])
def test_consensus_and_scores_match_algorithm_a_by_hand(round3, measurand):
    block = round3["stats"]["measurands"][measurand]
    for material in block["materials"]:
        if measurand == "mfr" and material in KNOWN:
            continue
        by_lab = _values(round3, measurand, material)
        means = {lab: float(np.mean(vs)) for lab, vs in by_lab.items()}
        x_star, s_star = _algorithm_a(list(means.values()))
        sc = block["scores"][material]
        assert sc["assigned_value"] == pytest.approx(x_star, rel=1e-9)
        assert sc["robust_sd"] == pytest.approx(s_star, rel=1e-7)
        u = 1.25 * s_star / math.sqrt(len(means))
        assert sc["u_assigned_value"] == pytest.approx(u, rel=1e-7)
        sigma = {"mfr": 0.05 * x_star, "density": 0.002, "ash": 0.06 * x_star}[measurand]
        assert sc["sigma_pt"] == pytest.approx(sigma, rel=1e-9)
        assert sc["use_z_prime"] is (u > 0.3 * sigma)
        for lab, mean in means.items():
            e = sc["labs"][lab]
            if sc["use_z_prime"]:
                want = (mean - x_star) / math.sqrt(sigma ** 2 + u ** 2)
                assert e["z_prime"] == pytest.approx(want, rel=1e-7, abs=1e-9)
            else:
                assert e["z"] == pytest.approx((mean - x_star) / sigma, rel=1e-7, abs=1e-9)
            assert e["band"] == iso13528.band_z(e["z_prime"] if sc["use_z_prime"] else e["z"])


def test_known_values_give_z_z_prime_and_en_by_the_iso_13528_formulas(round3):
    block = round3["stats"]["measurands"]["mfr"]
    assert block["settings"]["known_values"] == {
        "PP-H12": {"value": 12.1, "u": 0.05, "source": "certificate of CRM NV-12"},
        "LL-F1": {"value": 1.0, "u": 0.03, "source": ""}}
    assert block["settings"]["assigned_by_material"] == {"LL-F1": "known", "PP-H12": "known"}
    for material, (x_pt, u, source) in KNOWN.items():
        sc = block["scores"][material]
        assert (sc["assigned_value"], sc["u_assigned_value"]) == (x_pt, u)
        assert sc["method"] == "known value" + (f" ({source})" if source else "")
        sigma = 0.05 * x_pt  # sigma_pt: 5 % of the assigned value, here the known one
        assert sc["sigma_pt"] == pytest.approx(sigma, rel=1e-12)
        # PP-H12: u = 0.05 <= 0.3 x 0.605, so z; LL-F1: u = 0.03 > 0.3 x 0.05, so z'
        assert sc["use_z_prime"] is (u > 0.3 * sigma)
        assert sc["use_z_prime"] is (material == "LL-F1")
        given_u = _uncertainties(round3, "mfr", material)
        for lab, vs in _values(round3, "mfr", material).items():
            mean = float(np.mean(vs))
            e = sc["labs"][lab]
            assert e["z"] == pytest.approx((mean - x_pt) / sigma, rel=1e-9, abs=1e-12)
            if sc["use_z_prime"]:
                assert e["z_prime"] == pytest.approx(
                    (mean - x_pt) / math.sqrt(sigma ** 2 + u ** 2), rel=1e-9, abs=1e-12)
            u_lab = float(np.mean(given_u[lab]))  # the mean of the U values it reported
            assert e["En"] == pytest.approx((mean - x_pt) / math.sqrt(u_lab ** 2 + (2 * u) ** 2),
                                            rel=1e-9, abs=1e-12)
            assert e["D"] == pytest.approx(mean - x_pt, abs=1e-12)
        # nobody is left out of a known value: the host-free consensus does not apply
        assert "known value" in sc["without_host"]["skipped"]
        assert sc["labs"][HOST]["in_house"] is True


def test_host_free_consensus_per_measurand_by_hand(round3):
    s = round3["stats"]
    for measurand, block in s["measurands"].items():
        for material in block["materials"]:
            if measurand == "mfr" and material in KNOWN:
                continue
            means = {lab: float(np.mean(vs))
                     for lab, vs in _values(round3, measurand, material).items()}
            x_all, _ = _algorithm_a(list(means.values()))
            x_wo, _ = _algorithm_a([v for lab, v in means.items() if lab != HOST])
            wh = block["scores"][material]["without_host"]
            assert wh["assigned_value"] == pytest.approx(x_wo, rel=1e-9)
            assert wh["difference"] == pytest.approx(x_all - x_wo, rel=1e-6, abs=1e-12)
            assert wh["p"] == 4 and f"excluding {HOST}" in wh["method"]
            assert block["scores"][material]["labs"][HOST]["in_house"] is True


@pytest.mark.parametrize("measurand", ["mfr", "ash"])
def test_gauge_study_per_measurand_matches_statsmodels_two_way_anova(round3, measurand):
    import pandas as pd
    import statsmodels.formula.api as smf
    from statsmodels.stats.anova import anova_lm

    block = round3["stats"]["measurands"][measurand]
    frame = pd.DataFrame([{"material": m, "lab": lab, "y": v}
                          for m in block["materials"]
                          for lab, vs in _values(round3, measurand, m).items() for v in vs])
    table = anova_lm(smf.ols("y ~ C(material) * C(lab)", data=frame).fit(), typ=2)
    ga = block["grr_anova"]["table"]
    for ours, theirs in (("material", "C(material)"), ("laboratory", "C(lab)"),
                         ("material_x_laboratory", "C(material):C(lab)"),
                         ("repeatability", "Residual")):
        assert ga[ours]["ss"] == pytest.approx(table.loc[theirs, "sum_sq"], rel=1e-7), ours
        assert ga[ours]["df"] == table.loc[theirs, "df"], ours
    assert block["grr_anova"]["materials"] == len(block["materials"])
    if measurand == "mfr":
        assert block["grr_anova"]["tolerance"] == 4.0
    else:
        assert block["grr_anova"]["pct_tolerance"] is None  # ash has no tolerance


def test_the_gauge_study_of_an_unbalanced_measurand_says_why_it_is_skipped(round3):
    ga = round3["stats"]["measurands"]["density"]["grr_anova"]
    assert "skipped" in ga and "same number" in ga["skipped"]


# --- documents ------------------------------------------------------------------------------

def _text(path: Path) -> str:
    import pdfplumber

    with pdfplumber.open(path) as pdf:
        return " ".join(" ".join((page.extract_text() or "").split()) for page in pdf.pages)


def _render_png(path: Path, out: Path) -> list[Path]:
    """Render every page to PNG (as a person would look at it); return the files."""
    import pypdfium2 as pdfium

    pdf = pdfium.PdfDocument(str(path))
    made = []
    try:
        for i in range(len(pdf)):
            image = pdf[i].render(scale=1.0).to_pil()
            assert image.size[0] > 500 and image.getbbox() is not None
            target = out / f"{path.stem}-{i + 1}.png"
            image.save(target)
            made.append(target)
    finally:
        pdf.close()
    return made


def test_report_has_a_summary_across_measurands_then_a_section_per_measurand(round3, tmp_path):
    path = round3["out"] / evaluate.REPORT_NAME
    assert len(_render_png(path, tmp_path)) >= 4
    text = _text(path)
    front = text[:text.index("Measurand mfr:")]
    assert "Summary across measurands" in front
    assert "3 measurands" in front and "crx: outside the satisfactory band on density" in front
    positions = [text.index(f"Measurand {m}:") for m in ("mfr", "density", "ash")]
    assert positions == sorted(positions)
    mfr = text[positions[0]:positions[1]]
    # the known-value material says where its assigned value comes from
    assert "x_pt is a value known from outside the round" in mfr
    assert "PP-H12 12.1 (u = 0.05, certificate of CRM NV-12)" in mfr
    assert "known value (certificate of CRM NV-12)" in mfr
    assert "mfr: Material PP-H12" in mfr and "mfr: Consensus without the host" in mfr
    ash = text[positions[2]:]
    assert "ash: Material RE-MIX" in ash and "ash: Material PP-FR" in ash
    assert "ash: Material HD-BM5" not in ash
    density = text[positions[1]:positions[2]]
    assert "Average-and-range method not computed" in density or "not computed" in density


def test_one_letter_per_laboratory_covers_every_measurand(round3, tmp_path):
    out = round3["out"]
    assert sorted(p.name for p in out.glob("letter-*.pdf")) == sorted(
        f"letter-{lab.id}.pdf" for lab in round3["study"].laboratories)
    english, german = out / "letter-crx.pdf", out / "letter-hel.pdf"
    assert _render_png(english, tmp_path) and _render_png(german, tmp_path)
    en, de = _text(english), _text(german)
    t_en, t_de = language.texts("en"), language.texts("de")
    assert t_en("letter.overview_heading") in en and t_de("letter.overview_heading") in de
    for m, name, unit in (("mfr", "melt mass-flow rate, 190 °C / 2.16 kg", "g/10 min"),
                          ("density", "density, 23 °C", "g/cm3"), ("ash", "ash content", "%")):
        assert t_en("letter.measurand_heading", measurand=m, name=name, unit=unit) in en
        assert t_de("letter.measurand_heading", measurand=m, name=name, unit=unit) in de
    # crx reads high on density only: outside the band there, inside on melt flow rate
    overview = en[en.index(t_en("letter.overview_heading")):en.index("Scored: materials")]
    assert "ash [%] 2 / 2 2 -" in overview
    mfr = round3["stats"]["measurands"]["mfr"]["scores"]
    assert all(mfr[m]["labs"]["crx"]["band"] == "satisfactory" for m in MATERIALS)
    assert re.search(r"density \[g/cm3\] 6 / 6 [0-5] (HD-BM5|LL-F1)", overview)
    assert t_en("letter.x_pt_known", values="LL-F1 1 (u = 0.03); PP-H12 12.1 (u = 0.05, "
                "certificate of CRM NV-12)") in en
    # German: decimal comma, its own words
    assert "PP-H12 12,1 (u = 0,05, certificate of CRM NV-12)" in de
    assert "Ihre Bewertungen" in de and "Your scores" not in de


def test_shorthand_form_and_one_measurand_in_the_new_form_give_the_same_numbers(tmp_path):
    """The same spec written both ways: the statistics of its one measurand are equal, and
    the report of the single-measurand form has no measurand heading."""
    from test_evaluate import _records as shorthand_records

    def evaluated(folder: Path, text: str | None):
        shutil.copytree(EXAMPLE, folder)
        if text is not None:
            (folder / "study.yaml").write_text(text, encoding="utf-8")
        study = spec.load(folder)
        dates, route = planning.dates_for(study, HOST)
        result = planning.plan_round(study, round_id=ROUND, host=HOST, dates=dates,
                                     secret=SECRET, route=route)
        records = shorthand_records(result, shift={"crx": 0.2})
        if text is not None:
            records = [{**r, "measurements": {"mfr": (r["value"], r["uncertainty"])},
                        "value": None, "uncertainty": None} for r in records]
        key = planning.key_of(result)
        rows = evaluate.unblind(key, records)
        return study, evaluate.round_statistics(study, key, rows), rows

    original = (EXAMPLE / "study.yaml").read_text(encoding="utf-8")
    evaluation = original[original.index("\nevaluation:\n"):original.index("\nhistory:")]
    body = "\n".join("    " + ln if ln.strip() else ln
                     for ln in evaluation.strip("\n").splitlines())
    new_form = (re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", original)
                .replace(evaluation, "")
                .replace("\nhistory:", "\nmeasurands:\n  - id: mfr\n"
                         "    name: melt mass-flow rate, 190 °C / 2.16 kg\n"
                         "    unit: g/10 min\n" + body + "\n\nhistory:"))
    _, old, rows_old = evaluated(tmp_path / "a", None)
    _, new, _ = evaluated(tmp_path / "b", new_form)
    a, b = old["measurands"]["value"], new["measurands"]["mfr"]
    for key in ("materials", "labs", "anova", "precision", "scores", "grr_anova", "grr_range",
                "settings", "results"):
        assert a[key] == b[key], key
    assert old["results"] == {**new["results"], "missing": []}
    path = report.render(tmp_path / "report.pdf", old, rows_old, paper="A4")
    text = _text(path)
    assert "Measurand: melt mass-flow rate" in text
    assert "Summary across measurands" not in text and "Measurand value" not in text
    assert "value: " not in text


def test_results_csv_names_the_measurand_after_the_material(round3):
    with open(round3["out"] / evaluate.RESULTS_NAME, encoding="utf-8") as f:
        table = list(csv.DictReader(f))
    assert list(table[0])[:3] == ["material", "measurand", "lab"]
    assert {line["measurand"] for line in table if line["material"] == "HD-BM5"} == {
        "mfr", "density"}
    assert {line["measurand"] for line in table if line["material"] == "PP-FR"} == {
        "mfr", "density", "ash"}


# --- history ------------------------------------------------------------------------------

def test_history_keeps_a_record_per_measurand(round3, runner, tmp_path):
    folder = tmp_path / "study"
    shutil.copytree(round3["folder"], folder)
    with Ledger.open(folder) as ledger:
        record = history.collect(folder, ledger, labs=["kal", "tor", "hel", "lin", "crx"],
                                 measurands=["mfr", "density", "ash"])
    assert list(record["measurands"]) == ["mfr", "density", "ash"]
    assert "labs" not in record  # several measurands: no record mixes them
    s = round3["stats"]
    for m, block in record["measurands"].items():
        assert block["rounds"] == [ROUND]
        scores = s["measurands"][m]["scores"]
        for lab, data in block["labs"].items():
            entry = data["rounds"][ROUND]
            zs = []
            for material in s["measurands"][m]["materials"]:
                sc = scores[material]
                e = sc["labs"][lab]
                zs.append(e["z_prime"] if sc["use_z_prime"] else e["z"])
            assert entry["mean_z"] == pytest.approx(float(np.mean(zs)), rel=1e-12)
            assert entry["hosted"] is (lab == HOST)
            assert set(entry["materials"]) == set(s["measurands"][m]["materials"])
    result = run_cli(runner, "history", folder)
    assert result.exit_code == 0, result.stderr
    for m in ("mfr", "density", "ash"):
        assert f"Mean z of {m}" in result.stdout
    import pypdfium2 as pdfium

    assert len(pdfium.PdfDocument(str(folder / "history.pdf"))) == 3  # a page per measurand


# --- analyze ------------------------------------------------------------------------------

def test_analyze_gives_a_section_per_measurand_of_a_measurand_column(round3, runner, tmp_path):
    path = round3["out"] / evaluate.RESULTS_NAME
    result = run_cli(runner, "analyze", path)
    assert result.exit_code == 0, result.stderr
    rows = stats.read_long_csv(path)
    heads = [ln for ln in result.stdout.splitlines() if ln.startswith("measurand ")]
    assert heads == ["measurand mfr", "measurand density", "measurand ash"]
    for m, group in stats.by_measurand(rows).items():
        alone = stats.summary_text(stats.evaluate_table(group))
        assert alone in result.stdout, m
    as_json = json.loads(run_cli(runner, "analyze", path, "--json").stdout)
    assert list(as_json["measurands"]) == ["mfr", "density", "ash"]
    one = run_cli(runner, "analyze", path, "--measurand", "ash", "--sigma-pt", "0.1")
    assert one.exit_code == 0 and "measurand ash" in one.stdout
    assert "measurand mfr" not in one.stdout


def test_analyze_without_a_measurand_column_reads_as_before(round3, runner, tmp_path):
    path = round3["out"] / evaluate.RESULTS_NAME
    lines = path.read_text(encoding="utf-8").splitlines()
    plain = tmp_path / "mfr.csv"
    with open(plain, "w", encoding="utf-8", newline="") as f:
        writer = csv.writer(f)
        for row in csv.reader(lines):
            if row[1] in ("measurand", "mfr"):
                writer.writerow(row[:1] + row[2:])
    result = run_cli(runner, "analyze", plain)
    assert result.exit_code == 0, result.stderr
    assert not any(ln.startswith("measurand ") for ln in result.stdout.splitlines())
    assert result.stdout == stats.summary_text(stats.evaluate_table(stats.read_long_csv(plain)))


@pytest.mark.parametrize("args, message", [
    (("--sigma-pt", "0.1"), "--sigma-pt is one value in one unit, but the file has 3 "
                            "measurands (mfr, density, ash); give --measurand to analyze one of "
                            "them, or use --sigma-pt-percent"),
    (("--measurand", "colour"), "measurand: no result of measurand 'colour'; the file has mfr, "
                                "density, ash"),
], ids=["sigma-pt", "unknown"])
def test_analyze_refuses_what_one_measurand_cannot_mean(round3, runner, args, message):
    path = round3["out"] / evaluate.RESULTS_NAME
    result = run_cli(runner, "analyze", path, *args)
    assert result.exit_code == 2
    assert result.stderr.strip().splitlines() == [f"error: {path}: {message}"]


def test_a_measurand_column_allows_each_material_lab_trial_once_per_measurand(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("material,measurand,lab,trial,value\nA,x,l1,1,1.0\nA,y,l1,1,2.0\n"
                    "A,x,l1,1,1.5\n", encoding="utf-8")
    with pytest.raises(DataError, match=r"measurand 'x', material 'A', lab 'l1', trial '1' "
                                        r"appears twice \(first on line 2\)"):
        stats.read_long_csv(path)
    path.write_text("material,measurand,lab,trial,value\nA,,l1,1,1.0\n", encoding="utf-8")
    with pytest.raises(DataError, match="measurand is empty"):
        stats.read_long_csv(path)


# --- the declared resolution --------------------------------------------------------------

def test_a_declared_resolution_replaces_the_step_read_from_the_data():
    # Results written to 0.01, sigma_pt 0.04: from the data the step is 0.01 (floor 0.005),
    # so there are bands; with a declared resolution of 0.1 half a step is 0.05 > 0.04.
    values = [10.01, 10.02, 9.98, 10.03, 9.99, 10.00, 10.04, 9.97]
    labs = [f"L{i}" for i in range(8)]
    plain = iso13528.evaluate(values, labs, sigma_pt=0.04)
    assert plain.banded and plain.resolution == 0.01
    declared = iso13528.evaluate(values, labs, sigma_pt=0.04, resolution=0.1)
    assert not declared.banded and declared.resolution == 0.1
    assert declared.no_band == ("sigma_pt = 0.04 is less than half the declared resolution "
                                "(0.1), so a difference of one reported digit would decide the "
                                "band")
    assert any("finer than the declared resolution 0.1" in n for n in declared.notes)
    # a declared resolution finer than the data's digits lets a small sigma_pt keep its band
    coarse = [10.0, 10.1, 9.9, 10.2, 9.8, 10.0, 10.1, 9.9]
    assert not iso13528.evaluate(coarse, labs, sigma_pt=0.04).banded
    assert iso13528.evaluate(coarse, labs, sigma_pt=0.04, resolution=0.01).banded


def test_the_letter_words_the_declared_resolution_in_german():
    t = language.texts("de")
    text = ("sigma_pt = 0.04 is less than half the declared resolution (0.1), so a difference "
            "of one reported digit would decide the band")
    assert letter._reworded(text, "letter.why", t, True) == t(
        "letter.why.coarse_resolution", sigma_pt="0,04", step="0,1")


# --- a circulating set: the drift check per measurand ------------------------------------

HARDNESS = EXAMPLE.parent / "norrvik-hardness"
CIRCULATING = """
measurands:
  - id: shore
    name: Shore D hardness, 15 s reading
    unit: Shore D
    resolution: 0.1
    evaluation:
      sigma_pt: {precision: {sigma_R: 1.0, sigma_r: 0.15}}
  - id: thick
    name: thickness
    unit: mm
    resolution: 0.001
    uncertainty: none
    evaluation:
      sigma_pt: 0.02
"""


def test_the_drift_of_circulating_artefacts_is_checked_per_measurand(tmp_path):
    """One plaque softens on its way (Shore D falls 0.2 a stop); its thickness does not
    change. The host's start and end means, by hand, against the 0.3 sigma_pt limit."""
    folder = tmp_path / "hardness"
    shutil.copytree(HARDNESS, folder)
    text = (folder / "study.yaml").read_text(encoding="utf-8")
    text = re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", text)
    head, _, rest = text.partition("\nevaluation:\n")
    (folder / "study.yaml").write_text(head + "\n" + CIRCULATING + rest[rest.index("\nhistory:"):],
                                       encoding="utf-8")
    study = spec.load(folder)
    host = "lin"
    dates, route = planning.dates_for(study, host)
    made = planning.plan_round(study, round_id="2027-C", host=host, dates=dates, secret=SECRET,
                               route=route)
    key = planning.key_of(made)
    rng = np.random.default_rng(7)
    material_of = {u["code"]: u["material"] for u in key["units"]}
    true_shore = {"PL-HD": 62.0, "PL-PP": 72.0, "PL-PA": 78.0, "PL-PM": 82.0}
    with Ledger.open(folder) as ledger:
        planning.write_round(study, folder, made, ledger, passphrase=PASSPHRASE)
        manifest = planning.read_manifest(planning.round_dir(folder, "2027-C"))
        records, host_values = [], {}
        for index, station in enumerate(manifest["route"]):
            slot = circulate.station_key(station["lab"], station["visit"])
            lab, visit = audit.split_slot(slot)  # the host's first stop is its own slot
            for trial, run in enumerate(audit.slot_runs(manifest, slot), start=1):
                for code in run:
                    m = material_of[code]
                    shore = true_shore[m] - (0.2 * index if m == "PL-PA" else 0.0)
                    shore = _decimal(shore + rng.normal(0, 0.1), 1)
                    thick = _decimal(6.0 + rng.normal(0, 0.003), 3)
                    records.append({"lab": lab, "code": code, "trial": trial, "visit": visit,
                                    "value": None, "uncertainty": None,
                                    "measurements": {"shore": (shore, None),
                                                     "thick": (thick, None)}})
                    if lab == host:
                        stop = visit or "start"
                        host_values.setdefault((stop, m), {"shore": [], "thick": []})
                        host_values[stop, m]["shore"].append(shore)
                        host_values[stop, m]["thick"].append(thick)
        audit.unseal_round(study, folder, "2027-C", ledger, passphrase=PASSPHRASE, force=True,
                           reason="test")
        out = evaluate.evaluate_round(study, folder, "2027-C", ledger, results=records,
                                      workers=1)
    s = json.loads((out / evaluate.STATISTICS_NAME).read_text(encoding="utf-8"))
    assert "drift" not in s
    for measurand in ("shore", "thick"):
        drift = s["measurands"][measurand]["drift"]
        assert drift["visits"][0] == "start" and "end" in drift["visits"]
        for m, entry in drift["materials"].items():
            sig = s["measurands"][measurand]["scores"][m]["sigma_pt"]
            start = host_values["start", m][measurand]
            end = host_values["end", m][measurand]
            diff = float(np.mean(end)) - float(np.mean(start))
            check = entry["checks"]["end"]
            assert check["difference"] == pytest.approx(diff, abs=1e-9)
            assert check["limit"] == pytest.approx(0.3 * sig, rel=1e-12)
            u = math.sqrt(np.var(start, ddof=1) / len(start) + np.var(end, ddof=1) / len(end))
            assert check["widened_limit"] == pytest.approx(0.3 * sig + 2 * u, rel=1e-9)
            assert check["within_limit"] is (abs(diff) <= 0.3 * sig)
    # the soft plaque drifts in hardness (about 0.2 a stop over the route), not in thickness
    assert s["measurands"]["shore"]["drift"]["materials"]["PL-PA"]["verdict"] == "fail"
    assert all(e["verdict"] != "fail"
               for e in s["measurands"]["thick"]["drift"]["materials"].values())
    text = _text(out / evaluate.REPORT_NAME)
    assert "shore: Drift of the circulating artefacts" in text
    assert "thick: Drift of the circulating artefacts" in text
