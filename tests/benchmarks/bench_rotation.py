"""Benchmark: host rotation for 200 laboratories over 24 rounds (prints timings).

Run: python tests/benchmarks/bench_rotation.py
The study is invented: 200 hosting laboratories with weights 1, 1.5 or 2, some
with blackouts or late join dates, and 24 past rounds before the 24 proposed.
"""

from __future__ import annotations

import random
import sys
import time
from datetime import date, timedelta
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from planner import rotation, spec

LABS = 200
ROUNDS = 24


def build() -> tuple[spec.Study, list[tuple[str, str, date]]]:
    rng = random.Random(2027)
    receive_by = date(2027, 1, 19)
    labs = []
    for i in range(LABS):
        lab = {"id": f"lab-{i:03d}", "name": f"Laboratory {i}", "address": ["Street 1"],
               "contact": {"name": "Someone"}, "country": rng.choice(["SE", "NO", "DE", "FI"]),
               "can_host": True, "host_weight": rng.choice([1.0, 1.0, 1.5, 2.0])}
        if rng.random() < 0.2:
            start = receive_by + timedelta(days=rng.randrange(0, 7 * 13 * ROUNDS))
            lab["blackouts"] = [{"from": start, "to": start + timedelta(days=rng.randrange(7, 60))}]
        if rng.random() < 0.1:
            lab["joined"] = receive_by + timedelta(days=rng.randrange(-700, 7 * 13 * ROUNDS))
        labs.append(lab)
    material = {"description": "pellets", "amount": 30, "amount_unit": "g", "storage": "dry",
                "stability_days": 365}
    study = spec.Study.model_validate({
        "study": {"id": "bench", "title": "t", "measurand": "m", "unit": "u"},
        "laboratories": labs,
        "materials": [{"id": "A", **material}, {"id": "B", **material}],
        "design": {"trials": 2},
        "schedule": {"prepare_on": date(2027, 1, 11), "receive_by": receive_by,
                     "test_window_days": 10, "reporting_days": 5},
    })
    past = [(f"past-{k}", f"lab-{rng.randrange(LABS):03d}",
             receive_by - timedelta(weeks=13 * (ROUNDS - k))) for k in range(ROUNDS)]
    return study, past


def main() -> None:
    study, past = build()
    times = []
    for _ in range(5):
        t0 = time.perf_counter()
        proposals = rotation.propose(study, past, rounds=ROUNDS)
        times.append(time.perf_counter() - t0)
    assert len(proposals) == ROUNDS
    print(f"rotation: {LABS} laboratories, {len(past)} past + {ROUNDS} proposed rounds: "
          f"best {min(times) * 1000:.1f} ms, worst {max(times) * 1000:.1f} ms of {len(times)} runs")


if __name__ == "__main__":
    main()
