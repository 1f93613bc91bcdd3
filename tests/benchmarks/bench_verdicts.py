"""Simulation: how often planner.stats.iso13528 flags a biased laboratory, per sigma_pt policy.

For p = 3, 4, 5, 8 and 15 laboratories, one laboratory biased by 0, 2, 3 or 4 sigma_pt,
the consensus (Algorithm A, ISO 13528:2022 Annex C.3.1) is the assigned value and each
laboratory is scored with ``evaluate`` under the sigma_pt approaches of ISO 13528:2022
clause 8: fixed (§8.2), percent of the assigned value (§8.4), a precision study (§8.5),
the participants' robust SD (§8.6) with the shipped minimum of 8 participants, and the
same without a minimum (min_participants=2). Bands per ISO/IEC 17043: "flagged" is a
band of questionable or unsatisfactory (|score| > 2), "unsat" is unsatisfactory
(|score| >= 3), where the score is z, or z' when u(x_pt) > 0.3 sigma_pt, as planner does.
A round without bands (participants' SD below the minimum) counts as not flagged; its
share is reported as "no band". False flags are the share of unbiased laboratories
flagged, in rounds with no biased laboratory ("false 0σ") and among the others when one
laboratory is 4 sigma_pt off ("false @4σ"); "z' used" is the share of rounds whose bands
come from z'.

Data are hierarchical, so that the precision policy is tested as it is meant: each
laboratory reports n = 2 results, lab effect N(0, sigma_L^2) plus repeats N(0, sigma_r^2),
with true sigma_pt = 1, sigma_r = 0.5, sigma_L^2 = 1 - sigma_r^2/n, level 100; the
precision policy gets sigma_R^2 = sigma_L^2 + sigma_r^2, so that sqrt(sigma_R^2 - (1 -
1/n) sigma_r^2) = 1; percent is 1 % (= sigma_pt at level 100). Results are rounded to 4
decimals (step 1e-4 sigma_pt, so they act as continuous). Every policy scores the same
simulated rounds, so differences between policies are not sampling noise of the data.

The last policy, "fixed, reference lab", takes the mean of an unbiased laboratory as the
assigned value (the set-up planner advises below 5 laboratories); the reference
laboratory is not scored, so its false-flag rates count p - 1 (or p - 2) laboratories.

A second table gives, for p = 2..8, the largest |z| of any laboratory against the
participants' own robust SD, and the largest |z'| against their consensus with a fixed
sigma_pt, when one laboratory (single result) sits 10, 100 or 1e4 sigma away from the
others (N(0, 1)), over a few hundred draws, computed from Algorithm A directly: it shows
whether a small round could flag anyone at all without planner's gates.

Run from the repository root: ``python tests/benchmarks/bench_verdicts.py [--reps N]
[--seed S]``. The default (2000 replications per cell, 200 000 calls of ``evaluate``)
takes about 1.5 minutes on a 2-core laptop; the Monte Carlo SE of a rate is at most
50/sqrt(reps) percentage points (1.1 at the default).
"""

from __future__ import annotations

import argparse
import math
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

if TYPE_CHECKING:
    from numpy.random import Generator

    from planner.stats.iso13528 import SigmaPt

LEVEL, SIGMA_PT, N_REP, SIGMA_r = 100.0, 1.0, 2, 0.5
SIGMA_L = math.sqrt(SIGMA_PT ** 2 - SIGMA_r ** 2 / N_REP)
SIGMA_R = math.sqrt(SIGMA_L ** 2 + SIGMA_r ** 2)
DECIMALS = 4
PS = (3, 4, 5, 8, 15)
BIASES = (0, 2, 3, 4)
FLAGGED = ("questionable", "unsatisfactory")


REFERENCE = "L01"  # an unbiased laboratory, the assigned value of the "reference" rows


def policies() -> dict[str, tuple[SigmaPt, str]]:
    """Return name -> (sigma_pt policy, assigned value: "consensus" or "reference")."""
    from planner.stats.iso13528 import SigmaPt

    return {
        "fixed": (SigmaPt("fixed", value=SIGMA_PT), "consensus"),
        "percent": (SigmaPt("percent", percent=100.0 * SIGMA_PT / LEVEL), "consensus"),
        "precision": (SigmaPt("precision", sigma_R=SIGMA_R, sigma_r=SIGMA_r), "consensus"),
        "participants (min 8)": (SigmaPt("participants"), "consensus"),
        "participants (no min)": (SigmaPt("participants", min_participants=2), "consensus"),
        "fixed, reference lab": (SigmaPt("fixed", value=SIGMA_PT), "reference"),
    }


def simulate(p: int, bias: float, reps: int, rng: Generator,
             pols: dict[str, tuple[SigmaPt, str]]) -> dict[str, list[int]]:
    """Return per policy [biased flagged, biased unsat, others flagged, no band, z'] counts."""
    import numpy as np

    from planner.stats.iso13528 import evaluate

    names = [f"L{i:02d}" for i in range(p)]
    labs = [nm for nm in names for _ in range(N_REP)]
    effect = rng.normal(0.0, SIGMA_L, (reps, p, 1))
    # Lab 0 carries the bias even when bias is 0, so it is one more unbiased lab then.
    effect[:, 0, 0] += bias * SIGMA_PT
    data = np.round(LEVEL + effect + rng.normal(0.0, SIGMA_r, (reps, p, N_REP)), DECIMALS)
    counts = {name: [0, 0, 0, 0, 0] for name in pols}
    for r in range(reps):
        values = data[r].ravel()
        for name, (pol, assigned) in pols.items():
            s = evaluate(values, labs, sigma_pt=pol, assigned=assigned,
                         reference_lab=REFERENCE if assigned == "reference" else None)
            c = counts[name]
            if not s.banded:  # type: ignore[union-attr]
                c[3] += 1
                continue
            bands = [s.labs[nm]["band"] for nm in names]  # type: ignore[union-attr]
            c[0] += bands[0] in FLAGGED
            c[1] += bands[0] == "unsatisfactory"
            c[2] += sum(b in FLAGGED for b in bands[1:])
            c[4] += s.use_z_prime  # type: ignore[union-attr]
    return counts


