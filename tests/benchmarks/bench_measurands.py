"""Benchmark: evaluate a round of 500 laboratories x 20 materials x 3 trials with 4 measurands
against the same round with 1 measurand, in the same run.

Both rounds are planned from invented specs in a scratch folder (the 1-measurand spec in the
single-measurand form, as studies are written today; the other with ``measurands:`` of four,
each measured on every material: four times the results); the results are drawn with numpy,
reported to three decimals, and handed over as ``evaluate_round`` receives them from intake.
Each run times what ``evaluate_round`` does after reading the key: unblinding, the
statistics of every measurand (both consensus runs), results.csv, statistics.json,
report.pdf and every letter (in ``--workers`` processes). Each round is run ``--repeat`` times, alternating, and the min and median are printed with the
ratio 4 measurands / 1 measurand (target at most 2.5).

Run: python tests/benchmarks/bench_measurands.py [--labs N] [--materials M] [--repeat R]
     [--workers W]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

MEASURANDS = (("mfr", "melt flow rate", "g/10 min", None),
              ("density", "density", "g/cm3", None),
              ("ash", "ash content", "%", None),
              ("yi", "yellowness index", "1", None))


def _spec(labs: int, materials: int, measurands: int) -> str:
    lines = ["study:", "  id: bench", "  title: Benchmark round"]
    if measurands == 1:
        lines += ["  measurand: melt flow rate", "  unit: g/10 min"]
    lines.append("laboratories:")
    for i in range(labs):
        lines += [f"  - id: L{i:03d}", f"    name: Laboratory {i}", "    address: [Somewhere 1]",
                  "    contact: {name: A. Person}", "    country: SE",
                  f"    can_host: {'true' if i < 3 else 'false'}", "    transit_days: 1"]
    lines.append("materials:")
    for j in range(materials):
        lines += [f"  - id: M{j:02d}", f"    description: material {j}", "    amount: 30",
                  "    amount_unit: g", "    storage: dry", "    stability_days: 365"]
    if measurands == 1:
        lines.append("evaluation: {tolerance: 4.0}")
    else:
        lines.append("measurands:")
        for mid, name, unit, only in MEASURANDS[:measurands]:
            lines += [f"  - id: {mid}", f"    name: {name}", f"    unit: '{unit}'",
                      "    evaluation: {tolerance: 4.0}"]
            if only == "half":
                lines.append("    materials: [" + ", ".join(
                    f"M{j:02d}" for j in range(0, materials, 2)) + "]")
    lines += ["design: {trials: 3, spares_per_lab: 0, run_order: random}",
              "schedule: {receive_by: 2027-03-02, test_window_days: 10, reporting_days: 5}"]
    return "\n".join(lines) + "\n"


def _prepare(base: Path, labs: int, materials: int, measurands: int) -> dict:
    """Plan the round; return what evaluate_round has in hand after reading the key."""
    import numpy as np

    from planner import draw, spec
    from planner import plan as planning

    folder = base / f"bench{measurands}"
    folder.mkdir()
    (folder / "study.yaml").write_text(_spec(labs, materials, measurands), encoding="utf-8")
    study = spec.load(folder)
    dates, route = planning.dates_for(study, "L000")
    result = planning.plan_round(study, round_id="R1", host="L000", dates=dates,
                                 secret=draw.new_secret(), route=route)
    rng = np.random.default_rng(1)
    items = study.all_measurands
    true = {(m.id, mat.id): (1.0 + 2.0 * j) * (1 + k) for k, m in enumerate(items)
            for j, mat in enumerate(study.materials)}
    bias = {(m.id, lab.id): rng.normal(0, 0.02) for m in items for lab in study.laboratories}
    records = []
    for u in result.units:
        if u.kind != "test":
            continue
        # Reported to three decimals, as a laboratory's instrument reads them.
        values = {m.id: round(float(true[m.id, u.material] * (1 + bias[m.id, u.lab]
                                                              + rng.normal(0, 0.01))), 3)
                  for m in items if m.applies_to(u.material)}
        if study.shorthand:
            records.append({"lab": u.lab, "code": u.code, "value": values["value"],
                            "uncertainty": None})
        else:
            records.append({"lab": u.lab, "code": u.code, "value": None, "uncertainty": None,
                            "measurements": {k: (v, None) for k, v in values.items()}})
    return {"study": study, "key": planning.key_of(result), "records": records,
            "folder": folder}


def _evaluate(case: dict, out: Path, workers: int) -> dict[str, float]:
    """What evaluate_round does once the key is read, timed in parts."""
    from planner import evaluate, language
    from planner.render import letter, report

    study, key = case["study"], case["key"]
    out.mkdir(parents=True, exist_ok=True)
    t0 = time.perf_counter()
    rows = evaluate._ordered(evaluate.unblind(key, case["records"]), study)
    s = evaluate.round_statistics(study, key, rows, missing=evaluate._missing(study, key, rows))
    t1 = time.perf_counter()
    (out / evaluate.RESULTS_NAME).write_text(evaluate.results_csv(rows), encoding="utf-8")
    (out / evaluate.STATISTICS_NAME).write_text(
        json.dumps(s, indent=1, ensure_ascii=False, allow_nan=False) + "\n", encoding="utf-8")
    t2 = time.perf_counter()
    report.render(out / evaluate.REPORT_NAME, s, rows, paper=study.study.paper)
    t3 = time.perf_counter()
    addressees = [letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name,
                                   lab.decimal, language.of(lab)) for lab in study.laboratories]
    letter.render_all(out, s, rows, addressees, paper=study.study.paper, workers=workers)
    t4 = time.perf_counter()
    return {"statistics": t1 - t0, "files": t2 - t1, "report": t3 - t2, "letters": t4 - t3,
            "total": t4 - t0}


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--labs", type=int, default=500)
    ap.add_argument("--materials", type=int, default=20)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()

    from planner import render

    with tempfile.TemporaryDirectory() as tmp:
        base = Path(tmp)
        cases = {n: _prepare(base, args.labs, args.materials, n) for n in (1, 4)}
        render.use_fonts(cases[1]["study"], cases[1]["folder"])
        _evaluate(cases[1], base / "warm", args.workers)  # imports, fonts, caches
        times: dict[int, list[dict[str, float]]] = {1: [], 4: []}
        for i in range(args.repeat):
            for n in (1, 4):
                times[n].append(_evaluate(cases[n], base / f"out{n}-{i}", args.workers))
        n_results = {n: sum(len(r.get("measurements") or {"value": 0})
                            for r in cases[n]["records"]) for n in (1, 4)}
        print(f"round: {args.labs} laboratories x {args.materials} materials x 3 trials; "
              f"{os.cpu_count()} CPUs, {args.workers} workers for the letters, "
              f"{args.repeat} runs each")
        for n in (1, 4):
            parts = {k: statistics.median(t[k] for t in times[n]) for k in times[n][0]}
            totals = [t["total"] for t in times[n]]
            print(f"{n} measurand{'s' if n > 1 else ''} ({n_results[n]} results): "
                  f"min {min(totals):.2f} s, median {statistics.median(totals):.2f} s  "
                  f"(median parts: " + ", ".join(f"{k} {v:.2f} s" for k, v in parts.items()
                                                   if k != "total") + ")")
        lo = min(t["total"] for t in times[4]) / min(t["total"] for t in times[1])
        mid = (statistics.median(t["total"] for t in times[4])
               / statistics.median(t["total"] for t in times[1]))
        print(f"ratio 4 / 1 measurands: {lo:.2f} (min), {mid:.2f} (median)  (target <= 2.5)")


if __name__ == "__main__":
    main()
