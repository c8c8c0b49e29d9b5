"""One benchmark harness for topoclass: speed, memory, parallel speed-up and accuracy.

Run from the repository root::

    PYTHONPATH=. python benchmarks/run.py            # full run; rewrites benchmarks/RESULTS.md
    PYTHONPATH=. python benchmarks/run.py --quick    # about 5 minutes on 2 cores; prints only
    PYTHONPATH=. python benchmarks/run.py --json     # one JSON object on stdout

Every number is measured in this run; goals are checked on ratios measured within the run
(both sides of a ratio timed in the same process, best of N), because absolute times on a
shared 2-core machine are noise. See benchmarks/README.md for what each number means.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import resource
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model, peak_rss_mb  # noqa: E402
from threadpoolctl import threadpool_info, threadpool_limits  # noqa: E402

from topoclass.order import order_measures  # noqa: E402
from topoclass.persistence import pattern_persistence, rips_persistence  # noqa: E402
from topoclass.records import PatternRecord  # noqa: E402
from topoclass.sites import find_sites  # noqa: E402
from topoclass.synth import hexagonal_lattice, render_micrograph  # noqa: E402
from topoclass.vectorize import make_features  # noqa: E402

RESULTS = HERE / "RESULTS.md"
ACCURACY = HERE / "accuracy.md"
README = HERE / "README.md"

#: Sizes and repeats of each mode. Quick mode keeps every goal's own size except where noted.
MODES = {
    "full": {
        "rips_sites": 3000, "rips_limited_repeats": 5,
        "scaling_sizes": (1000, 3000, 10000, 30000, 100000),
        "scaling_repeats": {1000: 5, 3000: 5, 10000: 3, 30000: 2, 100000: 2},
        "rss_sites": 100000,
        "featurize_repeats": 7,
        "jobs_images_per_class": 10, "jobs_size": 384, "jobs_rounds": 4, "cluster_images": 200,
        "sites_repeats": 3,
        "accuracy": {"per_class": 24, "size": 320, "seed": 2026, "cv": 5},
    },
    "quick": {
        # Dense ripser costs ~n^3 (3.5 s CPU at 1k sites, 29 s at 2k, ~90 s at 3k here) while
        # the radius-limited one costs ~n, so the speed-up grows about as n^2: a pass at 2,000
        # sites is a conservative stand-in for the 3,000-site goal.
        "rips_sites": 2000, "rips_limited_repeats": 3,
        "scaling_sizes": (1000, 3000, 10000, 30000, 100000),
        "scaling_repeats": {1000: 3, 3000: 3, 10000: 2, 30000: 1, 100000: 1},
        "rss_sites": 100000,
        "featurize_repeats": 5,
        "jobs_images_per_class": 10, "jobs_size": 384, "jobs_rounds": 2, "cluster_images": 200,
        "sites_repeats": 3,
        "accuracy": {"per_class": 12, "size": 320, "seed": 2026, "cv": 5},
    },
}

GOALS = {
    "rips_speedup_3k": (">=", 300.0),
    "diagrams_identical": ("==", True),
    "scaling_slope": ("<=", 1.2),
    "peak_rss_100k_mb": ("<=", 1024.0),
    # Restated in issue 13: the end-to-end features over what cannot be done without (the
    # floor plus ripser alone), the parallel speed-up over the free capacity, and the cluster.
    "features_vs_engine": ("<=", 1.5),
    "jobs2_vs_capacity": (">=", 0.9),
    "cluster2_vs_jobs2": (">=", 0.85),
    # Reported as figures, no longer pass/fail goals.
    "featurize_vs_floor": ("figure", None),
    "jobs2_speedup": ("figure", None),
    "site_finding_2048_s": ("<=", 1.0),
    "report_vs_score": ("<=", 0.5),
    "detail_kb_per_image": ("<=", 150.0),
    "active_label_saving": (">=", 0.30),
}

SCALING_SPACING = 10.0  # px; the rendered images of the scaling run
SCALING_JITTER = 0.05  # spacings
MAX_SCALE = 2.5  # spacings; topoclass.features.FeatureSettings().max_scale
RTOL = 1e-9

# Why two goals are missed, in words only: every figure in RESULTS.md comes from the run that
# wrote it; the profiling history (before/after of each change) lives in the git log.
NOTES = """
**`featurize_vs_floor` is a figure now** (issue 13); its goal became `features_vs_engine`,
the end-to-end features over the floor plus ripser alone on the same sites with the same
options: what the chain adds to the two parts it cannot do without (site finding, the
triangulation, death edges, order measures, amounts, vectorising). Ripser's cocycles are
computed only where a result uses them (birth edges of truncated bars); the saving is measured
under "End-to-end features against the floor".

