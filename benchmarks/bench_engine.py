"""End-to-end features of a 1-MP micrograph against the floor plus ripser alone.

Run from the repository root::

    PYTHONPATH=. python benchmarks/bench_engine.py            # rewrites benchmarks/engine.md
    PYTHONPATH=. python benchmarks/bench_engine.py --quick    # 3 repeats, prints only

The goal ``features_vs_engine`` <= 1.5 (issue 13) and the figure ``featurize_vs_floor``, as
``run.measure_featurize`` measures them for RESULTS.md, plus what computing ripser's cocycles
only where a result uses them saves. The load average is written beside the figures: on a
shared machine they are distorted by other work.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402

OUT = HERE / "engine.md"
GOAL = 1.5


def engine_markdown(f: dict, load: tuple, *, mode: str) -> str:
    lb, la = load
    st = f["stages_cpu_s"]
    ok = "pass" if f["features_vs_floor_plus_ripser"] <= GOAL else "FAIL"
    return f"""# End-to-end features against the floor plus ripser alone

Written by `python benchmarks/bench_engine.py` ({mode}); do not edit by hand.

- date: {dt.datetime.now().strftime('%Y-%m-%d %H:%M')}; machine: {cpu_model()}, \
{os.cpu_count()} logical cores; one thread; best of {f['repeats']}, interleaved
- **load average (1, 5, 15 min)** before {lb[0]:.2f} {lb[1]:.2f} {lb[2]:.2f}, after \
{la[0]:.2f} {la[1]:.2f} {la[2]:.2f}: the machine is shared; above 2 every figure is distorted.
- image: invented 1024² 16-bit TIFF, spacing {f['spacing_px']:g} px, {f['n_sites']} sites, \
{f['ripser_edges']} site pairs closer than the radius limit

| figure | value |
| --- | --- |
| features end to end (`measure_pattern` + "all" transform) | {f['features_s'] * 1e3:.1f} ms |
| floor (`read_micrograph` + one Gaussian filter) | {f['floor_s'] * 1e3:.1f} ms |
| ripser alone, same sites and options (no cocycles) | {f['ripser_s'] * 1e3:.1f} ms |
| ripser alone with cocycles (before) | {f['ripser_cocycles_s'] * 1e3:.1f} ms |
| `pattern_persistence`, every birth edge / truncated bars' only | \
{f['persistence_all_s'] * 1e3:.1f} / {f['persistence_cut_s'] * 1e3:.1f} ms |
| saving of cocycles only where used | {f['cocycle_saving_s'] * 1e3:.1f} ms \
({f['cocycle_saving_of_features']:.1%} of the features) |
| **`features_vs_engine`** (goal <= {GOAL}) | **{f['features_vs_floor_plus_ripser']:.2f}** ({ok}) |
| `featurize_vs_floor` (figure) | {f['ratio']:.2f} |

CPU by stage (one extra run, without the read): \
{', '.join(f"{k[:-2]} {v * 1e3:.1f} ms" for k, v in st.items())}.
What the chain adds beyond the floor and ripser is the sum of these stages less ripser's share
of `persistence` (radius graph, H0 spanning tree, death edges, border exclusion).
"""


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="3 repeats; print only")
    args = parser.parse_args(argv)
    from run import measure_featurize

    before = os.getloadavg()
    with tempfile.TemporaryDirectory(prefix="topoclass-engine-") as tmp:
        f = measure_featurize(Path(tmp), repeats=3 if args.quick else 7)
    text = engine_markdown(f, (before, os.getloadavg()), mode="quick" if args.quick else "full")
    print(text)
    if not args.quick:
        OUT.write_text(text, encoding="utf-8")
    return 0 if f["features_vs_floor_plus_ripser"] <= GOAL else 1


if __name__ == "__main__":
    sys.exit(main())
