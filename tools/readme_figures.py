"""Rewrite the figures of README.md from a real run: the walk-through's outputs and the
sentences that quote benchmark results.

    python tools/readme_figures.py            # about as long as `topoclass demo` plus scoring
    python tools/readme_figures.py --check    # run everything, change nothing, exit 1 if stale

It also redraws the README's pictures from the same demo run (``docs/make_figures.py``;
``--no-pictures`` leaves them alone).

In a temporary folder it runs ``topoclass demo`` as a user would (timed: that is the README's
demo time), then, in the folder the demo wrote, every command of the README's walk-through in
README order: the command of an ``<!-- out:NAME:start -->`` block is the ``bash`` fence right
above it. Each block gets that command's standard output (progress bars go to standard error and
are left out), with the temporary folder's path removed, and a line naming the date, the machine
and this script. The other ``out:`` blocks are filled from files the run or the benchmark scripts
wrote (:data:`FILLERS`): rows of the ``scores.csv`` the README's score command wrote, the model
card, ``benchmarks/RESULTS.md`` and ``benchmarks/report.md``. Nothing in those blocks is typed.

The demo and the walk-through take fixed seeds and a fresh feature cache, so a rerun on the same
code writes the same outputs; only the date, the machine and the demo time change.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import io
import json
import os
import re
import shlex
import subprocess
import sys
import tempfile
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
for _p in (str(ROOT / "tools"), str(ROOT / "benchmarks")):
    if _p not in sys.path:
        sys.path.insert(0, _p)

from _machine import cpu_model  # noqa: E402
from readme_blocks import find_blocks, replace_blocks  # noqa: E402

README = ROOT / "README.md"
DEMO_FOLDER = "topoclass-demo"
PREFIX = "out:"
SCRIPT = "python tools/readme_figures.py"


@dataclass
class WalkThrough:
    """What one run of the walk-through saw: where, when, on what, and each command's output."""

    demo: Path
    date: str
    machine: str
    demo_seconds: float = 0.0
    outputs: dict[str, str] = field(default_factory=dict)
    commands: dict[str, list[str]] = field(default_factory=dict)

    def stamp(self, what: str) -> str:
        return f"_Written by `{SCRIPT}` on {self.date} ({self.machine}): {what}._"


def machine() -> str:
    """CPU model, cores and the load at this moment (the machine may be shared)."""
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return f"{cpu_model()}, {os.cpu_count()} logical cores, load average {load:.1f}"


def run_walkthrough(readme_text: str, workdir: Path, *, log=print) -> WalkThrough:
    """Run ``topoclass demo`` in ``workdir``, then every command block of the README in order."""
    run = WalkThrough(workdir / DEMO_FOLDER, dt.date.today().isoformat(), machine())
    env = _environment(workdir)
    log("topoclass demo (timed)")
    t0 = time.perf_counter()
    _run_command(["topoclass", "demo", "--workdir", DEMO_FOLDER], workdir, env)
    run.demo_seconds = time.perf_counter() - t0
    for name, commands in command_blocks(readme_text):
        run.commands[name] = commands
        outputs = []
        for command in commands:
            log(command)
            outputs.append(_run_command(shlex.split(command), run.demo, env))
        run.outputs[name] = _strip_paths("".join(outputs), workdir, run.demo)
    return run


def command_blocks(readme_text: str) -> list[tuple[str, list[str]]]:
    """``(block name, commands)`` for each ``out:`` block that has a ``bash`` fence right above
    it, in README order; a block with neither a fence nor a filler is an error."""
    found = []
    for block in find_blocks(readme_text):
        if not block.name.startswith(PREFIX) or block.inline:
            continue
        name = block.name[len(PREFIX):]
        before = readme_text[:block.start].rsplit("<!--", 1)[0].rstrip()
        m = re.search(r"```bash\n((?:(?!```).)*)\n```$", before, re.DOTALL)
        if m is None:
            if name not in FILLERS:
                raise SystemExit(f"README block {block.name!r} has no ```bash fence right above "
                                 f"it and no filler in {SCRIPT}; add one of them")
            continue
        commands = [c for c in m.group(1).splitlines() if c.strip() and not c.startswith("#")]
        found.append((name, commands))
    return found