**Why the floor alone is out of reach.** The floor is one Gaussian filter, a few passes over a
megapixel. The chain has to find every site and compute the exact Vietoris–Rips H1 of all site
pairs closer than the radius limit, and ripser alone on exactly that input takes several times
the floor (measured in every run: "ripser's H1 alone" under "End-to-end features against the
floor"). Meeting the goal would take an H1 algorithm several times faster than ripser on the
same complex, or an approximate H1; neither is worth the risk to the features, so the goal is
kept as written and reported as missed.

**What caps `jobs2_speedup`.** The two workers share a machine whose "free cores" probe (under
"Batch scoring") reads below two when other jobs run; the first `jobs=2` call also starts two
worker processes, which a short batch does not amortise (the cold-pool figure beside it).
"""


# ---------------------------------------------------------------------------------------------
# 1. Radius-limited against dense Rips


def measure_rips(n_sites: int = 3000, *, repeats: int = 5, seed: int = 0) -> dict:
    """Dense ``ripser.ripser(points, maxdim=1)`` against :func:`rips_persistence` on one cloud.

    The cloud is :func:`bench_persistence.jittered_pattern` (jittered triangular lattice, jitter
    0.08 spacing) in spacing units. CPU seconds (both are single-threaded): the radius-limited
    computation best of ``repeats``, the dense one once (it takes minutes). Bars: every finite
    H0 death and every H1 bar that dies below ``max_scale`` must match, sorted, to ``RTOL``.
    """
    from bench_persistence import jittered_pattern
    from ripser import ripser

    pattern = jittered_pattern(n_sites, seed=seed)
    xy = pattern.xy / pattern.spacing
    limited = []
    for _ in range(repeats):
        c0, w0 = time.process_time(), time.perf_counter()
        raw = rips_persistence(xy, max_scale=MAX_SCALE)
        limited.append((time.process_time() - c0, time.perf_counter() - w0))
    # The pattern-level entry point (border exclusion, Diagrams) for the record.
    c0 = time.process_time()
    pattern_persistence(pattern, max_scale=MAX_SCALE)
    pattern_cpu = time.process_time() - c0
    c0, w0 = time.process_time(), time.perf_counter()
    dense = ripser(xy, maxdim=1)["dgms"]
    dense_cpu, dense_wall = time.process_time() - c0, time.perf_counter() - w0

    d0 = np.sort(dense[0][np.isfinite(dense[0][:, 1]), 1])
    # Our H0 comes from the exact float64 EMST; ripser stores distances as float32, so its H0
    # deaths are float32-rounded (relative error up to 2**-24 ~ 6e-8). Compare like with like:
    # ours rounded to float32 (then to RTOL), and report the float64 difference as well.
    m0_exact = np.sort(raw["h0"][:, 1])
    m0 = m0_exact.astype(np.float32).astype(np.float64)
    d1 = _sorted_bars(dense[1][dense[1][:, 1] < MAX_SCALE])
    m1 = _sorted_bars(raw["h1"][~raw["h1_truncated"]])
    same0 = d0.shape == m0.shape and bool(np.allclose(d0, m0, rtol=RTOL, atol=0))
    same1 = d1.shape == m1.shape and bool(np.allclose(d1, m1, rtol=RTOL, atol=0))
    worst1 = _max_rel(d1, m1) if same1 else float("nan")
    worst0 = _max_rel(d0, m0_exact) if d0.shape == m0_exact.shape else float("nan")
    best_cpu = min(c for c, _ in limited)
    return {
        "n_sites": int(xy.shape[0]),
        "max_scale": MAX_SCALE,
        "dense_cpu_s": dense_cpu,
        "dense_wall_s": dense_wall,
        "limited_cpu_s": best_cpu,
        "limited_wall_s": min(w for _, w in limited),
        "limited_repeats": repeats,
        "pattern_persistence_cpu_s": pattern_cpu,
        "speedup": dense_cpu / best_cpu,
        "h0_bars": int(d0.size),
        "h1_bars_below_cap": int(d1.shape[0]),
        "h1_bars_dense_at_or_above_cap": int(np.count_nonzero(dense[1][:, 1] >= MAX_SCALE)),
        "h1_identical": same1,
        "h0_identical": same0,
        "identical": bool(same0 and same1),
        "h1_max_relative_difference": worst1,
        "h0_float64_max_relative_difference": worst0,
    }


# ---------------------------------------------------------------------------------------------
# 2. Scaling of the whole per-image chain, and peak memory


def scaling_image(n_sites: int, *, seed: int = 0) -> np.ndarray:
    """An invented square micrograph (dark pores, spacing 10 px) holding about ``n_sites``."""
    side = int(round(SCALING_SPACING * np.sqrt(n_sites * np.sqrt(3.0) / 2.0)))
    xy = hexagonal_lattice((side, side), SCALING_SPACING, angle=7.0, jitter=SCALING_JITTER,
                           margin=-SCALING_SPACING, seed=seed)
    return render_micrograph(xy, (side, side), 0.3 * SCALING_SPACING, blur=1.0, noise=0.08,
                             illumination=0.2, seed=seed + 1)


def chain(image: np.ndarray, union, *, source: str = "invented") -> tuple[dict, PatternRecord]:
    """find_sites → pattern_persistence → order_measures → fitted union transform; CPU s each."""
    t = [time.process_time()]
    pattern = find_sites(image, source=source)
    t.append(time.process_time())
    diagrams = pattern_persistence(pattern, max_scale=MAX_SCALE)
    t.append(time.process_time())
    order = order_measures(pattern)
    t.append(time.process_time())
    record = PatternRecord(diagrams=diagrams, order=order, source=source)
    if union is not None:
        union.transform([record])
    t.append(time.process_time())
    steps = np.diff(t)
    return ({"sites_s": steps[0], "persistence_s": steps[1], "order_s": steps[2],
             "vectorize_s": steps[3], "total_s": float(t[-1] - t[0]),
             "n_sites": pattern.n_sites}, record)


def fitted_union(image: np.ndarray):
    """``make_features("all")`` fitted on the record of one image (the fit is not timed)."""
    _, record = chain(image, None)
    return make_features("all").fit([record])


def measure_scaling(sizes, repeats: dict, *, union=None, keep: int | None = None,
                    progress: Callable[[str], None] | None = None) -> dict:
    """Best-of-N CPU time of :func:`chain` per size, and the slope of log(time) vs log(sites).

    When ``keep`` is one of ``sizes``, that image is returned too (for the memory child).
    """
    if union is None:
        union = fitted_union(scaling_image(3000))
    rows, kept = [], None
    for n in sizes:
        image = scaling_image(n)
        best = None
        for _ in range(repeats.get(n, 1)):
            w0 = time.perf_counter()
            row, _ = chain(image, union)
            row["wall_s"] = time.perf_counter() - w0
            if best is None or row["total_s"] < best["total_s"]:
                best = row
        best.update({"target_sites": n, "image_px": image.shape[0], "repeats": repeats.get(n, 1),
                     "us_per_site": 1e6 * best["total_s"] / best["n_sites"]})
        rows.append(best)
        if progress:
            progress(f"scaling {n}: {best['total_s']:.2f} s CPU ({best['n_sites']} sites)")
        if keep == n:
            kept = image
        del image
    n = np.array([r["n_sites"] for r in rows], dtype=float)
    t = np.array([r["total_s"] for r in rows])
    slope = float(np.polyfit(np.log(n), np.log(t), 1)[0]) if len(rows) > 1 else float("nan")
    stage_slopes = {}
    for key in ("sites_s", "persistence_s", "order_s", "vectorize_s"):
        s = np.array([max(r[key], 1e-6) for r in rows])
        stage_slopes[key[:-2]] = float(np.polyfit(np.log(n), np.log(s), 1)[0])
    return {"rows": rows, "slope": slope, "stage_slopes": stage_slopes, "image": kept}


def measure_peak_rss(image: np.ndarray) -> dict:
    """Peak resident memory of a fresh process running :func:`chain` once on ``image``.

    The image is handed over as a ``.npy`` file, so the child holds only what the chain needs.
    The child reports the kernel's high-water mark of its own address space (``VmHWM``, reset
    at exec) before and after; ``ru_maxrss`` of ``RUSAGE_SELF`` is reported beside it, and
    ``RUSAGE_CHILDREN`` as seen by this process (on Linux a forked child's ``ru_maxrss`` may
    start at its parent's peak, which is why ``VmHWM`` is the headline).
    """
    with tempfile.TemporaryDirectory(prefix="topoclass-rss-") as tmp:
        path = Path(tmp) / "image.npy"
        np.save(path, image)
        out = subprocess.run(
            [sys.executable, str(Path(__file__).resolve()), "--rss-child", str(path)],
            check=True, capture_output=True, text=True, env={**os.environ, "PYTHONPATH": str(ROOT)},
        )
    child = json.loads(out.stdout.strip().splitlines()[-1])
    child["children_ru_maxrss_mb"] = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
    return child


def _rss_child(path: str) -> None:
    threadpool_limits(1)
    after_imports = peak_rss_mb()
    image = np.load(path)
    union = fitted_union(image[:600, :600].copy())  # fit on a corner: small, not the big image
    before = peak_rss_mb()
    row, record = chain(image, union)
    print(json.dumps({
        "n_sites": row["n_sites"],
        "image_px": int(image.shape[0]),
        "image_mb": image.nbytes / 2**20,
        "after_imports_mb": after_imports,
        "before_chain_mb": before,
        "peak_rss_mb": peak_rss_mb(),
        "ru_maxrss_self_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,
        "cpu_s": row["total_s"],
        "h1_bars": int(record.diagrams.h1.shape[0]),
    }))


# ---------------------------------------------------------------------------------------------
# 3. End-to-end features of one micrograph file against reading it plus one Gaussian filter


def measure_featurize(workdir: Path, *, repeats: int = 7, seed: int = 3) -> dict:
    """Best-of-N wall time of ``measure_pattern`` + fitted "all" transform on a 1 MP file, over
    best-of-N of ``read_micrograph`` + one ``gaussian_filter`` (sigma = spacing / 4).

    The file is an invented 1024 x 1024 16-bit TIFF (spacing 12 px, jitter 0.04, blur, noise,
    uneven illumination). Both sides run on one thread (threadpoolctl), interleaved.
    """
    import tifffile
    from ripser import ripser
    from scipy import ndimage
    from scipy.sparse import coo_matrix
    from scipy.spatial import cKDTree

    from topoclass.features import measure_pattern
    from topoclass.images import read_micrograph
    from topoclass.persistence import _radius_graph  # the very graph pattern_persistence uses

    spacing, size = 12.0, 1024
    xy = hexagonal_lattice((size, size), spacing, angle=17.0, jitter=0.04, margin=-spacing,
                           seed=seed)
    image = render_micrograph(xy, (size, size), 0.3 * spacing, blur=1.0, noise=0.1,
                              illumination=0.3, seed=seed + 1)
    path = workdir / "micrograph_1mp.tif"
    tifffile.imwrite(path, np.round(image * 65535).astype(np.uint16))
    record = measure_pattern(path)
    union = make_features("all").fit([record])
    sigma = spacing / 4.0

    def floor():
        micrograph = read_micrograph(path)
        ndimage.gaussian_filter(micrograph.image, sigma)

    def full():
        union.transform([measure_pattern(path)])

    # The part no change of topoclass can remove: ripser's H1 alone, on the same sites and the
    # same radius graph, with the options pattern_persistence uses (no cocycles: they are
    # computed only for truncated bars of tied length, which this image has not); and, to
    # measure what dropping them saves, with cocycles as before, and pattern_persistence
    # keeping every birth edge ("all") against the default ("cut").
    pattern = find_sites(read_micrograph(path).image)
    pts = pattern.xy / pattern.spacing
    pairs, dist = _radius_graph(pts, MAX_SCALE, cKDTree(pts))
    graph = coo_matrix((dist, (pairs[:, 0], pairs[:, 1])), shape=(len(pts), len(pts)))

    def bare_ripser(cocycles: bool = False):
        ripser(graph, distance_matrix=True, maxdim=1, thresh=MAX_SCALE, do_cocycles=cocycles)

    floor_t, full_t, ripser_t, ripser_co_t, cut_t, all_t = [], [], [], [], [], []
    with threadpool_limits(1):
        for _ in range(repeats):
            floor_t.append(_wall(floor))
            full_t.append(_wall(full))
            ripser_t.append(_wall(bare_ripser))
            ripser_co_t.append(_wall(lambda: bare_ripser(True)))
            cut_t.append(_wall(lambda: pattern_persistence(pattern, max_scale=MAX_SCALE)))
            all_t.append(_wall(lambda: pattern_persistence(pattern, max_scale=MAX_SCALE,
                                                           birth_edges="all")))
    truncated = int(np.count_nonzero(record.diagrams.h1_truncated))
    # Where the end-to-end time goes (one more run, CPU seconds per stage).
    micro = read_micrograph(path)
    stages, _ = chain(micro.image, union, source=str(path))
    return {
        "image_px": size, "spacing_px": spacing, "sigma_px": sigma,
        "n_sites": stages["n_sites"], "repeats": repeats,
        "floor_s": min(floor_t), "features_s": min(full_t),
        "ratio": min(full_t) / min(floor_t),
        "ripser_s": min(ripser_t), "ripser_edges": int(pairs.shape[0]),
        "ripser_vs_floor": min(ripser_t) / min(floor_t),
        # What the chain costs beyond the two parts it cannot do without (a goal since issue 13).
        "features_vs_floor_plus_ripser": min(full_t) / (min(floor_t) + min(ripser_t)),
        "ripser_cocycles_s": min(ripser_co_t),
        "persistence_cut_s": min(cut_t), "persistence_all_s": min(all_t),
        "cocycle_saving_s": min(all_t) - min(cut_t),
        "cocycle_saving_of_features": (min(all_t) - min(cut_t)) / min(full_t),
        "h1_truncated": truncated,
        "stages_cpu_s": {k: v for k, v in stages.items() if k.endswith("_s")},
    }


# ---------------------------------------------------------------------------------------------
# 4. Batch scoring with two worker processes against one


def measure_jobs(workdir: Path, *, per_class: int = 10, size: int = 384, rounds: int = 1,
                 progress: Callable[[str], None] | None = None) -> dict:
    """Wall time of ``score_images(..., jobs=2)`` against ``jobs=1`` on 4 x ``per_class`` images.

    A model is trained once beforehand (``train_from_labels`` on another invented set, cv=3,
    default classifier). Every scoring run gets a fresh, empty cache folder. Round 0 runs
    jobs=1 then jobs=2 with a freshly started worker pool ("cold pool": what one CLI call
    pays); each of ``rounds`` further rounds runs jobs=1 then jobs=2 on joblib's already
    started pool ("warm pool"). The parent runs with its BLAS/OpenMP pools limited to one
    thread; the workers limit theirs (``topoclass.features._limited``) and loky limits them too.
    The free parallel capacity of the machine is measured just before (:func:`parallel_capacity`).
    """
    from joblib.externals.loky import get_reusable_executor

    from topoclass.images import collect_image_paths
    from topoclass.scoring import score_images
    from topoclass.synth import write_dataset
    from topoclass.workflow import train_from_labels

    train_sheet = write_dataset(workdir / "train", per_class=6, size=size, seed=11)
    score_sheet = write_dataset(workdir / "score", per_class=per_class, size=size, seed=12)
    t0 = time.perf_counter()
    training = train_from_labels(train_sheet, workdir / "model", cv=3, seed=0, jobs=1,
                                 cache_dir=workdir / "train-cache", figures=False)
    train_s = time.perf_counter() - t0
    model = training.model
    paths = collect_image_paths([score_sheet.parent / "images"])
    capacity = parallel_capacity()
    get_reusable_executor().shutdown(wait=True)  # a cold pool for the first jobs=2 run
    runs: dict[str, list[float]] = {"1": [], "2": []}
    outs: dict[str, Path] = {}
    with threadpool_limits(1):
        for r in range(rounds + 1):
            for jobs in (1, 2):
                out = workdir / f"scores_r{r}_j{jobs}.csv"
                t0 = time.perf_counter()
                summary = score_images(model, paths, out, jobs=jobs,
                                       cache_dir=workdir / f"cache_r{r}_j{jobs}", overwrite=True)
                runs[str(jobs)].append(time.perf_counter() - t0)
                outs.setdefault(str(jobs), out)
                if summary.scored != len(paths):
                    raise RuntimeError(f"scored {summary.scored} of {len(paths)} images")
                if progress:
                    progress(f"score jobs={jobs} round {r}: {runs[str(jobs)][-1]:.2f} s")
    one, two = outs["1"].read_text().splitlines(), outs["2"].read_text().splitlines()
    first_diff = next((f"{a} | {b}" for a, b in zip(one, two, strict=False) if a != b), None)
    t1 = min(runs["1"])
    return {
        "n_images": len(paths), "size": size, "rounds": rounds,
        "classifier": model.classifier, "train_s": train_s,
        "jobs1_s": runs["1"], "jobs2_s": runs["2"],
        "speedup_cold": runs["1"][0] / runs["2"][0],
        "speedup_warm": t1 / min(runs["2"][1:]) if rounds else None,
        "parallel_capacity": capacity,
        "identical_csv": one == two,
        "first_difference": first_diff,
    }


def parallel_capacity(n: int = 4_000_000) -> float:
    """How many cores this process can get right now: one pure-Python loop timed alone, then
    the same loop in two processes at once; 2.0 on an idle 2-core machine, about 1.0 when
    another program keeps one core busy."""
    from concurrent.futures import ProcessPoolExecutor

    alone = _spin(n)
    with ProcessPoolExecutor(2) as pool:
        list(pool.map(_spin, [1000, 1000]))  # start both workers first
        t0 = time.perf_counter()
        list(pool.map(_spin, [n, n]))
        both = time.perf_counter() - t0
    return 2.0 * min(alone, _spin(n)) / both


def _spin(n: int) -> float:
    t0 = time.perf_counter()
    s = 0
    for i in range(n):
        s += i
    return time.perf_counter() - t0


# ---------------------------------------------------------------------------------------------
# 5. Site finding on a 2048 x 2048 image (bench_sites.speed)


def measure_sites(repeats: int = 3) -> dict:
    """``find_sites`` on bench_sites' invented 2048 x 2048 uint16 image, best of N, one thread."""
    import bench_sites

    best, n_sites, spacing, _ = bench_sites.speed(False, repeats=repeats)
    return {"best_s": best, "n_sites": n_sites, "spacing_px": spacing, "repeats": repeats}


# ---------------------------------------------------------------------------------------------
# Harness


def run_all(mode: str, *, log: Callable[[str], None]) -> dict:
    cfg = MODES[mode]
    started = time.perf_counter()
    load_start = os.getloadavg()
    results: dict = {"mode": mode, "machine": machine_info(), "load_start": load_start}
    seconds: dict = {}

    def timed(name, fn):
        t0 = time.perf_counter()
        value = fn()
        seconds[name] = time.perf_counter() - t0
        log(f"{name}: done in {seconds[name]:.0f} s")
        return value

    with tempfile.TemporaryDirectory(prefix="topoclass-bench-") as tmp:
        tmp = Path(tmp)
        with threadpool_limits(1):
            scaling = timed("scaling", lambda: measure_scaling(
                cfg["scaling_sizes"], cfg["scaling_repeats"], keep=cfg["rss_sites"],
                progress=log))
            image = scaling.pop("image")
            if image is None:
                image = scaling_image(cfg["rss_sites"])
        rss = timed("peak_rss", lambda img=image: measure_peak_rss(img))
        del image
        with threadpool_limits(1):
            sites = timed("site_finding", lambda: measure_sites(cfg["sites_repeats"]))
            featurize = timed("featurize", lambda: measure_featurize(
                tmp, repeats=cfg["featurize_repeats"]))
            jobs = timed("jobs", lambda: measure_jobs(
                tmp / "jobs", per_class=cfg["jobs_images_per_class"], size=cfg["jobs_size"],
                rounds=cfg["jobs_rounds"], progress=log))
            from accuracy import measure_accuracy

            accuracy = timed("accuracy", lambda: measure_accuracy(
                **cfg["accuracy"], jobs=2, workdir=tmp / "accuracy"))
            from bench_report import measure_report

            batch_report = timed("report", lambda: measure_report(
                tmp / "report", rounds=cfg["jobs_rounds"], progress=log))
            from bench_cluster import measure_cluster

            cluster = timed("cluster", lambda: measure_cluster(
                tmp / "cluster", n_images=cfg["cluster_images"], rounds=2,
                progress=log))
            rips = timed("rips", lambda: measure_rips(cfg["rips_sites"],
                                                      repeats=cfg["rips_limited_repeats"]))
            from bench_labeling import measure_labeling

            labeling = timed("labeling", lambda: measure_labeling(mode, jobs=2, log=log))

    values = {
        "rips_speedup_3k": rips["speedup"],
        "diagrams_identical": rips["identical"],
        "scaling_slope": scaling["slope"],
        "peak_rss_100k_mb": rss["peak_rss_mb"],
        "features_vs_engine": featurize["features_vs_floor_plus_ripser"],
        "jobs2_vs_capacity": (jobs["speedup_warm"] or jobs["speedup_cold"])
        / jobs["parallel_capacity"],
        "cluster2_vs_jobs2": cluster["cluster2_vs_jobs2"],
        "featurize_vs_floor": featurize["ratio"],
        "jobs2_speedup": jobs["speedup_warm"] if jobs["speedup_warm"] else jobs["speedup_cold"],
        "site_finding_2048_s": sites["best_s"],
        "report_vs_score": batch_report["report_vs_score"],
        "detail_kb_per_image": batch_report["detail_kb_per_image"],
        "active_label_saving": labeling["active_label_saving"],
    }
    for key, value in values.items():
        op, goal = GOALS[key]
        if op == "figure":
            results[key] = {"value": value, "goal": "reported", "pass": None}
            continue
        results[key] = {"value": value, "goal": f"{op} {goal}", "pass": _passes(value, op, goal)}
    results["jobs2_speedup_cold_pool"] = jobs["speedup_cold"]
    results["parallel_capacity"] = jobs["parallel_capacity"]
    results["accuracy"] = {"goal": "reported, no threshold", "rows": accuracy["rows"]}
    results["details"] = {"rips": rips, "scaling": scaling, "peak_rss": rss,
                          "featurize": featurize, "jobs": jobs, "site_finding": sites,
                          "cluster": cluster,
                          "report": batch_report,
                          "labeling": {k: v for k, v in labeling.items() if k != "runs"},
                          "accuracy": {k: v for k, v in accuracy.items() if k != "rows"}}
    results["sizes"] = _sizes_text(cfg)
    results["seconds"] = seconds
    results["total_s"] = time.perf_counter() - started
    results["load_end"] = os.getloadavg()
    results["all_pass"] = all(results[k]["pass"] for k in GOALS if GOALS[k][0] != "figure")
    results["_accuracy_full"] = accuracy
    results["_labeling_full"] = labeling
    return results


def machine_info() -> dict:
    from importlib.metadata import PackageNotFoundError, version

    import joblib
    import persim
    import ripser
    import scipy
    import skimage
    import sklearn

    def _version(name: str) -> str:
        try:
            return version(name)
        except PackageNotFoundError:
            return "?"

    blas = [f"{p.get('internal_api')} {p.get('version') or ''} "
            f"({Path(p.get('filepath', '?')).name}, {p.get('num_threads')} threads by default)"
            for p in threadpool_info()]
    return {
        "cores": os.cpu_count(),
        "usable_cores": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else None,
        "cpu": cpu_model(),
        "python": platform.python_version(),
        "versions": {"numpy": np.__version__, "scipy": scipy.__version__,
                     "scikit-learn": sklearn.__version__, "scikit-image": skimage.__version__,
                     "ripser": getattr(ripser, "__version__", None) or _version("ripser"),
                     "persim": getattr(persim, "__version__", None) or _version("persim"),
                     "joblib": joblib.__version__, "threadpoolctl": _version("threadpoolctl")},
        "thread_pools": blas,
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
    }


def table_text(results: dict) -> str:
    """The goals table (Markdown, also readable in a terminal)."""
    d = results["details"]
    how = {
        "rips_speedup_3k": f"{d['rips']['n_sites']} sites: dense {d['rips']['dense_cpu_s']:.1f} s"
                           f" / limited {d['rips']['limited_cpu_s'] * 1e3:.1f} ms CPU",
        "diagrams_identical": f"{d['rips']['h0_bars']} H0 + {d['rips']['h1_bars_below_cap']} H1 "
                              f"bars below {MAX_SCALE}, rtol {RTOL:g}",
        "scaling_slope": ", ".join(f"{r['n_sites']}: {r['total_s']:.2f} s"
                                   for r in d["scaling"]["rows"]),
        "peak_rss_100k_mb": f"{d['peak_rss']['n_sites']} sites, {d['peak_rss']['image_px']}² px;"
                            f" VmHWM of a fresh process",
        "featurize_vs_floor": f"{d['featurize']['features_s']:.3f} s / "
                              f"{d['featurize']['floor_s']:.3f} s, {d['featurize']['n_sites']} "
                              f"sites; ripser alone {d['featurize']['ripser_vs_floor']:.1f}x",
        "features_vs_engine": f"{d['featurize']['features_s']:.3f} s / ("
                              f"{d['featurize']['floor_s']:.3f} s floor + "
                              f"{d['featurize']['ripser_s']:.3f} s ripser alone); cocycles "
                              f"only where used save "
                              f"{d['featurize']['cocycle_saving_s'] * 1e3:.0f} ms",
        "jobs2_vs_capacity": f"speed-up {results['jobs2_speedup']['value']:.2f} / free cores "
                             f"{d['jobs']['parallel_capacity']:.2f}",
        "cluster2_vs_jobs2": f"{d['cluster']['n_images']} images, warm: jobs=2 "
                             f"{d['cluster']['best_s']['jobs2']:.1f} s / local:2 "
                             f"{d['cluster']['best_s']['cluster2']:.1f} s (bench_cluster.py)",
        "jobs2_speedup": f"{d['jobs']['n_images']} images, warm pool; cold pool "
                         f"{d['jobs']['speedup_cold']:.2f}; free cores "
                         f"{d['jobs']['parallel_capacity']:.2f}",
        "site_finding_2048_s": f"{d['site_finding']['n_sites']} sites, best of "
                               f"{d['site_finding']['repeats']}",
        "report_vs_score": f"{d['report']['n_images']} images, cold cache: report "
                           f"{min(d['report']['report_s']):.2f} s / scoring "
                           f"{min(d['report']['score_s']):.2f} s (bench_report.py)",
        "detail_kb_per_image": f"{d['report']['detail_views']} detail views, "
                               f"{d['report']['detail_bytes'] / 1e6:.2f} MB",
        "active_label_saving": _labeling_text(d["labeling"]),
    }
    lines = ["| metric | value | goal | pass | measured on |", "| --- | --- | --- | --- | --- |"]
    for key in GOALS:
        r = results[key]
        v = r["value"]
        value = ("yes" if v else "NO") if isinstance(v, bool) else f"{v:.3g}"
        verdict = "figure" if r["pass"] is None else ("pass" if r["pass"] else "FAIL")
        lines.append(f"| `{key}` | {value} | {r['goal']} | {verdict} | {how[key]} |")
    return "\n".join(lines)


def accuracy_table_text(results: dict) -> str:
    from accuracy import accuracy_table

    return accuracy_table(results["accuracy"]["rows"])


def details_text(results: dict) -> str:
    d = results["details"]
    out = ["### Scaling of the per-image chain (CPU seconds, best of N)", "",
           "| sites | image (px) | N | find_sites | persistence | order | vectorise | total "
           "| µs per site |", "| --- | --- | --- | --- | --- | --- | --- | --- | --- |"]
    for r in d["scaling"]["rows"]:
        out.append(f"| {r['n_sites']} | {r['image_px']}² | {r['repeats']} | {r['sites_s']:.3f} | "
                   f"{r['persistence_s']:.3f} | {r['order_s']:.3f} | {r['vectorize_s']:.3f} | "
                   f"{r['total_s']:.3f} | {r['us_per_site']:.1f} |")
    ss = d["scaling"]["stage_slopes"]
    out += ["", f"Log-log slope, total {d['scaling']['slope']:.3f}; per stage: "
            + ", ".join(f"{k} {v:.2f}" for k, v in ss.items()) + ".", ""]
    p = d["peak_rss"]
    out += ["### Peak memory (fresh process)", "",
            f"- {p['n_sites']} sites, image {p['image_px']}² float32 ({p['image_mb']:.0f} MB), "
            f"CPU {p['cpu_s']:.1f} s, {p['h1_bars']} H1 bars",
            f"- VmHWM after imports {p['after_imports_mb']:.0f} MB, after loading the image and "
            f"fitting the union {p['before_chain_mb']:.0f} MB, at the end "
            f"**{p['peak_rss_mb']:.0f} MB**; the child's own `ru_maxrss` "
            f"{p['ru_maxrss_self_mb']:.0f} MB; `RUSAGE_CHILDREN` seen by the harness "
            f"{p['children_ru_maxrss_mb']:.0f} MB (largest child so far)", ""]
    f = d["featurize"]
    st = f["stages_cpu_s"]
    out += ["### End-to-end features against the floor", "",
            f"- 1 MP 16-bit TIFF, spacing {f['spacing_px']:g} px, {f['n_sites']} sites; "
            f"best of {f['repeats']}, one thread",
            f"- floor (read_micrograph + gaussian_filter sigma {f['sigma_px']:g} px): "
            f"{f['floor_s'] * 1e3:.1f} ms; features (measure_pattern + \"all\" transform): "
            f"{f['features_s'] * 1e3:.1f} ms; ratio **{f['ratio']:.2f}**",
            f"- ripser's H1 alone on the same sites ({f['ripser_edges']} pairs closer than "
            f"{MAX_SCALE} spacings, with cocycles): {f['ripser_s'] * 1e3:.1f} ms, "
            f"**{f['ripser_vs_floor']:.2f}x the floor** by itself; features / (floor + ripser "
            f"alone) = {f['features_vs_floor_plus_ripser']:.2f}",
            f"- cocycles only where a result uses them: ripser with cocycles "
            f"{f['ripser_cocycles_s'] * 1e3:.1f} ms, without {f['ripser_s'] * 1e3:.1f} ms; "
            f"pattern_persistence keeping every birth edge {f['persistence_all_s'] * 1e3:.1f} ms,"
            f" only the truncated bars' (default) {f['persistence_cut_s'] * 1e3:.1f} ms: saves "
            f"{f['cocycle_saving_s'] * 1e3:.1f} ms, {f['cocycle_saving_of_features']:.1%} of the "
            f"features ({f['h1_truncated']} truncated H1 bars on this image)",
            "- CPU by stage (one extra run, without the read): "
            + ", ".join(f"{k[:-2]} {v * 1e3:.1f} ms" for k, v in st.items()), ""]
    j = d["jobs"]
    out += ["### Batch scoring, jobs=2 against jobs=1", "",
            f"- {j['n_images']} invented images of {j['size']}² px, fresh cache folder each run; "
            f"model: `{j['classifier']}` trained in {j['train_s']:.0f} s; warm rounds: "
            f"{j['rounds']}",
            f"- jobs=1: {', '.join(f'{t:.2f}' for t in j['jobs1_s'])} s; jobs=2: "
            f"{', '.join(f'{t:.2f}' for t in j['jobs2_s'])} s (the first jobs=2 run starts the "
            "worker pool)",
            "- speed-up, warm pool (the goal's number): "
            + (f"**{j['speedup_warm']:.2f}**" if j["speedup_warm"] else "not measured")
            + f"; cold pool (round 0, as one CLI call): {j['speedup_cold']:.2f}",
            f"- free parallel capacity measured just before (2 = two idle cores): "
            f"{j['parallel_capacity']:.2f}",
            "- scores.csv identical for jobs=1 and jobs=2: "
            + ("yes" if j["identical_csv"] else f"NO (first difference: {j['first_difference']})"),
            ""]
    c = d["cluster"]
    out += ["### Batch scoring on a local Dask cluster (bench_cluster.py)", "",
            f"- {c['n_images']} invented images of {c['size']}² px, warm, best of "
            f"{c['rounds']} rounds: jobs=1 {c['best_s']['jobs1']:.1f} s, jobs=2 "
            f"{c['best_s']['jobs2']:.1f} s, local:2 (two one-thread workers) "
            f"{c['best_s']['cluster2']:.1f} s; free cores {c['parallel_capacity']:.2f} before, "
            f"{c['parallel_capacity_after']:.2f} after; load average "
            f"{c['load_before'][0]:.2f} before, {c['load_after'][0]:.2f} after",
            "- scores.csv identical for the three: " + ("yes" if c["identical_csv"] else "NO"),
            ""]
    r = d["rips"]
    out += ["### Radius-limited against dense Rips", "",
            f"- {r['n_sites']} sites (jittered lattice), cap {r['max_scale']} spacings; dense "
            f"ripser {r['dense_cpu_s']:.2f} s CPU ({r['dense_wall_s']:.2f} s wall, once); "
            f"rips_persistence {r['limited_cpu_s'] * 1e3:.1f} ms CPU (best of "
            f"{r['limited_repeats']}); pattern_persistence "
            f"{r['pattern_persistence_cpu_s'] * 1e3:.1f} ms",
            f"- H1 below the cap identical to rtol {RTOL:g}: {r['h1_identical']} (largest "
            f"relative difference {r['h1_max_relative_difference']:.1e}); H0 identical after "
            f"rounding our exact float64 EMST deaths to ripser's float32 storage: "
            f"{r['h0_identical']} (float64 against float32: largest relative difference "
            f"{r['h0_float64_max_relative_difference']:.1e}, float32 rounding); dense H1 bars "
            f"at or above the cap: {r['h1_bars_dense_at_or_above_cap']}", ""]
    s = d["site_finding"]
    out += ["### Site finding", "",
            f"- 2048² uint16, spacing 12 px (bench_sites.speed): {s['best_s']:.3f} s best of "
            f"{s['repeats']}, {s['n_sites']} sites, spacing found {s['spacing_px']:.3f} px", ""]
    return "\n".join(out)


def results_markdown(results: dict) -> str:
    m = results["machine"]
    ls, le = results["load_start"], results["load_end"]
    lines = [
        "# topoclass benchmark results",
        "",
        "Written by `python benchmarks/run.py` (full run); do not edit by hand. What each number "
        "means: [README.md](README.md).",
        "",
        f"- date: {dt.datetime.now().strftime('%Y-%m-%d %H:%M')}; mode: {results['mode']}; "
        f"harness time {results['total_s'] / 60:.1f} min",
        f"- machine: {m['cpu']}, {m['cores']} logical cores ({m['usable_cores']} usable); "
        f"load average (1, 5, 15 min) at the start {ls[0]:.2f} {ls[1]:.2f} {ls[2]:.2f}, at the "
        f"end {le[0]:.2f} {le[1]:.2f} {le[2]:.2f} (the machine is shared: others run tests)",
        f"- Python {m['python']}; " + ", ".join(f"{k} {v}" for k, v in m["versions"].items()),
        f"- thread pools: {'; '.join(m['thread_pools']) or 'none'}; all timings run with "
        "threadpoolctl limits of one thread",
        f"- sizes: {results['sizes']}",
        "",
        "## Goals",
        "",
        table_text(results),
        "",
        f"All goals met: {'yes' if results['all_pass'] else 'NO'}.",
        "",
        "## Accuracy (grouped cross-validation, invented demo data)",
        "",
        accuracy_table_text(results),
        "",
        "Details: [accuracy.md](accuracy.md).",
        "",
        "## Details",
        "",
        details_text(results),
    ]
    if NOTES.strip():
        lines += ["## Goals missed: why", "", NOTES.strip(), ""]
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="smaller sizes and fewer repeats (about 5 minutes on 2 cores)")
    parser.add_argument("--json", action="store_true", help="print one JSON object only")
    parser.add_argument("--rss-child", help=argparse.SUPPRESS)
    parser.add_argument("--mapping", action="store_true", help="also run bench_mapping.py "
                        "(maps of 16-144 MP images, tens of minutes; --quick: 4-16 MP)")
    args = parser.parse_args(argv)
    if args.rss_child:
        _rss_child(args.rss_child)
        return 0
    mode = "quick" if args.quick else "full"

    def log(text: str) -> None:
        print(f"[{time.strftime('%H:%M:%S')}] {text}", file=sys.stderr, flush=True)

    log(f"mode {mode}: {_sizes_text(MODES[mode])}")
    results = run_all(mode, log=log)
    accuracy = results.pop("_accuracy_full")
    labeling = results.pop("_labeling_full")
    if args.json:
        print(json.dumps(results, default=_json_default, indent=1))
    else:
        print(f"topoclass benchmarks, {mode} mode ({results['total_s'] / 60:.1f} min; load "
              f"average {results['load_start'][0]:.2f} at start, {results['load_end'][0]:.2f} "
              "at end)")
        print(f"sizes: {results['sizes']}\n")
        print(table_text(results))
        print("\naccuracy (grouped CV):\n" + accuracy_table_text(results))
        print("\n" + details_text(results))
    if not args.quick and not args.json:
        from accuracy import accuracy_markdown

        RESULTS.write_text(results_markdown(results), encoding="utf-8")
        ACCURACY.write_text(accuracy_markdown(accuracy), encoding="utf-8")
        _update_readme(results)
        import bench_labeling

        bench_labeling.write_figure(labeling)
        bench_labeling.OUT.write_text(bench_labeling.markdown(labeling), encoding="utf-8")
        log(f"wrote {RESULTS}, {ACCURACY}, {bench_labeling.OUT.name} and the accuracy block "
            f"of {README}")
    if args.mapping:
        import bench_mapping

        bench_mapping.main(["--quick"] if args.quick else [])
    return 0 if results["all_pass"] else 1


