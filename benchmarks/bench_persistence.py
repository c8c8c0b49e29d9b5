"""Speed and memory of the persistence and order-measure stage.

Run ``python benchmarks/bench_persistence.py`` from the repository root; it writes
``benchmarks/RESULTS_persistence.md``. The measuring functions are importable::

    measure_rips_speedup(n_sites=3000) -> dict
    measure_scaling(sizes=(1000, 3000, 10000, 30000, 100000)) -> dict
    measure_peak_rss(n_sites=100000) -> dict

Goals: radius-limited Rips >= 300x faster than dense ripser at 3,000 sites with identical bars
below ``max_scale``; time per site flat from 1k to 100k sites (log-log slope <= 1.2); peak RSS
<= 1024 MB at 100k sites. Times are CPU seconds of this process (``time.process_time``; all
the work is single-threaded) beside wall seconds, because the machine may be shared.
"""

from __future__ import annotations

import datetime
import json
import platform
import resource
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from _machine import cpu_model, peak_rss_mb  # noqa: E402

from topoclass.order import order_measures  # noqa: E402
from topoclass.persistence import pattern_persistence, rips_persistence  # noqa: E402
from topoclass.sites import SitePattern  # noqa: E402
from topoclass.synth import hexagonal_lattice  # noqa: E402

SPACING = 10.0
JITTER = 0.08

MAX_SCALE = 2.5


def jittered_pattern(n_sites: int, *, seed: int = 0) -> SitePattern:
    """A jittered triangular lattice of about ``n_sites`` sites in a square frame (invented)."""
    side = int(round(SPACING * np.sqrt(n_sites * np.sqrt(3.0) / 2.0)))
    xy = hexagonal_lattice((side, side), SPACING, jitter=JITTER, seed=seed)
    edge = SPACING
    border = (xy < edge).any(axis=1) | (xy > side - 1 - edge).any(axis=1)
    return SitePattern(xy=xy, spacing=SPACING, polarity="dark", border=border,
                       shape=(side, side))


def measure_rips_speedup(n_sites: int = 3000, *, seed: int = 0) -> dict:
    """Dense ripser (full filtration) against the radius-limited computation on one cloud."""
    from ripser import ripser

    pattern = jittered_pattern(n_sites, seed=seed)
    xy = pattern.xy / pattern.spacing
    c0, w0 = time.process_time(), time.perf_counter()
    raw = rips_persistence(xy, max_scale=MAX_SCALE)
    limited_cpu, limited_wall = time.process_time() - c0, time.perf_counter() - w0
    c0, w0 = time.process_time(), time.perf_counter()
    dense = ripser(xy, maxdim=1)["dgms"]
    dense_cpu, dense_wall = time.process_time() - c0, time.perf_counter() - w0

    d0 = np.sort(dense[0][np.isfinite(dense[0][:, 1]), 1])
    d1 = dense[1][dense[1][:, 1] < MAX_SCALE]
    mine = raw["h1"][~raw["h1_truncated"]]
    same_h0 = d0.shape == raw["h0"][:, 1].shape and np.allclose(d0, raw["h0"][:, 1], rtol=1e-6)
    same_h1 = d1.shape == mine.shape and np.allclose(_sorted(d1), _sorted(mine), rtol=1e-6)
    return {
        "n_sites": int(xy.shape[0]),
        "max_scale": MAX_SCALE,
        "dense_cpu_s": dense_cpu,
        "dense_wall_s": dense_wall,
        "limited_cpu_s": limited_cpu,
        "limited_wall_s": limited_wall,
        "speedup_cpu": dense_cpu / limited_cpu,
        "h0_bars": int(d0.size),
        "h1_bars_below_max_scale": int(d1.shape[0]),
        "h1_bars_dense_at_or_above_max_scale": int(np.count_nonzero(dense[1][:, 1] >= MAX_SCALE)),
        "identical_below_max_scale": bool(same_h0 and same_h1),
    }


