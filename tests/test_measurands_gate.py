"""Several measurands on a circulating set: every stop's form has a column per measurand, the
gate opens only when every measurand measured on every artefact has a value or a remark at
every stop, and the records handed to evaluation carry the measurements.

The study is the hardness example with two measurands: hardness on every plaque and
thickness on two of them (no uncertainty asked). Readings are invented; what the tests
expect is what they wrote into the forms.
"""

from __future__ import annotations

import csv
import io
import re
import shutil
from datetime import UTC, date, datetime, time, timedelta

import pytest
from conftest import PASSPHRASE, ROOT, SECRET

from planner import audit, circulate, codes, evaluate, plan, returns, spec, status
from planner.errors import LedgerError
from planner.ledger import Ledger

HARDNESS = ROOT / "examples" / "norrvik-hardness"
ROUND = "2027-C"
HOST = "lin"
THICK = {"PL-PA", "PL-PM"}
BLOCK = """measurands:
  - id: hardness
    name: Shore D hardness, 15 s reading
    unit: Shore D
    evaluation:
      sigma_pt: {precision: {sigma_R: 1.0, sigma_r: 0.15}}
  - id: thickness
    name: plaque thickness at the centre
    unit: mm
    materials: [PL-PA, PL-PM]
    uncertainty: none
"""


class _Clock:
    def __init__(self) -> None:
        self.now = datetime(2027, 1, 20, 9, tzinfo=UTC)

    def __call__(self) -> datetime:
        return self.now

    def set(self, day: date) -> None:
        self.now = datetime.combine(day, time(10), tzinfo=UTC)


def _several(text: str) -> str:
    text = re.sub(r"\n  measurand: .*\n  unit: .*\n", "\n", text)
    text = re.sub(r"\nevaluation:\n(  .*\n|\s*\n)*", "\n", text)
    return text.replace("\nlaboratories:", "\n" + BLOCK + "\nlaboratories:")


def _slot(station):
    return circulate.station_key(station["lab"], station["visit"])


def _form_name(station):
    visit = station["visit"]
    return f"result-form-{visit}.csv" if visit not in (None, "start") else "result-form.csv"


def _fill(text, *, decimal, first_day, thickness=True):
    """Return the form filled in, and (code, trial) -> {measurand: value} as written."""
    sep = ";" if decimal == "comma" else ","
    head = [ln for ln in text.splitlines() if ln.startswith("#")]
    body = [ln for ln in text.splitlines() if ln and not ln.startswith("#")]
    rows = list(csv.reader(io.StringIO("\n".join(body)), delimiter=sep))
    col = {name: i for i, name in enumerate(rows[0])}
    keep = [n for n in rows[0] if thickness or n != "thickness"]
    buf = io.StringIO()
    writer = csv.writer(buf, delimiter=sep, lineterminator="\n")
    writer.writerow(keep)
    written = {}
    for n, row in enumerate(rows[1:], start=1):
        trial = int(row[col["trial"]])
        got = {"hardness": 60 + n / 4}
        row[col["hardness"]] = str(got["hardness"])
        if row[col["thickness"]] != "n/a":
            got["thickness"] = 6 + n / 100
            row[col["thickness"]] = str(got["thickness"])
        if not thickness:
            got.pop("thickness", None)
        row = [str(x).replace(".", ",") if decimal == "comma" and i in
               (col["hardness"], col["thickness"]) else x for i, x in enumerate(row)]
        row[col["date"]] = (first_day + timedelta(days=trial - 1)).isoformat()
        writer.writerow([row[col[name]] for name in keep])
        written[(codes.compact(row[col["code"]]), trial)] = got
    return "\n".join(head) + "\n" + buf.getvalue(), written


@pytest.fixture
def route(tmp_path):
    folder_root = tmp_path / "norrvik-two"
    shutil.copytree(HARDNESS, folder_root)
    path = folder_root / "study.yaml"
    path.write_text(_several(path.read_text(encoding="utf-8")), encoding="utf-8")
    study = spec.load(folder_root)
    dates, way = plan.dates_for(study, HOST)
    made = plan.plan_round(study, round_id=ROUND, host=HOST, dates=dates, secret=SECRET,
                           route=way)
    clock = _Clock()
    with Ledger.open(folder_root, clock=clock) as ledger:
        folder = plan.write_round(study, folder_root, made, ledger, passphrase=PASSPHRASE)
    return study, folder_root, folder, made, clock


