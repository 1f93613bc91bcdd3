"""Benchmark: evaluate a round of 500 laboratories x 20 materials x 3 trials.

Plans and seals an invented round of that size in a scratch folder, unseals it
(forced: the results are handed to ``evaluate_round`` directly rather than
received as 500 forms), then times

- the statistics alone (``evaluate.round_statistics``: every method, twice,
  the second time without the host), target at most 1 s;
- the whole evaluation (unblinding, statistics, results.csv, statistics.json,
  report.pdf and 500 letters, letters in 2 processes), target at most 20 s on
  a 2-core machine.

Run: python tests/benchmarks/bench_evaluate.py [--labs N] [--materials M] [--workers W]
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))


def _spec(labs: int, materials: int) -> str:
    lines = ["study:", "  id: bench", "  title: Benchmark round", "  measurand: melt flow rate",
             "  unit: g/10 min", "laboratories:"]
    for i in range(labs):
        lines += [f"  - id: L{i:03d}", f"    name: Laboratory {i}", "    address: [Somewhere 1]",
                  "    contact: {name: A. Person}", "    country: SE",
                  f"    can_host: {'true' if i < 3 else 'false'}", "    transit_days: 1"]
    lines.append("materials:")
    for j in range(materials):
        lines += [f"  - id: M{j:02d}", f"    description: material {j}", "    amount: 30",
                  "    amount_unit: g", "    storage: dry", "    stability_days: 365"]
    lines += ["design: {trials: 3, spares_per_lab: 0, run_order: random}",
              "schedule: {receive_by: 2027-03-02, test_window_days: 10, reporting_days: 5}",
              "evaluation: {tolerance: 4.0}"]
    return "\n".join(lines) + "\n"


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--labs", type=int, default=500)
    ap.add_argument("--materials", type=int, default=20)
    ap.add_argument("--workers", type=int, default=2)
    args = ap.parse_args()

    import numpy as np

    from planner import audit, draw, evaluate, spec
    from planner import plan as planning
    from planner.ledger import Ledger

    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp) / "bench"
        folder.mkdir()
        (folder / "study.yaml").write_text(_spec(args.labs, args.materials), encoding="utf-8")
        study = spec.load(folder)
        t0 = time.perf_counter()
        with Ledger.open(folder) as ledger:
            dates, route = planning.dates_for(study, "L000")
            result = planning.plan_round(study, round_id="R1", host="L000", dates=dates,
                                         secret=draw.new_secret(), route=route)
            planning.write_round(study, folder, result, ledger, passphrase="benchmark-only-pass")
            audit.unseal_round(study, folder, "R1", ledger, passphrase="benchmark-only-pass",
                               force=True, reason="benchmark")
            t_plan = time.perf_counter() - t0
            rng = np.random.default_rng(1)
            true = {m.id: 1.0 + 2.0 * j for j, m in enumerate(study.materials)}
            bias = {lab.id: rng.normal(0, 0.02) for lab in study.laboratories}
            records = [{"lab": u.lab, "code": u.code,
                        "value": float(true[u.material] * (1 + bias[u.lab] + rng.normal(0, 0.01))),
                        "uncertainty": None}
                       for u in result.units if u.kind == "test"]
            key = planning.key_of(result)

            t0 = time.perf_counter()
            rows = evaluate.unblind(key, records)
            t_unblind = time.perf_counter() - t0
            evaluate.round_statistics(study, key, rows)  # warm the imports (numpy, scipy)
            t0 = time.perf_counter()
            evaluate.round_statistics(study, key, rows)
            t_stats = time.perf_counter() - t0

            t0 = time.perf_counter()
            out = evaluate.evaluate_round(study, folder, "R1", ledger, workers=args.workers,
                                          results=records)
            t_total = time.perf_counter() - t0
        report = out / evaluate.REPORT_NAME
        letters = sorted(out.glob("letter-*.pdf"))
        import pypdfium2 as pdfium

        pages = len(pdfium.PdfDocument(str(report)))
        print(f"round: {args.labs} laboratories x {args.materials} materials x 3 trials = "
              f"{len(records)} results; {os.cpu_count()} CPUs, {args.workers} workers")
        print(f"plan + seal + unseal (not timed against a target): {t_plan:.2f} s")
        print(f"unblind: {t_unblind:.3f} s")
        print(f"statistics alone (both consensus runs): {t_stats:.3f} s  (target <= 1 s)")
        print(f"evaluate_round total: {t_total:.2f} s  (target <= 20 s)")
        print(f"report.pdf: {pages} pages, {report.stat().st_size / 1e6:.2f} MB; letters: "
              f"{len(letters)}, {sum(p.stat().st_size for p in letters) / 1e6:.1f} MB")


if __name__ == "__main__":
    main()