def measure_scaling(sizes=(1000, 3000, 10000, 30000, 100000), *, seed: int = 0) -> dict:
    """Time of ``pattern_persistence`` + ``order_measures`` per site, and the log-log slope."""
    rows = []
    for n in sizes:
        pattern = jittered_pattern(n, seed=seed)
        repeats = max(1, int(30000 // n))
        best = {"persistence_cpu_s": np.inf, "order_cpu_s": np.inf, "wall_s": np.inf}
        for _ in range(repeats):
            w0, c0 = time.perf_counter(), time.process_time()
            pattern_persistence(pattern, max_scale=MAX_SCALE)
            c1 = time.process_time()
            order_measures(pattern)
            c2, w2 = time.process_time(), time.perf_counter()
            best["persistence_cpu_s"] = min(best["persistence_cpu_s"], c1 - c0)
            best["order_cpu_s"] = min(best["order_cpu_s"], c2 - c1)
            best["wall_s"] = min(best["wall_s"], w2 - w0)
        total = best["persistence_cpu_s"] + best["order_cpu_s"]
        rows.append({"n_sites": pattern.n_sites, **best, "cpu_s": total,
                     "us_per_site": 1e6 * total / pattern.n_sites})
    n = np.array([r["n_sites"] for r in rows], dtype=float)
    t = np.array([r["cpu_s"] for r in rows])
    slope = float(np.polyfit(np.log(n), np.log(t), 1)[0]) if len(rows) > 1 else float("nan")
    return {"rows": rows, "loglog_slope": slope}


def measure_peak_rss(n_sites: int = 100000, *, seed: int = 0) -> dict:
    """Peak resident memory of a fresh process running the stage once on ``n_sites`` sites."""
    out = subprocess.run(
        [sys.executable, str(Path(__file__).resolve()), "--child", str(n_sites), str(seed)],
        check=True, capture_output=True, text=True,
    )
    return json.loads(out.stdout.strip().splitlines()[-1])


def _child(n_sites: int, seed: int) -> None:
    # ru_maxrss survives fork + exec on Linux (the child starts with its parent's peak), so the
    # kernel's own high-water mark of this address space (VmHWM) is reported beside it.
    pattern = jittered_pattern(n_sites, seed=seed)
    before = peak_rss_mb()
    c0 = time.process_time()
    diagrams = pattern_persistence(pattern, max_scale=MAX_SCALE)
    order_measures(pattern)
    cpu = time.process_time() - c0
    print(json.dumps({
        "n_sites": pattern.n_sites,
        "rss_before_mb": before,
        "peak_rss_mb": peak_rss_mb(),
        "ru_maxrss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0,  # kB
        "cpu_s": cpu,
        "h1_bars": int(diagrams.h1.shape[0]),
    }))


def _sorted(bars: np.ndarray) -> np.ndarray:
    return bars[np.lexsort((bars[:, 1], bars[:, 0]))]


def main() -> None:
    import ripser
    import scipy

    rss = measure_peak_rss(100000)  # first, while this process is still small
    print(json.dumps(rss, indent=1))
    speed = measure_rips_speedup(3000)
    print(json.dumps(speed, indent=1))
    scaling = measure_scaling()
    print(json.dumps(scaling, indent=1))
    load = Path("/proc/loadavg").read_text().split()[:3] if Path("/proc/loadavg").exists() else []
    lines = [
        "# Persistence and order measures: benchmark results",
        "",
        f"- date: {datetime.date.today().isoformat()}",
        f"- CPU: {cpu_model()} ({_n_cpus()} logical CPUs); load average at the end: "
        f"{' '.join(load)}",
        f"- Python {platform.python_version()}, numpy {np.__version__}, scipy {scipy.__version__}, "
        f"ripser {getattr(ripser, '__version__', '?')}",
        f"- cloud: jittered triangular lattice (invented), jitter {JITTER} spacing, square frame, "
        f"`max_scale` {MAX_SCALE} spacings; times are CPU seconds (single-threaded work)",
        "",
        "## Radius-limited against dense ripser",
        "",
        "| sites | dense ripser (s) | radius-limited (s) | speed-up | H1 bars below max_scale "
        "| identical below max_scale |",
        "| --- | --- | --- | --- | --- | --- |",
        f"| {speed['n_sites']} | {speed['dense_cpu_s']:.2f} | {speed['limited_cpu_s']:.4f} | "
        f"{speed['speedup_cpu']:.0f}x | {speed['h1_bars_below_max_scale']} | "
        f"{'yes' if speed['identical_below_max_scale'] else 'NO'} |",
        "",
        "Goal >= 300x: " + ("met" if speed["speedup_cpu"] >= 300 else "MISSED") + ".",
        "",
        "## Scaling of `pattern_persistence` + `order_measures`",
        "",
        "| sites | persistence (s) | order (s) | total CPU (s) | wall (s) | us per site |",
        "| --- | --- | --- | --- | --- | --- |",
    ]
    for r in scaling["rows"]:
        lines.append(f"| {r['n_sites']} | {r['persistence_cpu_s']:.3f} | {r['order_cpu_s']:.3f} | "
                     f"{r['cpu_s']:.3f} | {r['wall_s']:.3f} | {r['us_per_site']:.1f} |")
    slope = scaling["loglog_slope"]
    lines += [
        "",
        f"Log-log slope of time against sites: {slope:.3f} (goal <= 1.2: "
        + ("met" if slope <= 1.2 else "MISSED") + ").",
        "",
        "## Peak memory at 100k sites (fresh process)",
        "",
        f"- sites: {rss['n_sites']}, H1 bars: {rss['h1_bars']}, CPU {rss['cpu_s']:.2f} s",
        f"- peak RSS (VmHWM) after imports and building the cloud: "
        f"{rss['rss_before_mb']:.0f} MB; after the stage: {rss['peak_rss_mb']:.0f} MB "
        f"(`ru_maxrss` {rss['ru_maxrss_mb']:.0f} MB, which on Linux also holds the parent's "
        "peak at fork). Goal <= 1024 MB: "
        + ("met" if max(rss["peak_rss_mb"], rss["ru_maxrss_mb"]) <= 1024 else "MISSED") + ".",
        "",
    ]
    out = Path(__file__).with_name("RESULTS_persistence.md")
    out.write_text("\n".join(lines))
    print(f"wrote {out}")


def _n_cpus() -> int:
    import os

    return os.cpu_count() or 1


if __name__ == "__main__":
    if len(sys.argv) >= 3 and sys.argv[1] == "--child":
        _child(int(sys.argv[2]), int(sys.argv[3]) if len(sys.argv) > 3 else 0)
    else:
        main()
