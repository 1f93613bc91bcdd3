"""Benchmark: evaluate a round of 500 laboratories x 20 materials x 3 trials.

Plans and seals an invented round of that size in a scratch folder, unseals it
(forced: the results are handed to ``evaluate_round`` directly rather than
received as 500 forms, so the ledger records all 500 laboratories as without a form
at the opening; the report lists them all, every letter says how many and whether its
own was among them), then times

- the statistics alone (``evaluate.round_statistics``: every method, twice,
  the second time without the host), target at most 1 s;
- the whole evaluation (unblinding, statistics, results.csv, statistics.json,
  report.pdf and 500 letters, letters in 2 processes), target at most 7 s on
  a 2-core machine (issue 17), with the report's and the letters' share of it: the
  statistics and the report, not the letters, should take most of it;
- the letters alone in one process, per letter (``--letters N`` of them; 0 skips).

The received scenario (every form received, a normal opening) is measured by
tests/benchmarks/bench_round.py (``--sizes 500x20x3 --only evaluate``), which prints the
letters' share of evaluate as well; receiving 500 forms would more than double this run.

Run: python tests/benchmarks/bench_evaluate.py [--labs N] [--materials M] [--workers W]
     [--letters N]
"""

from __future__ import annotations

import argparse
import json
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
    ap.add_argument("--letters", type=int, default=100,
                    help="letters to time again in one process (0: none)")
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

            from planner.render import letter, report

            parts: dict[str, float] = {}
            saved = letter.render_all, report.render

            def timed(fn, name):
                def run(*a, **k):
                    start = time.perf_counter()
                    try:
                        return fn(*a, **k)
                    finally:
                        parts[name] = time.perf_counter() - start
                return run

            letter.render_all, report.render = (timed(saved[0], "letters"),
                                                timed(saved[1], "report"))
            try:
                t0 = time.perf_counter()
                out = evaluate.evaluate_round(study, folder, "R1", ledger,
                                              workers=args.workers, results=records)
                t_total = time.perf_counter() - t0
            finally:
                letter.render_all, report.render = saved
            per_letter = None
            if args.letters:
                from planner import language, render

                render.use_fonts(study, folder)
                again = Path(tmp) / "again"
                again.mkdir()
                to = [letter.Addressee(lab.id, lab.name, tuple(lab.address), lab.contact.name,
                                       lab.decimal, language.of(lab))
                      for lab in study.laboratories[:args.letters]]
                statistics = json.loads((out / evaluate.STATISTICS_NAME).read_text("utf-8"))
                t0, c0 = time.perf_counter(), time.process_time()
                letter.render_all(again, statistics, evaluate.unblind(key, records), to,
                                  paper=study.study.paper, workers=1)
                per_letter = ((time.perf_counter() - t0) / len(to),
                              (time.process_time() - c0) / len(to))
        report = out / evaluate.REPORT_NAME
        letters = sorted(out.glob("letter-*.pdf"))
        import pypdfium2 as pdfium

        pages = len(pdfium.PdfDocument(str(report)))
        print(f"round: {args.labs} laboratories x {args.materials} materials x 3 trials = "
              f"{len(records)} results; {os.cpu_count()} CPUs, {args.workers} workers")
        print(f"plan + seal + unseal (not timed against a target): {t_plan:.2f} s")
        print(f"unblind: {t_unblind:.3f} s")
        print(f"statistics alone (both consensus runs): {t_stats:.3f} s  (target <= 1 s)")
        print(f"evaluate_round total: {t_total:.2f} s  (target <= 7 s); report "
              f"{parts.get('report', 0):.2f} s, letters {parts.get('letters', 0):.2f} s "
              f"({100 * parts.get('letters', 0) / t_total:.0f} % of it)")
        if per_letter:
            print(f"one letter in one process: {1000 * per_letter[0]:.1f} ms "
                  f"({1000 * per_letter[1]:.1f} ms CPU), {args.letters} letters")
        print("letters of the received scenario (no forced opening): "
              "tests/benchmarks/bench_round.py --sizes 500x20x3 --only evaluate")
        print(f"report.pdf: {pages} pages, {report.stat().st_size / 1e6:.2f} MB; letters: "
              f"{len(letters)}, {sum(p.stat().st_size for p in letters) / 1e6:.1f} MB")


if __name__ == "__main__":
    main()
