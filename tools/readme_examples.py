"""Run the README's command-line examples and write their output into README.md.

Every example block of the README's workflow section sits between markers
``<!-- example:NAME:start -->`` and ``<!-- example:NAME:end -->``; this script runs
``topoclass demo`` in a fresh temporary folder (timing it), then each README command in the
folder the demo wrote, exactly as the README shows it, and replaces the blocks with the
commands and what they printed (stdout; the progress bars go to stderr). Nothing in those
blocks is typed by hand, and the date and machine of the run are written beside them.

Run from the repository root: ``python tools/readme_examples.py`` (a few minutes on 2 cores).
``--check`` runs everything but only reports which blocks would change.
"""

from __future__ import annotations

import argparse
import csv
import datetime as dt
import io
import os
import platform
import re
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"

#: (block name, command line as the README shows it), run in this order in the demo folder.
COMMANDS = [
    ("train", "topoclass train training/labels.csv --model models/line-A"),
    ("validate", "topoclass validate models/line-A production/labels.csv"),
    ("score", "topoclass score models/line-A production/images --out line-A.csv --jobs 2"),
    ("inspect", "topoclass inspect production/images/vacancies_002.png --out inspect"),
]
#: Rows of scores.csv shown in the README: this scored image and the odd files of the batch.
ROW_IMAGES = ("production/images/vacancies_002.png",)
ODD_PREFIX = "production/images/zz_"


def cpu_model() -> str:
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                return line.split(":", 1)[1].strip()
    except OSError:
        pass
    return platform.processor() or platform.machine()


def run(command: list[str], cwd: Path, env: dict) -> str:
    done = subprocess.run(command, cwd=cwd, env=env, capture_output=True, text=True)
    if done.returncode != 0:
        raise SystemExit(f"{' '.join(command)} failed (exit {done.returncode}):\n{done.stderr}")
    return "\n".join(line.rstrip() for line in done.stdout.strip().splitlines())


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="only report what would change")
    args = parser.parse_args()
    blocks: dict[str, str] = {}
    with tempfile.TemporaryDirectory(prefix="topoclass-readme-") as tmp:
        tmp = Path(tmp)
        env = {**os.environ, "TOPOCLASS_CACHE": str(tmp / "cache"),
               "PYTHONPATH": str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", "")}
        topoclass = [sys.executable, "-m", "topoclass"]
        start = time.perf_counter()
        run(topoclass + ["demo"], tmp, env)
        demo_s = time.perf_counter() - start
        folder = tmp / "topoclass-demo"
        for name, line in COMMANDS:
            output = run(topoclass + line.split()[1:], folder, env)
            blocks[name] = f"```bash\n{line}\n```\n```text\n{output}\n```"
        blocks["rows"] = "```csv\n" + _rows(folder / "line-A.csv") + "\n```"
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    stamp = (f"{dt.datetime.now():%Y-%m-%d}, {cpu_model()}, {os.cpu_count()} logical cores, "
             f"load average {load:.1f}")
    blocks["demo-time"] = (f"`topoclass demo` took {demo_s:.0f} s in the run that wrote the "
                           f"examples below ({stamp}).")
    blocks["provenance"] = (
        "The examples below were run in the folder that `topoclass demo` writes "
        "(`topoclass-demo/`), on its invented images; their output is written into this file "
        f"by `python tools/readme_examples.py` (last run: {stamp}), not typed in:")
    text = README.read_text(encoding="utf-8")
    new = text
    for name, body in blocks.items():
        new = _replace(new, name, body)
    changed = [name for name in blocks if _block(text, name) != _block(new, name)]
    print(f"blocks changed: {', '.join(changed) or 'none'}")
    if not args.check:
        README.write_text(new, encoding="utf-8")
        print(f"wrote {README}")
    return 0


def _rows(scores: Path) -> str:
    with open(scores, newline="", encoding="utf-8") as fh:
        rows = list(csv.reader(fh))
    header, body = rows[0], rows[1:]
    chosen = [r for r in body if r[0] in ROW_IMAGES] + [r for r in body
                                                        if r[0].startswith(ODD_PREFIX)]
    buf = io.StringIO()
    csv.writer(buf, lineterminator="\n").writerows([header, *chosen])
    return buf.getvalue().strip()


def _pattern(name: str) -> re.Pattern:
    return re.compile(rf"(<!-- example:{re.escape(name)}:start -->\n)(.*?)(<!-- example:"
                      rf"{re.escape(name)}:end -->)", re.S)


def _block(text: str, name: str) -> str | None:
    match = _pattern(name).search(text)
    return None if match is None else match.group(2)


def _replace(text: str, name: str, body: str) -> str:
    pattern = _pattern(name)
    if pattern.search(text) is None:
        raise SystemExit(f"README.md has no example:{name} markers")
    return pattern.sub(lambda m: m.group(1) + body + "\n" + m.group(3), text, count=1)


if __name__ == "__main__":
    sys.exit(main())