# ---------------------------------------------------------------------------------------------
# private helpers


def _sizes_text(cfg: dict) -> str:
    a = cfg["accuracy"]
    reps = cfg["scaling_repeats"]
    return (f"Rips {cfg['rips_sites']} sites; scaling "
            + ", ".join(f"{n} (best of {reps.get(n, 1)})" for n in cfg["scaling_sizes"])
            + f"; memory {cfg['rss_sites']} sites; featurize 1024² best of "
            f"{cfg['featurize_repeats']}; scoring {4 * cfg['jobs_images_per_class']} images of "
            f"{cfg['jobs_size']}² x {cfg['jobs_rounds']} round(s); site finding 2048² best of "
            f"{cfg['sites_repeats']}; accuracy per_class={a['per_class']}, size={a['size']}, "
            f"seed={a['seed']}, cv={a['cv']}")


def _labeling_text(d: dict) -> str:
    m, (lo, hi) = d["mean_needed"], d["saving_ci95"]
    c = d["config"]
    return (f"labels to held-out macro-F1 {c['target']}: suggested {m['suggested']:.1f}, random "
            f"{m['random']:.1f} ({c['seeds']} seeds; saving 95 % interval {lo:.2f} to {hi:.2f}, "
            f"ceiling {d['ceiling']:.2f}; bench_labeling.py, labeling.md)")


def _update_readme(results: dict) -> None:
    """Put the accuracy table of this run between the markers of both READMEs."""
    from accuracy import write_readme_block

    summary = {**results["details"]["accuracy"], "rows": results["accuracy"]["rows"]}
    for readme in (README, ROOT / "README.md"):
        write_readme_block(readme, summary)


def _passes(value, op: str, goal) -> bool:
    if op == "==":
        return bool(value == goal)
    if value is None or not np.isfinite(value):
        return False
    return bool(value >= goal) if op == ">=" else bool(value <= goal)


def _wall(fn) -> float:
    t0 = time.perf_counter()
    fn()
    return time.perf_counter() - t0


def _sorted_bars(bars: np.ndarray) -> np.ndarray:
    return bars[np.lexsort((bars[:, 1], bars[:, 0]))]


def _max_rel(a: np.ndarray, b: np.ndarray) -> float:
    if a.size == 0:
        return 0.0
    return float(np.max(np.abs(a - b) / np.maximum(np.abs(a), 1e-300)))


def _json_default(obj):
    if isinstance(obj, np.generic):
        return obj.item()
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(type(obj).__name__)


if __name__ == "__main__":
    sys.exit(main())