def _receive_all(study, folder_root, folder, clock, *, short=None):
    """Fill and receive every stop's form; ``short``: the slot whose form leaves out the
    thickness column. Return (slot, code, trial) -> {measurand: value}."""
    manifest = plan.read_manifest(folder)
    written = {}
    with Ledger.open(folder_root, clock=clock) as ledger:
        for station in manifest["route"]:
            slot = _slot(station)
            lab = study.lab(station["lab"])
            text = (folder / "labs" / lab.id / _form_name(station)).read_text(encoding="utf-8")
            filled, got = _fill(text, decimal=lab.decimal,
                                first_day=date.fromisoformat(station["test_start"]),
                                thickness=slot != short)
            written.update({(slot, *key): v for key, v in got.items()})
            target = folder_root / f"{slot.replace('@', '-')}.csv"
            target.write_text(filled, encoding="utf-8")
            clock.set(date.fromisoformat(station["test_end"]) + timedelta(days=1))
            returns.receive(study, folder_root, ROUND, [target], ledger)
    return written


def test_every_stop_form_has_the_thickness_column_n_a_on_two_plaques(route):
    study, _, folder, made, _ = route
    material = {u.code: u.material for u in made.units}
    manifest = plan.read_manifest(folder)
    assert manifest["not_measured"] == {
        "thickness": sorted(c for c, m in material.items() if m not in THICK)}
    for station in manifest["route"]:
        lab = study.lab(station["lab"])
        sep = ";" if lab.decimal == "comma" else ","
        lines = (folder / "labs" / lab.id / _form_name(station)).read_text(
            encoding="utf-8").splitlines()
        assert "# measurands: hardness [Shore D]; thickness [mm]" in lines
        header = lines.index(sep.join(["trial", "position", "code", "hardness",
                                       "hardness uncertainty", "thickness", "date", "analyst",
                                       "remarks"]))
        rows = [ln.split(sep) for ln in lines[header + 1:]]
        assert len(rows) == 4 * 3
        for row in rows:
            assert (row[5] == "n/a") is (material[codes.compact(row[2])] not in THICK)


def test_all_stops_reported_open_the_gate_and_carry_the_measurements(route):
    study, folder_root, folder, made, clock = route
    written = _receive_all(study, folder_root, folder, clock)
    material = {u.code: u.material for u in made.units}
    manifest = plan.read_manifest(folder)
    with Ledger.open(folder_root, clock=clock) as ledger:
        assert audit.missing_labs(study, ledger, ROUND, manifest=manifest) == []
        records = evaluate.accepted_results(study, ledger, ROUND, manifest=manifest)
    assert len(records) == len(manifest["route"]) * 4 * 3
    for record in records:
        slot = circulate.station_key(record["lab"], record["visit"])
        want = written[(slot, record["code"], record["trial"])]
        assert record["value"] is None
        assert {m: v for m, (v, _) in record["measurements"].items()} == pytest.approx(want)
        assert set(record["measurements"]) == (
            {"hardness", "thickness"} if material[record["code"]] in THICK else {"hardness"})


def test_a_stop_without_the_thickness_column_keeps_the_key_sealed(route):
    study, folder_root, folder, _, clock = route
    short = circulate.station_key(HOST, "middle")
    _receive_all(study, folder_root, folder, clock, short=short)
    manifest = plan.read_manifest(folder)
    with Ledger.open(folder_root, clock=clock) as ledger:
        assert audit.missing_labs(study, ledger, ROUND, manifest=manifest) == [short]
        table = status.round_status_table(study, folder_root, ROUND, ledger,
                                          today=clock.now.date())
        row = next(r for r in table.rows if r["lab"] == short)
        # two plaques x three trials without their thickness
        assert row["received"] and not row["complete"] and row["missing"] == 6
        assert row["measurands"]["thickness"] == {"values": 0, "empty": 0, "missing": 6}
        assert not table.may_open and table.waiting_for == (short,)
        with pytest.raises(LedgerError, match=f"missing or incomplete from {re.escape(short)}"):
            audit.unseal_round(study, folder_root, ROUND, ledger, passphrase=PASSPHRASE)
    assert not (folder / "key.json").exists()
