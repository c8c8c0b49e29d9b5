"""Maps of large micrographs: time and peak memory against image size, and map accuracy.
Results: RESULTS_mapping.md (written by this script; ``--quick`` prints only).

Scaling: invented 16-bit tiled TIFFs (deflate, 512² tiles) of 16, 64 and 144 megapixels
(quick: 4, 9 and 16), each tile a random pick of four invented membrane fields (one per class,
pore spacing 20 px); each is mapped by ``topoclass map`` in a fresh process (``--jobs 2``, default
tiles) with a model trained beforehand (6 images per class, 256² px, cv=3). Wall time of the
whole command (reading, tiles, map.png, map.html); peak RSS is the largest sum, over the
command and its worker processes, of their resident memory, polled every 0.2 s (psutil), so
shared libraries count once per process: an upper bound. ``slope`` is the least-squares slope
of log(time) against log(megapixels); 1 means time per megapixel stays constant.

Accuracy: an invented mosaic (pore spacing 13 px) whose left part is ordered, top right grains
(one field with as many grains per spacing squared as the training images, so grains are their
size and every boundary is one the generator grew) and bottom right disordered, with borders
at x = 0.52 and y = 0.47 of the side, so not on tile seams. A tile lies wholly inside a
region when its whole rectangle does; it carries the region's class when its verdict (class,
review or unfamiliar) is that class; ``predicted`` (the top class whatever the verdict) is
reported beside it, and the misses by verdict.

Run from the repository root: ``PYTHONPATH=. python benchmarks/bench_mapping.py``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402

RESULTS = HERE / "RESULTS_mapping.md"
# The accuracy goal, "tiles wholly inside a region carry its class >= 95 %", is held
# to the verdict (a tile under review or unfamiliar does not carry a class) and, beside it, to
# the top class whatever the verdict.
GOALS = {"time_slope": ("<=", 1.1), "peak_rss_144mp_mb": ("<=", 2000.0),
         "mosaic_verdict_right": (">=", 0.95), "mosaic_top_class_right": (">=", 0.95)}
SIZES = {"full": (4000, 8000, 12000), "quick": (2000, 3000, 4000)}
_KINDS = ("ordered", "vacancies", "grains", "disordered")


def train_model(workdir: Path) -> Path:
    from topoclass.synth import write_dataset
    from topoclass.workflow import train_from_labels

    sheet = write_dataset(workdir / "train", per_class=6, size=256, seed=11, groups_per_class=3)
    return train_from_labels(sheet, workdir / "model", cv=3, seed=3, jobs=2,
                             cache_dir=workdir / "cache", figures=False).directory


def write_scaling_image(path: Path, side: int, seed: int = 0) -> None:
    """A ``side``² 16-bit tiled TIFF made of invented fields, written tile by tile."""
    import tifffile

    from topoclass.synth import draw_sample, make_micrograph

    bank = []
    for k, kind in enumerate(_KINDS):
        sample = draw_sample(kind, seed=300 + k)
        sample["spacing_range_px"] = [20.0, 20.0]
        bank.append((make_micrograph(kind, size=512, seed=400 + k, sample=sample)[0]
                     * 65535).astype(np.uint16))
    rng = np.random.default_rng(seed)
    n = -(-side // 512)
    picks = rng.integers(len(bank), size=n * n)
    tifffile.imwrite(path, (bank[i] for i in picks), shape=(side, side), dtype=np.uint16,
                     tile=(512, 512), compression="zlib", bigtiff=side * side * 2 > 2**31)


def run_map(model: Path, image: Path, out: Path) -> dict:
    """``topoclass map`` in a fresh process: wall time and peak RSS of its process tree."""
    import psutil

    env = dict(os.environ, PYTHONPATH=str(ROOT))
    cmd = [sys.executable, "-m", "topoclass", "map", str(model), str(image), "--out", str(out),
           "--jobs", "2", "--overwrite"]
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
    parent = psutil.Process(proc.pid)
    peak = parent_peak = 0.0
    while proc.poll() is None:
        try:
            tree = [parent, *parent.children(recursive=True)]
            rss = []
            for p in tree:
                try:
                    rss.append(p.memory_info().rss)
                except psutil.NoSuchProcess:
                    pass
            peak = max(peak, sum(rss) / 1e6)
            parent_peak = max(parent_peak, rss[0] / 1e6 if rss else 0.0)
        except psutil.NoSuchProcess:
            pass
        time.sleep(0.2)
    seconds = time.perf_counter() - t0
    output = proc.stdout.read().decode()
    if proc.returncode != 0:
        raise RuntimeError(f"map failed ({proc.returncode}): {output[-500:]}")
    from topoclass.mapping import read_tiles

    rows = read_tiles(out / "tiles.csv")
    return {"seconds": seconds, "peak_rss_mb": peak, "parent_peak_rss_mb": parent_peak,
            "tiles": len(rows), "failed": sum(r["status"] != "ok" for r in rows)}


def measure_scaling(workdir: Path, model: Path, sides, progress=print) -> dict:
    rows = []
    for side in sides:
        image = workdir / f"scan_{side}.tif"
        write_scaling_image(image, side)
        r = run_map(model, image, workdir / f"map_{side}")
        r.update(side=side, megapixels=side * side / 1e6)
        rows.append(r)
        image.unlink()
        progress(f"{r['megapixels']:.0f} MP: {r['seconds']:.1f} s, peak RSS "
                 f"{r['peak_rss_mb']:.0f} MB, {r['tiles']} tiles")
    mp = np.log([r["megapixels"] for r in rows])
    t = np.log([r["seconds"] for r in rows])
    slope = float(np.polyfit(mp, t, 1)[0])
    return {"rows": rows, "slope": slope}


def measure_mosaic(workdir: Path, model_dir: Path, side: int = 2400) -> dict:
    import tifffile

    from topoclass.mapping import map_image, read_tiles
    from topoclass.model import load_model
    from topoclass.synth import draw_sample, grains_per_spacing2, make_micrograph

    bx, by = int(0.52 * side), int(0.47 * side)
    fields = {}
    for k, kind in enumerate(("ordered", "grains", "disordered")):
        sample = draw_sample(kind, seed=500 + k)
        sample["spacing_range_px"] = [13.0, 13.0]
        if kind != "grains":
            fields[kind] = make_micrograph(kind, size=side, seed=600 + k, sample=sample)[0]
            continue
        # One field of the grains region's size, with as many grains per spacing squared as the
        # training images hold, so grains are the training images' size and every boundary is
        # one the generator grew (pasting separate fields would add seams it never makes).
        edge = max(side - bx, by)
        n = max(2, round(grains_per_spacing2(workdir / "train") * (edge / 13.0) ** 2))
        grains = make_micrograph(kind, size=edge, seed=700, sample=sample,
                                 amounts={"n_grains": n})[0]
        fields[kind] = np.zeros((side, side), np.float32)
        fields[kind][:by, bx:] = grains[:by, : side - bx]
    mosaic = fields["ordered"].copy()
    mosaic[:by, bx:] = fields["grains"][:by, bx:]
    mosaic[by:, bx:] = fields["disordered"][by:, bx:]
    path = workdir / "mosaic.tif"
    tifffile.imwrite(path, (mosaic * 65535).astype(np.uint16), tile=(256, 256),
                     compression="zlib")
    out = workdir / "mosaic-map"
    map_image(load_model(model_dir), path, out, jobs=2, overwrite=True)
    inside = right = right_top = 0
    misses: dict[str, int] = {}
    for r in read_tiles(out / "tiles.csv"):
        x0, y0, x1, y1 = (int(r[k]) for k in ("x0", "y0", "x1", "y1"))
        if x1 <= bx:
            truth = "ordered"
        elif x0 >= bx and y1 <= by:
            truth = "grains"
        elif x0 >= bx and y0 >= by:
            truth = "disordered"
        else:
            continue
        inside += 1
        right += r["status"] == "ok" and r["verdict"] == truth
        right_top += r["status"] == "ok" and r["predicted"] == truth
        if not (r["status"] == "ok" and r["verdict"] == truth):
            got = r["verdict"] if r["status"] == "ok" else "not measured"
            misses[f"{truth} as {got}"] = misses.get(f"{truth} as {got}", 0) + 1
    return {"side": side, "inside": inside, "right": right / inside,
            "right_predicted": right_top / inside, "borders": (bx, by), "misses": misses,
            "grains": n}



def markdown(result: dict, quick: bool) -> str:
    s, m = result["scaling"], result["mosaic"]
    big = s["rows"][-1]
    values = {"time_slope": s["slope"], "peak_rss_144mp_mb": big["peak_rss_mb"],
              "mosaic_verdict_right": m["right"], "mosaic_top_class_right": m["right_predicted"]}
    rows = []
    for key, (op, goal) in GOALS.items():
        v = values[key]
        ok = v <= goal if op == "<=" else v >= goal
        note = " (largest image of this run)" if key == "peak_rss_144mp_mb" and quick else ""
        rows.append(f"| `{key}` | {v:.3g}{note} | {op} {goal:g} | {'pass' if ok else 'FAIL'} |")
    lines = [
        "# Maps of large micrographs", "",
        "Written by `python benchmarks/bench_mapping.py`; do not edit by hand.", "",
        f"- date: {dt.datetime.now().strftime('%Y-%m-%d %H:%M')}; machine: {cpu_model()}, "
        f"{os.cpu_count()} logical cores; Python {platform.python_version()}; load average at "
        f"the end {os.getloadavg()[0]:.2f} (shared machine)", "",
        "| metric | value | goal | pass |", "| --- | --- | --- | --- |", *rows, "",
        "| image | tiles | failed | time s | s per MP | peak RSS MB (tree) | main process MB |",
        "| --- | --- | --- | --- | --- | --- | --- |",
    ]
    for r in s["rows"]:
        lines.append(f"| {r['side']}² = {r['megapixels']:.0f} MP | {r['tiles']} | {r['failed']} "
                     f"| {r['seconds']:.1f} | {r['seconds'] / r['megapixels']:.2f} | "
                     f"{r['peak_rss_mb']:.0f} | {r['parent_peak_rss_mb']:.0f} |")
    lines += ["", f"- mosaic {m['side']}² px, borders at x = {m['borders'][0]}, y = "
              f"{m['borders'][1]}: {m['inside']} tiles wholly inside a region; verdict right "
              f"{m['right']:.1%}, top class right {m['right_predicted']:.1%}; the grains "
              f"region is one field of {m['grains']} grains",
              "- tiles whose verdict missed: " + (", ".join(f"{v} {k}" for k, v in
                                                          sorted(m["misses"].items()))
                                                  or "none"), ""]
    return "\n".join(lines)


def measure_mapping(workdir: Path, *, quick: bool = False, progress=print) -> dict:
    model = train_model(workdir)
    scaling = measure_scaling(workdir, model, SIZES["quick" if quick else "full"], progress)
    mosaic = measure_mosaic(workdir, model, side=1600 if quick else 2400)
    progress(f"mosaic: {mosaic['right']:.1%} of {mosaic['inside']} tiles right")
    return {"scaling": scaling, "mosaic": mosaic}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="4, 9, 16 MP; print, write nothing")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="topoclass-mapping-") as tmp:
        result = measure_mapping(Path(tmp), quick=args.quick,
                                 progress=lambda t: print(t, file=sys.stderr, flush=True))
    text = markdown(result, args.quick)
    print(text)
    if not args.quick:
        RESULTS.write_text(text, encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