def block_contents(readme_text: str, run: WalkThrough) -> dict[str, str]:
    """New text of every ``out:`` block: command outputs, then the fillers."""
    contents = {}
    for block in find_blocks(readme_text):
        if not block.name.startswith(PREFIX):
            continue
        name = block.name[len(PREFIX):]
        if name in run.outputs:
            contents[block.name] = (f"```text\n{run.outputs[name].rstrip()}\n```\n"
                                    + run.stamp("the output of the command above, run "
                                                "in the folder `topoclass demo` writes"))
        elif name in FILLERS:
            contents[block.name] = FILLERS[name](run)
        else:
            raise SystemExit(f"README block {block.name!r}: nothing in {SCRIPT} writes it")
    return contents


# --------------------------------------------------------------------------------------------
# blocks filled from files


def _demo_time(run: WalkThrough) -> str:
    return (f"`topoclass demo` took {run.demo_seconds:.0f} s in the last run of `{SCRIPT}` "
            f"({run.date}; {run.machine}).")


def _score_rows(run: WalkThrough) -> str:
    """The header and three telling rows of the ``scores.csv`` the README's score command wrote."""
    wanted = ("vacancies_002.png", "zz_damaged_transfer.png", "zz_not_a_membrane.png")
    lines = (run.demo / _option(run.commands["score"][-1], "--out")).read_text(
        encoding="utf-8").splitlines()
    rows = [lines[0]] + [line for line in lines[1:] if any(
        next(csv.reader(io.StringIO(line)))[0].endswith("/" + w) for w in wanted)]
    if len(rows) != len(wanted) + 1:
        raise SystemExit(f"scores.csv of the walk-through lacks some of {wanted}")
    return ("```csv\n" + "\n".join(rows) + "\n```\n"
            + run.stamp("rows of the `scores.csv` that the score command above wrote"))


def _probability_cap(run: WalkThrough) -> str:
    card = json.loads((run.demo / "models" / "line-A" / "card.json").read_text())
    n, k = sum(card["class_counts"].values()), len(card["classes"])
    return f"{(n + 1 / k) / (n + 1):.3f} for this model's {n} images and {k} classes"


def _option(command: str, option: str) -> str:
    words = shlex.split(command)
    if option not in words[:-1]:
        raise SystemExit(f"README command `{command}` has no {option}")
    return words[words.index(option) + 1]


def benchmark_metrics(path: Path) -> dict[str, list[str]]:
    """Rows of the goal tables a benchmark script wrote: ``metric -> [value, goal, pass, ...]``."""
    rows = {}
    for line in path.read_text(encoding="utf-8").splitlines():
        m = re.match(r"\|\s*`([\w.-]+)`\s*\|(.*)\|\s*$", line)
        if m:
            rows[m.group(1)] = [c.strip() for c in m.group(2).split("|")]
    return rows


def _benchmark_line(path: Path, key: str) -> str:
    for line in path.read_text(encoding="utf-8").splitlines():
        if line.startswith(f"- {key}:"):
            return line[len(f"- {key}:"):].strip()
    raise SystemExit(f"{path}: no '- {key}:' line; rerun the benchmark that writes it")


def _need(rows: dict, path: Path, *names: str) -> list[list[str]]:
    missing = [n for n in names if n not in rows]
    if missing:
        raise SystemExit(f"{path.relative_to(ROOT)} has no row {', '.join(missing)}; rerun the "
                         "benchmark that writes it")
    return [rows[n] for n in names]


def _report_cost(run: WalkThrough) -> str:
    path = ROOT / "benchmarks" / "report.md"
    (ratio, *_), (kb, *_) = _need(benchmark_metrics(path), path, "report_vs_score",
                                  "detail_kb_per_image")
    count = re.search(r"(\d+) invented images", path.read_text(encoding="utf-8"))
    images = f"its {count.group(1)} images" if count else "its images"
    when = _benchmark_line(path, "date").split(";")[0]
    return (f"in the last run of `benchmarks/bench_report.py` ({when}) the page took {ratio} "
            f"times the scoring time of {images} and {kb} kB per image "
            "([benchmarks/report.md](benchmarks/report.md))")


SPEED_METRICS = ("features_vs_engine", "jobs2_vs_capacity", "cluster2_vs_jobs2",
                 "featurize_vs_floor", "jobs2_speedup", "site_finding_2048_s", "scaling_slope",
                 "peak_rss_100k_mb")


