"""Benchmark: plan a round end to end (codes, run orders, sealing, manifest, forms, ledger).

Run: python tests/benchmarks/bench_plan.py
Target (issue): 500 laboratories x 20 materials x 3 trials (30,000 test units) in at most 5 s
wall and 300 MB peak memory on a 2-core machine; time should grow linearly with the units.
Each size runs in a fresh subprocess so that the peak memory figure is its own.
"""

from __future__ import annotations

import json
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]

_CHILD = r"""
import resource, sys, time, tempfile
from pathlib import Path
from planner import calendar, draw, plan, spec
from planner.ledger import Ledger
labs, materials, trials = (int(x) for x in sys.argv[1:4])
lab_lines = "\n".join(
    f"  - {{id: L{i:03d}, name: Laboratory {i}, address: [Street {i}], contact: {{name: P{i}}}, "
    f"country: SE, can_host: true, decimal: {'comma' if i % 2 else 'point'}}}" for i in range(labs))
mat_lines = "\n".join(
    f"  - {{id: M{j:02d}, description: material {j}, amount: 10, amount_unit: g, storage: dry, "
    f"stability_days: 365}}" for j in range(materials))
text = f'''study: {{id: bench, title: Benchmark, measurand: mass, unit: g}}
laboratories:
{lab_lines}
materials:
{mat_lines}
design: {{trials: {trials}, spares_per_lab: 0, retained_by_host: 0, homogeneity_units: 0, run_order: balanced}}
schedule: {{receive_by: 2027-03-10, test_window_days: 10, reporting_days: 5}}
'''
folder = Path(tempfile.mkdtemp())
(folder / "study.yaml").write_text(text)
t0 = time.perf_counter()
study = spec.load(folder)
dates = calendar.schedule_round(study, "L000")
with Ledger.open(folder) as ledger:
    result = plan.plan_round(study, round_id="B1", host="L000", dates=dates,
                             secret=draw.new_secret(), taken=ledger.codes())
    plan.write_round(study, folder, result, ledger, passphrase="benchmark passphrase")
wall = time.perf_counter() - t0
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
print(f"{len(result.units)} {wall:.3f} {peak:.1f}")
"""


def run(labs: int, materials: int, trials: int) -> tuple[int, float, float]:
    out = subprocess.run([sys.executable, "-c", _CHILD, str(labs), str(materials), str(trials)],
                         capture_output=True, text=True, check=True, cwd=ROOT)
    units, wall, peak = out.stdout.split()
    return int(units), float(wall), float(peak)


def main() -> None:
    rows = []
    for labs, materials in ((5, 2), (50, 2), (50, 20), (500, 2), (500, 20)):
        units, wall, peak = run(labs, materials, 3)
        rows.append({"labs": labs, "materials": materials, "units": units, "wall_s": wall,
                     "peak_mb": peak, "us_per_unit": 1e6 * wall / units})
        print(f"{labs:4d} labs x {materials:2d} materials x 3 trials = {units:6d} units: "
              f"{wall:6.3f} s wall, {peak:6.1f} MB peak, {1e6 * wall / units:7.1f} us/unit")
    big = rows[-1]
    print(f"target 30,000 units <= 5 s and <= 300 MB: "
          f"{'met' if big['wall_s'] <= 5 and big['peak_mb'] <= 300 else 'NOT met'}")
    Path(tempfile.gettempdir(), "ringplan-bench-plan.json").write_text(json.dumps(rows, indent=1))


if __name__ == "__main__":
    main()
