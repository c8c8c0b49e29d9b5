"""Accuracy and cost of the physical amounts (topoclass.amounts). Results: RESULTS_amounts.md
(written by this script; ``--quick`` prints only).

Goals (issue 15), on invented micrographs with known truth (topoclass.synth, demo data):

* vacancies: on images with known vacancy fractions 0.5-8 % the counted number is within 10 %
  (or 2 vacancies, whichever is larger) of the truth in the counted zone; 0 on a perfect
  lattice. Images are rendered and their sites found, so site finding is part of the check.
* grains: on Voronoi polycrystals the grain count is right within ±1 for grains of >= 100
  sites and the mean grain area (sites) within 15 %. Sites are the generator's own (no
  rendering), so the check is the segmentation's.

The cost is the time of ``pattern_amounts`` per image beside the time of the persistence stage
on the same pattern (a ratio within one run; absolute times on a shared machine are noise).

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_amounts.py``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import platform
import sys
import time
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

HERE = Path(__file__).resolve().parent
for _p in (str(HERE.parent), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402

from topoclass import synth  # noqa: E402
from topoclass.amounts import _ZONE_DEPTH, pattern_amounts  # noqa: E402
from topoclass.persistence import pattern_persistence  # noqa: E402
from topoclass.sites import SitePattern, find_sites  # noqa: E402

FRACTIONS = (0.005, 0.01, 0.02, 0.03, 0.04, 0.05, 0.06, 0.07, 0.08)


def vacancy_cases(n: int, seed: int = 0):
    rng = np.random.default_rng(seed)
    shape = (384, 384)
    for k in range(n):
        fraction = FRACTIONS[k % len(FRACTIONS)]
        spacing = float(rng.uniform(9.0, 16.0))
        xy, info = synth.make_sites("vacancies", shape, spacing, rng=rng,
                                    params={"vacancy_fraction": fraction, "merge_fraction": 0.0})
        image = synth.render_micrograph(xy, shape, 0.3 * spacing, blur=0.8, noise=0.1,
                                        seed=int(rng.integers(2**31)))
        pattern = find_sites(image, pixel_size_nm=100.0 / spacing)
        t0 = time.perf_counter()
        diagrams = pattern_persistence(pattern)
        t1 = time.perf_counter()
        amounts = pattern_amounts(pattern, diagrams)
        t2 = time.perf_counter()
        truth_xy = np.asarray(info["vacancy_sites"]).reshape(-1, 2)
        d = _ZONE_DEPTH * pattern.spacing
        inside = ((truth_xy >= d) & (truth_xy <= np.array(shape[::-1]) - 1 - d)).all(axis=1)
        truth = int(inside.sum())
        counted = amounts.values["vacancies"]
        yield {"fraction": fraction, "spacing": spacing, "truth": truth, "counted": counted,
               "ok": abs(counted - truth) <= max(0.1 * truth, 2),
               "t_amounts": t2 - t1, "t_persistence": t1 - t0, "n_sites": pattern.n_sites}


def grain_cases(n: int, seed: int = 100):
    shape = (512, 512)
    for k in range(n):
        rng = np.random.default_rng(seed + k)
        spacing = float(rng.uniform(9, 14))
        n_grains = int(rng.integers(2, 8))
        xy, info = synth.make_sites("grains", shape, spacing, rng=rng,
                                    params={"n_grains": n_grains})
        rows, cols = shape
        xy = xy[(xy[:, 0] >= 0) & (xy[:, 0] <= cols - 1) & (xy[:, 1] >= 0)
                & (xy[:, 1] <= rows - 1)]
        border = ((xy[:, 0] < spacing) | (xy[:, 0] > cols - 1 - spacing)
                  | (xy[:, 1] < spacing) | (xy[:, 1] > rows - 1 - spacing))
        pattern = SitePattern(xy, spacing, "dark", border, shape)
        amounts = pattern_amounts(pattern, pattern_persistence(pattern))
        owner = cKDTree(np.asarray(info["grain_centres"])).query(pattern.xy)[1]
        sizes = np.bincount(owner, minlength=n_grains)
        truth_count = int(np.count_nonzero(sizes >= 100))
        truth_area = float(sizes[sizes > 0].mean())
        v = amounts.values
        yield {"grains_truth": truth_count, "grains": v["grains"], "area_truth": truth_area,
               "area": v["grain_area_sites"],
               "ok": abs(v["grains"] - truth_count) <= 1
               and abs(v["grain_area_sites"] - truth_area) <= 0.15 * truth_area,
               "min_misorientation": info["min_misorientation_deg"]}


def perfect_lattice_count() -> float:
    shape, spacing = (384, 384), 12.0
    image = synth.render_micrograph(synth.hexagonal_lattice(shape, spacing, margin=-spacing),
                                    shape, 0.3 * spacing, blur=0.8, noise=0.05, seed=0)
    pattern = find_sites(image)
    return pattern_amounts(pattern, pattern_persistence(pattern)).values["vacancies"]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer images; print only")
    args = parser.parse_args()
    nv, ng = (5, 4) if args.quick else (15, 12)
    vac = list(vacancy_cases(nv))
    grains = list(grain_cases(ng))
    zero = perfect_lattice_count()
    lines = [
        "# Physical amounts: accuracy on invented images with known truth",
        "",
        f"Written by `benchmarks/bench_amounts.py` on {dt.date.today().isoformat()}, "
        f"{cpu_model()}, Python {platform.python_version()}. Invented data (topoclass.synth); "
        "real micrographs need their own check against counts made by hand.",
        "",
        f"## Vacancies: {sum(r['ok'] for r in vac)} of {len(vac)} within goal "
        "(10 % or 2 vacancies of the truth in the counted zone)",
        "",
        f"Perfect lattice (rendered, sites found): {zero:.0f} vacancies counted (goal 0).",
        "",
        "| vacancy fraction | spacing px | sites | truth | counted | within goal |",
        "| ---: | ---: | ---: | ---: | ---: | :---: |",
    ]
    for r in vac:
        lines.append(f"| {r['fraction']:.3f} | {r['spacing']:.1f} | {r['n_sites']} | "
                     f"{r['truth']} | {r['counted']:.0f} | {'yes' if r['ok'] else 'no'} |")
    ratio = np.median([r["t_amounts"] / r["t_persistence"] for r in vac])
    lines += [
        "",
        f"Cost: `pattern_amounts` takes {ratio:.2f} times the persistence stage's time on the "
        f"same pattern (median over the {len(vac)} images; median "
        f"{1e3 * np.median([r['t_amounts'] for r in vac]):.0f} ms per image here).",
        "",
        f"## Grains: {sum(r['ok'] for r in grains)} of {len(grains)} within goal "
        "(count ±1 for grains >= 100 sites, mean area within 15 %)",
        "",
        "| grains >= 100 sites (truth) | counted | mean area truth (sites) | counted | "
        "smallest misorientation (deg) | within goal |",
        "| ---: | ---: | ---: | ---: | ---: | :---: |",
    ]
    for r in grains:
        lines.append(f"| {r['grains_truth']} | {r['grains']:.0f} | {r['area_truth']:.0f} | "
                     f"{r['area']:.0f} | {r['min_misorientation']:.1f} | "
                     f"{'yes' if r['ok'] else 'no'} |")
    text = "\n".join(lines) + "\n"
    print(text)
    if not args.quick:
        (HERE / "RESULTS_amounts.md").write_text(text, encoding="utf-8")


if __name__ == "__main__":
    main()
