"""Batch scoring throughput: jobs=1, jobs=2 and a local Dask cluster of two one-thread workers.

Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_cluster.py            # rewrites benchmarks/cluster.md
    PYTHONPATH=. python benchmarks/bench_cluster.py --quick    # 40 images, prints only

Measures, in one run and on the same images (invented, 384² px, a model trained once):

- ``jobs2_vs_capacity``: the ``--jobs 2`` speed-up over ``--jobs 1`` divided by the free parallel
  capacity measured in the same run (``run.parallel_capacity``: 2.0 on two idle cores), so that
  a busy shared machine does not decide the verdict; the raw speed-up is reported beside it;
- ``cluster2_vs_jobs2``: ``--cluster local:2`` (a scheduler on 127.0.0.1 with two one-thread
  worker processes) against ``--jobs 2``: time with jobs=2 over time with the cluster, both
  warm (workers started and their imports done by a first run on a few images).

Each round runs jobs=1, jobs=2 and the cluster in turn, each with a fresh empty cache folder;
the best round of each counts. The load average is written beside the figures: on a machine
shared with other work every ratio here is distorted, and the capacity probe says by how much.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402
from threadpoolctl import threadpool_limits  # noqa: E402

OUT = HERE / "cluster.md"


def measure_cluster(workdir: Path, *, n_images: int = 200, size: int = 384, rounds: int = 2,
                    warm_images: int = 8, progress: Callable[[str], None] | None = None) -> dict:
    """Wall time of ``score_images`` with jobs=1, jobs=2 and ``engine=local:2`` (see module)."""
    from joblib.externals.loky import get_reusable_executor
    from run import parallel_capacity

    from topoclass.cluster import ClusterEngine
    from topoclass.images import collect_image_paths
    from topoclass.scoring import score_images
    from topoclass.synth import write_dataset
    from topoclass.workflow import train_from_labels

    log = progress or (lambda text: None)
    train_sheet = write_dataset(workdir / "train", per_class=6, size=size, seed=11)
    score_sheet = write_dataset(workdir / "score", per_class=max(1, n_images // 4), size=size,
                                seed=13)
    model = train_from_labels(train_sheet, workdir / "model", cv=3, seed=0, jobs=1,
                              cache_dir=workdir / "train-cache", figures=False).model
    paths = collect_image_paths([score_sheet.parent / "images"])
    load_before = os.getloadavg()
    capacity = parallel_capacity()
    times: dict[str, list[float]] = {"jobs1": [], "jobs2": [], "cluster2": []}
    outs: dict[str, Path] = {}
    get_reusable_executor().shutdown(wait=True)
    with threadpool_limits(1), ClusterEngine("local:2") as engine:
        # Warm: joblib's pool and the cluster's workers started, imports done.
        for name, kwargs in (("jobs2", {"jobs": 2}), ("cluster2", {"engine": engine})):
            score_images(model, paths[:warm_images], workdir / f"warm_{name}.csv",
                         cache_dir=False, overwrite=True, **kwargs)
        for r in range(rounds):
            for name, kwargs in (("jobs1", {"jobs": 1}), ("jobs2", {"jobs": 2}),
                                 ("cluster2", {"engine": engine})):
                out = workdir / f"scores_{name}_r{r}.csv"
                t0 = time.perf_counter()
                summary = score_images(model, paths, out, cache_dir=workdir / f"c_{name}_{r}",
                                       overwrite=True, **kwargs)
                times[name].append(time.perf_counter() - t0)
                if summary.scored != len(paths):
                    raise RuntimeError(f"{name}: scored {summary.scored} of {len(paths)}")
                outs.setdefault(name, out)
                log(f"cluster bench round {r} {name}: {times[name][-1]:.1f} s")
    capacity_after = parallel_capacity()
    best = {k: min(v) for k, v in times.items()}
    speedup = best["jobs1"] / best["jobs2"]
    texts = {k: p.read_text() for k, p in outs.items()}
    return {
        "n_images": len(paths), "size": size, "rounds": rounds, "warm_images": warm_images,
        "times_s": times, "best_s": best,
        "jobs2_speedup": speedup,
        "parallel_capacity": capacity, "parallel_capacity_after": capacity_after,
        "jobs2_vs_capacity": speedup / capacity,
        "cluster2_speedup": best["jobs1"] / best["cluster2"],
        "cluster2_vs_jobs2": best["jobs2"] / best["cluster2"],
        "identical_csv": texts["jobs1"] == texts["jobs2"] == texts["cluster2"],
        "load_before": load_before, "load_after": os.getloadavg(),
    }


def cluster_markdown(r: dict, *, mode: str) -> str:
    lb, la = r["load_before"], r["load_after"]
    rows = "\n".join(
        f"| {name} | {', '.join(f'{t:.1f}' for t in r['times_s'][name])} "
        f"| {r['best_s'][name]:.1f} |" for name in ("jobs1", "jobs2", "cluster2"))
    return f"""# Batch scoring on one machine and on a local Dask cluster

