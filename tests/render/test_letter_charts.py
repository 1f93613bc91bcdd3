"""A letter of a round of many materials: its chart of scores goes on in a second chart.

One chart row is 14 pt, so a chart of more than some 47 materials is taller than the text
frame of a page, and reportlab refused the whole letter ("too large on page ..."). A letter
now draws at most ``letter._CHART_ROWS`` materials to a chart. The round here is invented:
12 laboratories, 50 materials, 2 trials, values drawn around known true values.
"""

from __future__ import annotations

import json

import pytest

LABS, MATERIALS = 12, 50


def _spec() -> str:
    lines = ["study:", "  id: charts", "  title: Many materials", "  measurand: melt flow rate",
             "  unit: g/10 min", "laboratories:"]
    for i in range(LABS):
        lines += [f"  - id: L{i}", f"    name: Laboratory {i}", "    address: [Somewhere 1]",
                  "    contact: {name: A. Person}", "    country: SE",
                  f"    can_host: {'true' if i < 3 else 'false'}", "    transit_days: 1"]
    lines.append("materials:")
    for j in range(MATERIALS):
        lines += [f"  - id: M{j:02d}", f"    description: material {j}", "    amount: 30",
                  "    amount_unit: g", "    storage: dry", "    stability_days: 365"]
    lines += ["design: {trials: 2, spares_per_lab: 0, run_order: random}",
              "schedule: {receive_by: 2027-03-02, test_window_days: 10, reporting_days: 5}",
              "evaluation: {tolerance: 4.0}"]
    return "\n".join(lines) + "\n"


@pytest.fixture(scope="module")
def evaluated(tmp_path_factory):
    import numpy as np

    from planner import audit, evaluate, spec
    from planner import plan as planning
    from planner.ledger import Ledger

    folder = tmp_path_factory.mktemp("charts") / "study"
    folder.mkdir()
    (folder / "study.yaml").write_text(_spec(), encoding="utf-8")
    study = spec.load(folder)
    rng = np.random.default_rng(3)
    with Ledger.open(folder) as ledger:
        dates, route = planning.dates_for(study, "L0")
        made = planning.plan_round(study, round_id="R1", host="L0", dates=dates,
                                   secret=bytes(range(32)), route=route)
        planning.write_round(study, folder, made, ledger, passphrase="charts-test-pass")
        audit.unseal_round(study, folder, "R1", ledger, passphrase="charts-test-pass",
                           force=True, reason="test")
        bias = {lab.id: rng.normal(0, 0.02) for lab in study.laboratories}
        true = {m.id: 1.0 + j for j, m in enumerate(study.materials)}
        records = [{"lab": u.lab, "code": u.code, "uncertainty": None,
                    "value": float(true[u.material] * (1 + bias[u.lab] + rng.normal(0, 0.01)))}
                   for u in made.units if u.kind == "test"]
        out = evaluate.evaluate_round(study, folder, "R1", ledger, results=records)
    return study, out, evaluate.unblind(planning.key_of(made), records)


def test_every_letter_of_a_round_of_fifty_materials_is_written(evaluated):
    study, out, _ = evaluated
    import pdfplumber

    for lab in study.laboratories:
        with pdfplumber.open(out / f"letter-{lab.id}.pdf") as pdf:
            text = "\n".join(page.extract_text() for page in pdf.pages)
        assert "M49" in text and lab.id in text


def test_the_scores_are_charted_forty_materials_to_a_chart(evaluated):
    from planner import language
    from planner.render import _charts, letter
    from planner.results import SHORTHAND_ID, measurand_view

    study, out, rows = evaluated
    statistics = json.loads((out / "statistics.json").read_text(encoding="utf-8"))
    lab = study.laboratories[2]
    to = letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name)

    def charts(flowables):
        for f in flowables:
            if isinstance(f, _charts.StripChart):
                yield f
            yield from charts(getattr(f, "_content", ()))  # inside KeepTogether

    story = letter._story(statistics, [r for r in rows if r.lab == lab.id], to,
                          letter.anonymous_views(statistics), "A4", language.texts("en"))
    found = list(charts(story))
    assert [len(c.rows) for c in found] == [40, 10]
    labels = [label for c in found for label, _, _ in c.rows]
    assert labels == [f"M{j:02d}" for j in range(MATERIALS)]
    # each chart marks this laboratory's own score of its materials, not the first chart's
    me = statistics["participants"][lab.id]
    scores = measurand_view(statistics, SHORTHAND_ID)["scores"]
    for label, _, own in found[1].rows:
        entry = scores[label]["labs"][lab.id]
        assert own == pytest.approx(entry["z_prime"] if scores[label].get("use_z_prime")
                                    else entry["z"])
    assert me  # the laboratory has a participant code in the round
    # the second chart's shapes are its own: it keeps them apart from the first chart's
    assert found[0].cache is not found[1].cache
