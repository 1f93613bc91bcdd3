"""Circulating sets: the route, hand-over dates, host re-measurements, forms and audit."""

from __future__ import annotations

import itertools
import shutil

import pytest

from conftest import PASSPHRASE, ROOT, SECRET
from planner import calendar, circulate, plan, spec
from planner.errors import SpecError
from planner.ledger import Ledger

HARDNESS = ROOT / "examples" / "norrvik-hardness"


@pytest.fixture
def study():
    return spec.load(HARDNESS)


def _cost(study, order):
    return sum(calendar.transit_days(study, a, b) for a, b in itertools.pairwise(order))


def test_route_has_least_total_transit(study):
    host = "lin"
    route = circulate.plan_route(study, host)
    others = [lab.id for lab in study.laboratories if lab.id != host]
    assert sorted(route) == sorted(others)
    best = min(_cost(study, (host, *p, host)) for p in itertools.permutations(others))
    assert _cost(study, (host, *route, host)) == best


def test_route_does_not_depend_on_spec_order(study):
    text = (HARDNESS / "study.yaml").read_text()
    head, rest = text.split("laboratories:\n", 1)
    block, tail = rest.split("\nmaterials:", 1)
    labs = ["  - id:" + part for part in block.split("  - id:")[1:]]
    reordered = head + "laboratories:\n" + "".join(reversed([l.rstrip("\n") + "\n" for l in labs])) + "\nmaterials:" + tail
    assert circulate.plan_route(spec.parse(reordered), "lin") == circulate.plan_route(study, "lin")


def test_long_route_returns_to_the_host_in_the_middle(study):
    route = circulate.schedule_route(study, "lin")
    visits = [(s.lab, s.visit) for s in route.stations]
    assert visits[0] == ("lin", "start") and visits[-1] == ("lin", "end")
    assert ("lin", "middle") in visits  # 5 other laboratories: a long route
    for before, after in itertools.pairwise(route.stations):
        assert before.pass_on is not None and before.test_end < before.pass_on < after.arrive
        assert after.received_from == before.lab and before.next_lab == after.lab
        assert after.test_start >= after.arrive
    labs = "\n".join(f"  - {{id: l{i}, name: L{i}, address: [x], contact: {{name: X}}, country: SE, "
                     "can_host: true}" for i in range(4))
    short = spec.parse(f"""study: {{id: s, title: S, measurand: m, unit: u}}
laboratories:
{labs}
materials:
  - {{id: A, description: a, amount: 1, amount_unit: piece, storage: dry, stability_days: 900}}
  - {{id: B, description: b, amount: 1, amount_unit: piece, storage: dry, stability_days: 900}}
design: {{mode: circulate, trials: 2, spares_per_lab: 0}}
schedule: {{receive_by: 2027-02-01, test_window_days: 5, reporting_days: 5}}
""")
    # 3 other laboratories is not a long route: start, the three, end
    assert [v for _, v in circulate.stops(short, "l0")] == ["start", None, None, None, "end"]


def test_dates_respect_ship_days_and_transit(study):
    route = circulate.schedule_route(study, "kal")
    work = calendar.WorkingDays(range(2026, 2029))
    for before, after in itertools.pairwise(route.stations):
        assert before.pass_on.strftime("%a").lower() in study.schedule.ship_weekdays
        days = calendar.transit_days(study, before.lab, after.lab)
        assert work.add(before.pass_on, days, study.lab(after.lab).country) == after.arrive


def test_too_short_stability_is_refused(study):
    text = (HARDNESS / "study.yaml").read_text().replace("stability_days: 365", "stability_days: 40")
    short = spec.parse(text)
    with pytest.raises(SpecError) as info:
        plan.dates_for(short, "lin")
    message = str(info.value)
    assert "material 'PL-PA' is stable until" in message and "more days" in message


def test_spare_units_are_refused_in_circulating_mode():
    text = (HARDNESS / "study.yaml").read_text().replace("spares_per_lab: 0", "spares_per_lab: 1")
    with pytest.raises(SpecError, match="design.spares_per_lab: is 1, but a circulating set"):
        spec.parse(text)


def test_plan_writes_route_forms_and_verifies(study, tmp_path):
    folder = tmp_path / "s"
    shutil.copytree(HARDNESS, folder)
    dates, route = plan.dates_for(study, "lin")
    result = plan.plan_round(study, round_id="C1", host="lin", dates=dates, secret=SECRET,
                             route=route)
    assert [u.kind for u in result.units] == ["artefact"] * len(study.materials)
    with Ledger.open(folder) as ledger:
        out = plan.write_round(study, folder, result, ledger, passphrase=PASSPHRASE)
    manifest = plan.read_manifest(out)
    assert manifest["mode"] == "circulate" and len(manifest["route"]) == len(route.stations)
    assert sorted(manifest["host_visits"]) == ["end", "middle"]
    for lab in study.laboratories:
        for run in manifest["labs"][lab.id]["trials"]:
            assert sorted(run) == manifest["artefacts"]
    end_form = (out / "labs" / "lin" / "result-form-end.csv").read_text()
    assert "# visit: end" in end_form
    runs = plan.expected_runs(study, host="lin", secret=SECRET, units=result.units)
    assert runs == plan.manifest_runs(manifest)
    # each stop and trial gets its own order; with 4 artefacts (24 orders) not all can coincide
    assert len({tuple(r) for trials in runs.values() for r in trials}) > 3
