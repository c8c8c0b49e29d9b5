"""Time the vectorisers of topoclass.vectorize on records the size of real micrographs.

Goal: transforming 100 records with a few thousand bars each through every vectoriser should
take well under a second or two. Also times our persistence images against
``persim.PersistenceImager`` on the same records in the same run, pixel for pixel on the same
grid: ours is kept only while it is clearly (at least 3x) faster; otherwise persim should be
called instead. Rewrites benchmarks/vectorize.md with this run (date and machine included).

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_vectorize.py [--records 100]
[--sites 4000]`` (no PYTHONPATH needed when topoclass is installed). The diagrams are
invented (random bars shaped like those of a jittered triangular lattice), not measurements.
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
from persim import PersistenceImager

from topoclass.persistence import Diagrams
from topoclass.records import PatternRecord
from topoclass.vectorize import DEFAULT_ORDER_KEYS, PersistenceImageFeatures, make_features

sys.path.insert(0, str(Path(__file__).parent))
from _machine import cpu_model  # noqa: E402


def invented_records(n_records: int, n_sites: int, seed: int = 0) -> list[PatternRecord]:
    rng = np.random.default_rng(seed)
    records = []
    for i in range(n_records):
        n0, n1 = n_sites - 1, int(0.42 * n_sites)  # ratios seen on jittered lattices
        deaths = rng.normal(1.0, 0.07, n0).clip(0.5)
        births = rng.normal(1.05, 0.07, n1).clip(0.6)
        ends = np.minimum(births + rng.exponential(0.1, n1), 2.5)
        diagrams = Diagrams(
            h0=np.column_stack([np.zeros(n0), deaths]), h1=np.column_stack([births, ends]),
            h1_truncated=ends >= 2.5, h0_edges=np.zeros((n0, 2), int),
            h1_edges=np.zeros((n1, 2), int), spacing=10.0, max_scale=2.5,
        )
        order = {k: float(rng.random()) for k in DEFAULT_ORDER_KEYS}
        records.append(PatternRecord(diagrams, order, source=f"invented_{i}.tif"))
    return records


def best_of(func, repeat: int = 3) -> float:
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        func()
        times.append(time.perf_counter() - start)
    return min(times)


#: Ours is kept only while it is at least this many times faster than persim on the same work.
KEEP_RATIO = 3.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=100)
    parser.add_argument("--sites", type=int, default=4000)
    parser.add_argument("--persim-records", type=int, default=10,
                        help="records in the persim comparison (its loop is slow)")
    args = parser.parse_args()
    records = invented_records(args.records, args.sites)
    union = make_features("all").fit(records)
    n_bars = sum(len(r.diagrams.h0) + len(r.diagrams.h1) for r in records)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    lines = [
        "# Vectoriser timings",
        "",
        "Written by `python benchmarks/bench_vectorize.py`; do not edit by hand.",
        "",
        f"- date: {dt.datetime.now():%Y-%m-%d %H:%M}; load average at the start {load:.1f}",
        f"- machine: {cpu_model()}, {os.cpu_count()} logical cores; Python "
        f"{platform.python_version()}, numpy {np.__version__}, persim {version('persim')}",
        f"- {args.records} invented records, {n_bars / args.records:.0f} bars each, "
        f"{len(union.get_feature_names_out())} features; wall seconds, best of 3",
        "",
        "| step | fit (s) | transform (s) |",
        "| --- | --- | --- |",
    ]
    for name, part in union.transformer_list:
        fit = best_of(lambda part=part: part.fit(records))
        transform = best_of(lambda part=part: part.transform(records))
        lines.append(f"| {name} | {fit:.3f} | {transform:.3f} |")
    fit = best_of(lambda: union.fit(records))
    transform = best_of(lambda: union.transform(records))
    lines.append(f"| **all** (FeatureUnion) | {fit:.3f} | {transform:.3f} |")

    ours_s, persim_s, grid, worst = compare_with_persim(records[: args.persim_records])
    ratio = persim_s / ours_s
    verdict = ("keep ours" if ratio >= KEEP_RATIO
               else "call persim instead: ours is not clearly faster")
    lines += [
        "",
        "## Persistence images: ours against persim",
        "",
        f"H1 images of the same {args.persim_records} records on the same {grid} grid of square "
        "pixels, Gaussian kernel and linear weight, in this run (best of 3 for ours, of 1 for "
        "persim):",
        "",
        "| implementation | seconds | per record (ms) |",
        "| --- | --- | --- |",
        f"| ours (`PersistenceImageFeatures`, dims=(1,)) | {ours_s:.4f} | "
        f"{1e3 * ours_s / args.persim_records:.2f} |",
        f"| `persim.PersistenceImager.transform` | {persim_s:.4f} | "
        f"{1e3 * persim_s / args.persim_records:.2f} |",
        "",
        f"Ratio persim / ours: **{ratio:.1f}x** (rule: keep ours only at {KEEP_RATIO:g}x or more: "
        f"{verdict}). Largest pixel difference between the two: {worst:.1e} (relative to the "
        "largest pixel).",
        "",
    ]
    text = "\n".join(lines)
    print(text)
    out = Path(__file__).with_name("vectorize.md")
    out.write_text(text, encoding="utf-8")
    print(f"wrote {out}")


def compare_with_persim(records: list[PatternRecord]) -> tuple[float, float, str, float]:
    """Seconds for our H1 images and persim's on the same records and pixels, and their gap."""
    ours = PersistenceImageFeatures(pixels=(10, 10), sigma=0.1, dims=(1,), per_site=False)
    ours.fit(records)
    b, p = ours.birth_edges_, ours.persistence_edges_[1]
    # Square pixels so persim (one pixel size) covers exactly our grid: widen the shorter axis.
    size = max(b[1] - b[0], p[1] - p[0])
    ours.birth_edges_ = b[0] + size * np.arange(len(b))
    ours.persistence_edges_ = {1: size * np.arange(len(p))}
    ref = PersistenceImager(birth_range=(float(ours.birth_edges_[0]), float(ours.birth_edges_[-1])),
                            pers_range=(0.0, float(ours.persistence_edges_[1][-1])),
                            pixel_size=float(size), kernel_params={"sigma": ours.sigma**2})
    h1 = [r.diagrams.h1 for r in records]
    ours_s = best_of(lambda: ours.transform(records))
    start = time.perf_counter()
    theirs = ref.transform(h1, skew=True)
    persim_s = time.perf_counter() - start
    mine = ours.transform(records).reshape(len(records), *np.asarray(theirs[0]).shape)
    theirs = np.asarray(theirs)
    worst = float(np.abs(mine - theirs).max() / np.abs(theirs).max())
    return ours_s, persim_s, f"{theirs.shape[1]} x {theirs.shape[2]}", worst


if __name__ == "__main__":
    main()
