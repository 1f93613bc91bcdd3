"""Benchmark: the calendar of one round for 500 laboratories (prints timings).

Run: python tests/benchmarks/bench_calendar.py
The study is invented: 500 laboratories in twelve countries with transit of
1 to 5 days, plus a transit table of 50 rows. The first run includes importing
the ``holidays`` country modules; every run builds the holiday sets afresh
(planner.calendar keeps no cache between calls).
"""

from __future__ import annotations

import random
import sys
import time
from datetime import date
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from planner import calendar, spec

LABS = 500
COUNTRIES = ["SE", "NO", "DE", "FI", "GB", "FR", "NL", "PL", "IT", "ES", "US", "JP"]


def build() -> spec.Study:
    rng = random.Random(500)
    labs = [{"id": f"lab-{i:03d}", "name": f"Laboratory {i}", "address": ["Street 1"],
             "contact": {"name": "Someone"}, "country": rng.choice(COUNTRIES),
             "can_host": i < 20, "transit_days": rng.randint(1, 5)} for i in range(LABS)]
    table = [{"from": "lab-000", "to": f"lab-{i:03d}", "days": rng.randint(1, 4)}
             for i in range(1, 51)]
    material = {"description": "pellets", "amount": 30, "amount_unit": "g", "storage": "dry"}
    return spec.Study.model_validate({
        "study": {"id": "bench", "title": "t", "measurand": "m", "unit": "u"},
        "laboratories": labs,
        "materials": [{"id": "A", "stability_days": 365, **material},
                      {"id": "B", "stability_days": 120, **material}],
        "design": {"trials": 2},
        "schedule": {"receive_by": date(2027, 5, 19), "test_window_days": 10,
                     "reporting_days": 5, "transit": table, "stability_margin_days": 14},
    })


def main() -> None:
    study = build()
    times = []
    for _ in range(5):
        t0 = time.perf_counter()
        dates = calendar.schedule_round(study, "lab-000")
        calendar.check_stability(study, dates)
        times.append(time.perf_counter() - t0)
    assert len(dates.labs) == LABS
    print(f"calendar: {LABS} laboratories in {len(COUNTRIES)} countries: first run "
          f"{times[0] * 1000:.1f} ms (holidays loaded), best {min(times) * 1000:.1f} ms "
          f"of {len(times)} runs; test {dates.test_start} to {dates.test_end}")


if __name__ == "__main__":
    main()
