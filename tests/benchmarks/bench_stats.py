"""Benchmark of planner.stats: 500 labs x 20 materials x 3 trials through evaluate_table.

Run from the repository root: ``python tests/benchmarks/bench_stats.py``. Prints the time
of a cold call (fresh interpreter: imports of numpy/scipy included), the best of several
warm calls, read_long_csv on the same data as a CSV file, and a Monte Carlo check (10^6
seeded draws) of the shipped double Grubbs critical values, which come from a
low-confidence public table.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT))

LABS, MATERIALS, TRIALS = 500, 20, 3


def make_rows(seed: int = 1) -> list[dict[str, object]]:
    import numpy as np

    rng = np.random.default_rng(seed)
    rows = []
    for m in range(MATERIALS):
        bias = rng.normal(0, 0.3, LABS)
        for lab in range(LABS):
            for t in range(TRIALS):
                rows.append({"material": f"M{m:02d}", "lab": f"L{lab:03d}", "trial": t + 1,
                             "value": 50.0 + m + bias[lab] + rng.normal(0, 0.2),
                             "uncertainty": 0.5})
    return rows


COLD = """
import sys, time
sys.path.insert(0, {root!r})
t0 = time.perf_counter()
from planner import stats
rows = stats.read_long_csv({path!r})
t1 = time.perf_counter()
stats.evaluate_table(rows)
t2 = time.perf_counter()
print(t1 - t0, t2 - t1)
"""


def main() -> None:
    from planner import stats
    from planner.stats import iso5725_2

    rows = make_rows()
    print(f"table: {LABS} labs x {MATERIALS} materials x {TRIALS} trials = {len(rows)} values")
    with tempfile.TemporaryDirectory() as tmp:
        path = os.path.join(tmp, "results.csv")
        with open(path, "w", newline="", encoding="utf-8") as fh:
            writer = csv.DictWriter(fh, fieldnames=list(rows[0]))
            writer.writeheader()
            writer.writerows(rows)
        out = subprocess.run([sys.executable, "-c", COLD.format(root=str(ROOT), path=path)],
                             capture_output=True, text=True, check=True).stdout.split()
        print(f"cold, fresh interpreter: read_long_csv {float(out[0]):.3f} s, "
              f"first evaluate_table {float(out[1]):.3f} s (includes importing numpy/scipy)")
        t = time.perf_counter()
        csv_rows = stats.read_long_csv(path)
        print(f"warm read_long_csv: {time.perf_counter() - t:.3f} s")
    stats.evaluate_table(rows)
    for label, data in (("dict rows", rows), ("Row records", csv_rows)):
        best = min(_timed(stats.evaluate_table, data) for _ in range(5))
        print(f"warm evaluate_table ({label}), best of 5: {best:.3f} s")
    result = stats.evaluate_table(rows)
    t = time.perf_counter()
    text = json.dumps(result, allow_nan=False)
    print(f"json.dumps of the result: {time.perf_counter() - t:.3f} s, {len(text) / 1e6:.1f} MB")

    print("double Grubbs critical values, table vs Monte Carlo (10^6 draws, seed = p):")
    for p in range(4, 13):
        cells = []
        for alpha in (0.05, 0.01):
            mc = iso5725_2.simulate_grubbs_double(p, alpha, draws=1_000_000, seed=p)
            cells.append(f"{alpha:.0%}: table {iso5725_2.grubbs_double_critical(p, alpha):.4f}"
                         f" mc {mc:.4f}")
        print(f"  p = {p:2d}  " + "   ".join(cells))


def _timed(fn, data) -> float:  # type: ignore[no-untyped-def]
    t = time.perf_counter()
    fn(data)
    return time.perf_counter() - t


if __name__ == "__main__":
    main()