def max_scores(p: int, distance: float, draws: int, rng: Generator) -> tuple[float, float]:
    """Return the largest |z| against the participants' robust SD and the largest |z'|
    against their consensus with a fixed sigma_pt, one lab ``distance`` sigma from the rest.

    Computed from ``algorithm_a`` directly, so that the gates of ``evaluate`` (no band
    below MIN_CONSENSUS or MIN_PARTICIPANTS) do not hide what the scores would be.
    """
    import numpy as np

    from planner.stats.iso13528 import algorithm_a

    top_z = top_zp = 0.0
    for _ in range(draws):
        x = np.round(LEVEL + rng.normal(0.0, SIGMA_PT, p), DECIMALS)
        x[0] += distance * SIGMA_PT
        est = algorithm_a(x)
        if not est.s > 0:
            continue
        dev = np.abs(x - est.x)
        u_pt = 1.25 * est.s / math.sqrt(p)  # ISO 13528 §7.7.3 (from memory)
        top_z = max(top_z, float(dev.max()) / est.s)
        top_zp = max(top_zp, float(dev.max()) / math.hypot(SIGMA_PT, u_pt))
    return top_z, top_zp


def pct(k: int, n: int) -> str:
    return f"{100.0 * k / n:5.1f}" if n else "    -"


def main() -> None:
    import numpy as np

    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--reps", type=int, default=2000, help="replications per cell")
    parser.add_argument("--seed", type=int, default=13528)
    parser.add_argument("--draws", type=int, default=300, help="draws per cell, max |z| table")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    pols = policies()
    t0 = time.perf_counter()

    res: dict[tuple[int, int], dict[str, list[int]]] = {}
    for p in PS:
        for bias in BIASES:
            res[p, bias] = simulate(p, bias, args.reps, rng, pols)
    t1 = time.perf_counter()

    print(f"flag rates in %: {args.reps} replications per cell, seed {args.seed}, level "
          f"{LEVEL:g}, sigma_pt {SIGMA_PT:g}, n = {N_REP} results per lab (sigma_r = "
          f"{SIGMA_r:g}, sigma_L = {SIGMA_L:.4f}), results rounded to {DECIMALS} decimals")
    print("flag = questionable or unsatisfactory (|score| > 2), unsat = |score| >= 3, score ="
          " z or z'; no-band rounds count as not flagged")
    head = (f"{'p':>3} | " + " | ".join(f"{b}σ flag unsat" for b in BIASES[1:])
            + " | false 0σ false @4σ | no band z' used")
    for name in pols:
        print(f"\n{name}: {pols[name][0].describe()}; assigned value: "
              + ("consensus (Algorithm A)" if pols[name][1] == "consensus"
                 else f"the unbiased laboratory {REFERENCE}"))
        print(head)
        print("-" * len(head))
        for p in PS:
            cells = []
            for b in BIASES[1:]:
                c = res[p, b][name]
                cells.append(f"{pct(c[0], args.reps):>7} {pct(c[1], args.reps):>5}")
            none, four = res[p, 0][name], res[p, 4][name]
            # With no biased lab every lab is an unbiased one; with one at 4σ, p - 1 are.
            ref = pols[name][1] == "reference"  # the reference laboratory is not scored
            false0 = pct(none[0] + none[2], args.reps * (p - ref))
            false4 = pct(four[2], args.reps * (p - 1 - ref))
            nob, zp = (pct(sum(res[p, b][name][k] for b in BIASES), args.reps * len(BIASES))
                       for k in (3, 4))
            print(f"{p:>3} | " + " | ".join(cells)
                  + f" | {false0:>8} {false4:>9} | {nob:>7} {zp:>7}")

    print(f"\nlargest |z| of any lab against the participants' own robust SD, and |z'| against "
          f"their consensus with a fixed sigma_pt = 1 (no gates), one lab d sigma from p - 1 "
          f"others drawn N(0, 1), {args.draws} draws each")
    distances = (10.0, 100.0, 1e4)
    head = f"{'p':>3} | " + " | ".join(f"d = {d:<6g} |z|   |z'|" for d in distances)
    print(head)
    print("-" * len(head))
    for p in range(2, 9):
        cells = [f"{z:10.2f} {zp:6.2f}" for z, zp in (max_scores(p, d, args.draws, rng)
                                                      for d in distances)]
        print(f"{p:>3} | " + " | ".join(f"{c:>20}" for c in cells))
    t2 = time.perf_counter()
    print(f"\nrun time: flag rates {t1 - t0:.1f} s, max |z| {t2 - t1:.1f} s, "
          f"total {t2 - t0:.1f} s")


if __name__ == "__main__":
    main()