Written by `python benchmarks/bench_cluster.py` ({mode}); do not edit by hand.

- date: {dt.datetime.now().strftime('%Y-%m-%d %H:%M')}; machine: {cpu_model()}, \
{os.cpu_count()} logical cores
- **load average (1, 5, 15 min)** before {lb[0]:.2f} {lb[1]:.2f} {lb[2]:.2f}, after \
{la[0]:.2f} {la[1]:.2f} {la[2]:.2f}. The machine is shared with other engineers' test runs: \
with a load average above the core count every figure below is distorted (both sides of each \
ratio compete for the same cores, unevenly over time), and the free-capacity probe below says \
how much parallel room there was.
- {r['n_images']} invented images of {r['size']}² px, {r['rounds']} round(s), a fresh empty \
cache folder every run; warm-up on {r['warm_images']} images first (pools and workers started)

| run | wall time per round (s) | best (s) |
| --- | --- | --- |
{rows}

| figure | value | goal |
| --- | --- | --- |
| `jobs2_speedup` (jobs=1 / jobs=2) | {r['jobs2_speedup']:.2f} | reported |
| free parallel capacity before / after (2.0 = two idle cores) | \
{r['parallel_capacity']:.2f} / {r['parallel_capacity_after']:.2f} | measured |
| `jobs2_vs_capacity` (speed-up / capacity before) | {r['jobs2_vs_capacity']:.2f} | >= 0.9 \
({'pass' if r['jobs2_vs_capacity'] >= 0.9 else 'FAIL'}) |
| `cluster2_vs_jobs2` (jobs=2 time / cluster time) | {r['cluster2_vs_jobs2']:.2f} | >= 0.85 \
({'pass' if r['cluster2_vs_jobs2'] >= 0.85 else 'FAIL'}) |
| cluster speed-up over jobs=1 | {r['cluster2_speedup']:.2f} | reported |
| scores.csv identical for jobs=1, jobs=2 and the cluster | \
{'yes' if r['identical_csv'] else 'NO'} | yes |
"""


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="40 images, one round; print only")
    parser.add_argument("--json", action="store_true", help="print one JSON object only")
    args = parser.parse_args(argv)

    def log(text: str) -> None:
        print(f"[{time.strftime('%H:%M:%S')}] {text}", file=sys.stderr, flush=True)

    n, rounds = (40, 1) if args.quick else (200, 2)
    with tempfile.TemporaryDirectory(prefix="topoclass-cluster-") as tmp:
        result = measure_cluster(Path(tmp), n_images=n, rounds=rounds, progress=log)
    mode = "quick" if args.quick else "full"
    if args.json:
        print(json.dumps(result, indent=1))
    else:
        print(cluster_markdown(result, mode=mode))
    if not args.quick:
        OUT.write_text(cluster_markdown(result, mode=mode), encoding="utf-8")
        log(f"wrote {OUT}")
    return 0 if (result["jobs2_vs_capacity"] >= 0.9 and result["cluster2_vs_jobs2"] >= 0.85
                 and result["identical_csv"]) else 1


if __name__ == "__main__":
    sys.exit(main())
