"""Benchmark: labels for 30,000 units on the A4 3 x 8 sheet (a4-3x8-70x37).

The labels are those of a round of 500 laboratories x 20 materials x 3 trials: no two say
the same laboratory, trial and run, as in a real round (the layout cache must key on what
changes the layout, not on the words); the hit rates of the layout cache are printed.

Prints labels per second, bytes per label, peak memory, and the ratio of the
label time to the bare time of making the same 30,000 QR matrices in this run.
Targets (issue 3): one process adds at most 20 % to the bare QR time; with
two worker processes the whole labels.pdf takes at most 70 % of the bare
one-process QR time; at most 400 bytes per label; peak memory at most 400 MB.

Run: python tests/benchmarks/bench_labels.py [--units N]
"""

from __future__ import annotations

import argparse
import os
import resource
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))

from planner import codes, draw
from planner.render import _qr, _sheets, labels


def make_items(n: int) -> list[labels.Label]:
    """Return n labels as a real round has them: 500 laboratories of different names, each
    with 20 units in each of 3 trials (run positions 1 to 20), so that no two labels say the
    same (laboratory, trial, run); one hazard word and use-by date for the whole round."""
    drawn = codes.new_codes(draw.Stream(bytes(range(32)), "bench"), n)
    towns = ("Kalmsund", "Torvhaug", "Helmbrecht", "Crossway", "Lindvik", "Oberau", "Marsden",
             "Vaasanlahti", "Brekke", "Zwolle")
    kinds = ("Plant QC Laboratory", "Compounding Laboratory", "Film Plant Laboratory",
             "Polymer Testing Ltd", "Research Centre")
    out = []
    for i, code in enumerate(drawn):
        lab, rest = divmod(i, 60)
        trial, position = divmod(rest, 20)
        name = f"{towns[lab % len(towns)]} {kinds[lab // len(towns) % len(kinds)]} {lab + 1}"
        out.append(labels.Label(
            code=code, hazard="IRRITANT", trial=f"trial {trial + 1} · run {position + 1}",
            lab=(f"for {name}", f"for L{lab:03d}"), use_by="use by 2027-05-11",
            study="nvp-mfr · round 2027-1", storage="dry, 15-25 °C, sealed bag"))
    assert len({(x.lab, x.trial) for x in out}) == len(out)  # nothing repeats
    return out


def hit_rates(items: list[labels.Label], geometry: _sheets.Geometry) -> str:
    """Return how often the label layout found what it needed already worked out."""
    cache = labels._Cache()
    for item in items:
        labels.layout(item, geometry, cache=cache)
    return ", ".join(f"{name} {cache.hits[name] / max(1, cache.hits[name] + cache.misses[name]):.1%}"
                     f" ({cache.misses[name]} made)" for name in ("fits", "arrangements"))


def _burn(n: int) -> int:
    total = 0
    for i in range(n):
        total += i * i
    return total


def parallel_scaling(workers: int) -> float:
    """Return how many times the work of one process this machine does with ``workers``
    processes busy (2.0 on two free cores; less where cores are shared or busy)."""
    from concurrent.futures import ProcessPoolExecutor

    n = 5_000_000
    start = time.perf_counter()
    _burn(n)
    one = time.perf_counter() - start
    with ProcessPoolExecutor(workers) as pool:
        list(pool.map(_burn, [1000] * workers))  # start the workers first
        start = time.perf_counter()
        list(pool.map(_burn, [n] * workers))
        many = time.perf_counter() - start
    return workers * one / many


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--units", type=int, default=30_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--repeat", type=int, default=1,
                        help="alternate the three timings this often and keep the best of each")
    args = parser.parse_args()
    items = make_items(args.units)
    texts = [codes.format(item.code) for item in items]
    geometry = _sheets.load("a4-3x8-70x37")
    scaling = parallel_scaling(args.workers)
    bares, ones, twos = [], [], []
    same = True
    with tempfile.TemporaryDirectory() as tmp:
        one_path = Path(tmp) / "one.pdf"
        two_path = Path(tmp) / "two.pdf"
        for _ in range(args.repeat):
            start = time.perf_counter()
            for text in texts:
                _qr.matrix(text)
            bares.append(time.perf_counter() - start)

            start = time.perf_counter()
            labels.render(one_path, items, geometry, title="bench", workers=1)
            ones.append(time.perf_counter() - start)

            start = time.perf_counter()
            labels.render(two_path, items, geometry, title="bench", workers=args.workers)
            twos.append(time.perf_counter() - start)
            same = same and two_path.read_bytes() == one_path.read_bytes()
        size = one_path.stat().st_size
    bare, one, two = min(bares), min(ones), min(twos)

    peak_self = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    peak_child = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    n = args.units
    runs = lambda xs: ", ".join(f"{x:.2f}" for x in xs)
    print(f"units                          {n}  (best of {args.repeat})")
    print(f"cpu count                      {os.cpu_count()}; {args.workers} processes do "
          f"{scaling:.2f} x the work of one (pure-Python loop, same run)")
    print(f"bare QR matrices, 1 process    {bare:7.2f} s  ({n / bare:8.0f} /s)   runs: {runs(bares)}")
    print(f"labels.pdf, 1 process          {one:7.2f} s  ({n / one:8.0f} labels/s)"
          f"  ratio to bare {one / bare:.3f}  (target <= 1.20)   runs: {runs(ones)}")
    print(f"labels.pdf, {args.workers} workers           {two:7.2f} s  ({n / two:8.0f} labels/s)"
          f"  ratio to bare {two / bare:.3f}  (target <= 0.70)   runs: {runs(twos)}")
    print(f"file size                      {size} bytes, {size / n:.1f} bytes/label"
          "  (target <= 400)")
    print(f"peak memory                    main {peak_self:.0f} MB, largest worker "
          f"{peak_child:.0f} MB  (target <= 400)")
    print(f"1-process and parallel PDFs identical: {same}")
    print(f"layout cache hits: {hit_rates(items, geometry)}")


if __name__ == "__main__":
    main()