def _speed(run: WalkThrough) -> str:
    path = ROOT / "benchmarks" / "RESULTS.md"
    rows = benchmark_metrics(path)
    names = [n for n in SPEED_METRICS if n in rows]
    _need(rows, path, *names[:1] or SPEED_METRICS[:1])
    lines = ["| metric | value | goal | met | measured on |", "| --- | --- | --- | --- | --- |"]
    for name in names:
        cells = rows[name] + [""] * 4
        lines.append(f"| `{name}` | {cells[0]} | {cells[1]} | {cells[2]} | {cells[3]} |")
    when = _benchmark_line(path, "date").split(";")[0]
    where = _benchmark_line(path, "machine").split(";")[0]
    lines += ["", run.stamp(f"copied from [benchmarks/RESULTS.md](benchmarks/RESULTS.md), which "
                            f"`python benchmarks/run.py` wrote on {when} ({where})")]
    return "\n".join(lines)


FILLERS: dict[str, Callable[[WalkThrough], str]] = {
    "demo-time": _demo_time,
    "score-rows": _score_rows,
    "probability-cap": _probability_cap,
    "report-cost": _report_cost,
    "speed": _speed,
}


# --------------------------------------------------------------------------------------------
# running commands


def _environment(workdir: Path) -> dict[str, str]:
    env = dict(os.environ)
    env.update({
        "PYTHONPATH": str(ROOT) + os.pathsep + env.get("PYTHONPATH", ""),
        "TOPOCLASS_CACHE": str(workdir / "cache"),  # a fresh cache, as on a new machine
        "MPLBACKEND": "Agg",
        "COLUMNS": "100",  # typer/rich wrap at the terminal width: fix it
        "NO_COLOR": "1",
        "TERM": "dumb",
    })
    return env


def _run_command(argv: list[str], cwd: Path, env: dict[str, str]) -> str:
    if argv[0] == "topoclass":  # this tree's topoclass, whatever is installed
        argv = [sys.executable, "-m", "topoclass", *argv[1:]]
    done = subprocess.run(argv, cwd=cwd, env=env, capture_output=True, text=True,
                          stdin=subprocess.DEVNULL)
    if done.returncode != 0:
        raise SystemExit(f"`{shlex.join(argv)}` in {cwd} exited {done.returncode}:\n"
                         f"{done.stdout[-2000:]}{done.stderr[-3000:]}")
    return done.stdout


def _strip_paths(text: str, workdir: Path, demo: Path) -> str:
    for path in (demo, workdir, workdir.resolve()):
        text = text.replace(str(path) + os.sep, "").replace(str(path), ".")
    return text


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--check", action="store_true",
                        help="change nothing; exit 1 when a block would change (date aside)")
    parser.add_argument("--no-pictures", action="store_true",
                        help="leave docs/*.png alone (by default docs/make_figures.py redraws "
                             "them from the same demo run)")
    parser.add_argument("--workdir", type=Path,
                        help="run in this (empty) folder and keep it, instead of a temporary one")
    args = parser.parse_args(argv)
    text = README.read_text(encoding="utf-8")
    command_blocks(text)  # fail on a malformed README before the long run
    with tempfile.TemporaryDirectory(prefix="topoclass-readme-") as tmp:
        workdir = args.workdir.resolve() if args.workdir else Path(tmp)
        workdir.mkdir(parents=True, exist_ok=True)
        run = run_walkthrough(text, workdir, log=lambda s: print(s, file=sys.stderr))
        # The run is long: fill the README as it is now, not as it was when the run started.
        text = README.read_text(encoding="utf-8")
        new = replace_blocks(text, block_contents(text, run))
        if not args.check:
            README.write_text(new, encoding="utf-8")
            if not args.no_pictures:
                sys.path.insert(0, str(ROOT / "docs"))
                from make_figures import make_figures

                for name, size in make_figures(run.demo).items():
                    print(f"docs/{name}: {size / 1000:.0f} kB")
    if args.check:
        stale = _without_stamps(new) != _without_stamps(text)
        print("README figures are " + ("stale" if stale else "up to date"))
        return 1 if stale else 0
    print(f"README.md: {len(find_blocks(new))} marked blocks; the demo took "
          f"{run.demo_seconds:.0f} s")
    return 0


def _without_stamps(text: str) -> str:
    text = re.sub(r"_[^_\n]*[Ww]ritten by `[^`]+` on [^_\n]*_", "", text)
    return re.sub(r"took \d+ s in the last run of `[^`]+` \([^)]*\)", "", text)


if __name__ == "__main__":
    sys.exit(main())
