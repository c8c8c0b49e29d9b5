"""Speed and accuracy of the site finder; rewrites benchmarks/RESULTS_sites.md with this run.

Speed: find_sites on an invented 2048 x 2048 uint16 micrograph (spacing 12 px, about 33 000
pores), best of 3, one thread (threadpoolctl limits BLAS; scipy.ndimage and cKDTree run on one
core by default). Goal: <= 1 s.

Accuracy: recall, precision (one-to-one matches within 0.3 spacing), RMS position error and
spacing error over a grid of invented lattices (spacing, polarity, rotation, noise).

Run from the repository root:  PYTHONPATH=. python benchmarks/bench_sites.py [--profile]
"""

from __future__ import annotations

import argparse
import cProfile
import datetime as dt
import io
import os
import pstats
import time
from pathlib import Path

import numpy as np
from _machine import cpu_model
from scipy.spatial import cKDTree
from threadpoolctl import threadpool_limits

from topoclass.sites import estimate_spacing, find_sites
from topoclass.synth import hexagonal_lattice, render_micrograph

RESULTS = Path(__file__).with_name("RESULTS_sites.md")


def speed(profile: bool = False, repeats: int = 3) -> tuple[float, int, float, str]:
    """Best-of-``repeats`` seconds, sites, spacing and an optional profile (benchmarks/run.py)."""
    shape, spacing = (2048, 2048), 12.0
    xy = hexagonal_lattice(shape, spacing, angle=11.0, jitter=0.03, margin=-spacing, seed=0)
    image = render_micrograph(xy, shape, 0.3 * spacing, blur=1.0, noise=0.1, illumination=0.3,
                              seed=1)
    image = np.round(image * 65535).astype(np.uint16)
    times = []
    with threadpool_limits(1):
        for _ in range(repeats):
            t0 = time.perf_counter()
            pattern = find_sites(image)
            times.append(time.perf_counter() - t0)
        text = ""
        if profile:
            prof = cProfile.Profile()
            prof.runcall(find_sites, image)
            buf = io.StringIO()
            pstats.Stats(prof, stream=buf).sort_stats("tottime").print_stats(8)
            text = buf.getvalue()
    return min(times), pattern.n_sites, pattern.spacing, text


def accuracy() -> list[dict]:
    rng = np.random.default_rng(2026)
    rows = []
    for spacing in (6, 10, 20, 40):
        for polarity in ("dark", "bright"):
            for angle in (0.0, float(rng.uniform(0, 60))):
                for noise in (0.02, 0.05, 0.1, 0.2):
                    n = int(min(512, max(256, 20 * spacing)))
                    shape = (n, n)
                    seed = int(rng.integers(1 << 30))
                    truth = hexagonal_lattice(shape, spacing, angle=angle, jitter=0.03,
                                              margin=-spacing, seed=seed)
                    image = render_micrograph(truth, shape, 0.3 * spacing, polarity=polarity,
                                              blur=1.0, illumination=0.3, noise=noise,
                                              seed=seed + 1)
                    row = {"spacing": spacing, "polarity": polarity, "angle": angle,
                           "noise": noise}
                    try:
                        p = find_sites(image)
                        row.update(_scores(p.xy, truth, spacing, shape))
                        row["spacing_err"] = p.spacing / spacing - 1
                        row["estimate_err"] = estimate_spacing(image) / spacing - 1
                        row["polarity_ok"] = p.polarity == polarity
                    except Exception as exc:  # a refusal is a result too
                        row["error"] = str(exc).split(";")[0]
                    rows.append(row)
    return rows


def _scores(found, truth, spacing, shape):
    rows, cols = shape

    def inside(q):
        return ((q[:, 0] >= spacing) & (q[:, 0] <= cols - 1 - spacing)
                & (q[:, 1] >= spacing) & (q[:, 1] <= rows - 1 - spacing))

    d_t, i_t = cKDTree(found).query(truth)
    d_f, i_f = cKDTree(truth).query(found)
    m_t = (i_f[i_t] == np.arange(len(truth))) & (d_t <= 0.3 * spacing)
    m_f = (i_t[i_f] == np.arange(len(found))) & (d_f <= 0.3 * spacing)
    return {"recall": m_t[inside(truth)].mean(), "precision": m_f[inside(found)].mean(),
            "rms": np.sqrt(np.mean(d_t[inside(truth) & m_t] ** 2)) / spacing}


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--profile", action="store_true", help="print a cProfile summary")
    args = parser.parse_args()
    best, n_sites, spacing, prof = speed(args.profile)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    stamp = dt.datetime.now().strftime("%Y-%m-%d %H:%M")
    head = (f"## {stamp}\n\n- CPU: {cpu_model()}, {os.cpu_count()} logical cores "
            f"(1 thread used; load average at start {load:.1f})\n"
            f"- find_sites, 2048 x 2048 uint16, spacing 12 px: **{best:.3f} s** best of 3 "
            f"({n_sites} sites, spacing {spacing:.3f} px; goal <= 1 s)\n")
    print(head)
    if prof:
        print(prof)
    rows = accuracy()
    table = ["", "| spacing | noise | cases | min recall | min precision | max RMS / a "
             "| max abs spacing err | max abs estimate err | polarity right | refused |",
             "|---|---|---|---|---|---|---|---|---|---|"]
    for spacing in (6, 10, 20, 40):
        for noise in (0.02, 0.05, 0.1, 0.2):
            sel = [r for r in rows if r["spacing"] == spacing and r["noise"] == noise]
            ok = [r for r in sel if "error" not in r]
            if ok:
                table.append(
                    f"| {spacing} | {noise} | {len(sel)} | {min(r['recall'] for r in ok):.3f} | "
                    f"{min(r['precision'] for r in ok):.3f} | {max(r['rms'] for r in ok):.3f} | "
                    f"{max(abs(r['spacing_err']) for r in ok):.3f} | "
                    f"{max(abs(r['estimate_err']) for r in ok):.3f} | "
                    f"{sum(r['polarity_ok'] for r in ok)}/{len(ok)} | {len(sel) - len(ok)} |")
            else:
                table.append(f"| {spacing} | {noise} | {len(sel)} | - | - | - | - | - | - | "
                             f"{len(sel)} |")
    body = "\n".join(table) + (
        "\n\nGrid: invented triangular lattices (jitter 0.03 spacing, pore radius 0.3 spacing, "
        "blur 1 px, illumination 0.3), both polarities, rotation 0 and one random angle; noise "
        "is relative to the feature contrast. Recall/precision count one-to-one matches within "
        "0.3 spacing for sites at least one spacing inside the frame. \"refused\" = "
        "PatternError (features not above the noise).\n\n")
    print(body)
    # One run per file: earlier runs are in the git history, not appended here.
    RESULTS.write_text("# Site finder: speed and accuracy\n\nWritten by "
                       "`python benchmarks/bench_sites.py`; do not edit by hand.\n\n"
                       + head + body, encoding="utf-8")


if __name__ == "__main__":
    main()
