"""Time the vectorisers of topoclass.vectorize on records the size of real micrographs.

Goal: transforming 100 records with a few thousand bars each through every vectoriser should
take well under a second or two. Results are written down in benchmarks/vectorize.md.

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_vectorize.py [--records 100]
[--sites 4000]`` (no PYTHONPATH needed when topoclass is installed). The diagrams are
invented (random bars shaped like those of a jittered triangular lattice), not measurements.
"""

from __future__ import annotations

import argparse
import platform
import time

import numpy as np
from persim import PersistenceImager

from topoclass.persistence import Diagrams
from topoclass.records import PatternRecord
from topoclass.vectorize import DEFAULT_ORDER_KEYS, make_features


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


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--records", type=int, default=100)
    parser.add_argument("--sites", type=int, default=4000)
    args = parser.parse_args()
    records = invented_records(args.records, args.sites)
    union = make_features("all").fit(records)
    n_bars = sum(len(r.diagrams.h0) + len(r.diagrams.h1) for r in records)
    print(f"{platform.processor() or platform.machine()}, python {platform.python_version()}")
    print(f"{args.records} records, {n_bars / args.records:.0f} bars each, "
          f"{len(union.get_feature_names_out())} features\n")
    print("| step | fit (s) | transform (s) |\n| --- | --- | --- |")
    for name, part in union.transformer_list:
        fit = best_of(lambda part=part: part.fit(records))
        transform = best_of(lambda part=part: part.transform(records))
        print(f"| {name} | {fit:.3f} | {transform:.3f} |")
    fit = best_of(lambda: union.fit(records))
    transform = best_of(lambda: union.transform(records))
    print(f"| **all** | {fit:.3f} | {transform:.3f} |")

    # The same H1 images with persim's PersistenceImager, for comparison (10 records only).
    pim = union.named_transformers["pimage"]
    size = pim.birth_edges_[1] - pim.birth_edges_[0]
    ref = PersistenceImager(birth_range=(float(pim.birth_edges_[0]), float(pim.birth_edges_[-1])),
                            pers_range=(0.0, float(pim.persistence_edges_[1][-1])),
                            pixel_size=float(size), kernel_params={"sigma": pim.sigma**2})
    h1 = [r.diagrams.h1 for r in records[:10]]
    persim_time = best_of(lambda: ref.transform(h1, skew=True), repeat=1)
    print(f"\npersim PersistenceImager, H1 images of 10 records: {persim_time:.3f} s "
          f"(x{args.records / 10:g} for {args.records}: {persim_time * args.records / 10:.2f} s)")


if __name__ == "__main__":
    main()
