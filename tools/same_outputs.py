"""Check that a refactor changed no output: train, score and report the demo data twice.

Runs the same fixed-seed job (train on ``data_demo/labels.csv`` with 3-fold CV, score ten demo
images, write the HTML report) with the working tree and with a git revision (checked out in a
temporary worktree), then compares ``scores.csv``, the model folder (``card.json`` without its
time stamp and file hash, ``cv_report.md``, ``importance.csv``), ``scores.html``/``report.html``
and every detail file, byte for byte. Exit code 0 when all are the same.

    python tools/same_outputs.py --against HEAD~1
"""

from __future__ import annotations

import argparse
import filecmp
import json
import os
import subprocess
import sys
import tempfile
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]

JOB = r"""
import sys
import matplotlib
matplotlib.rcParams["svg.hashsalt"] = "same-outputs"
from pathlib import Path
out = Path(sys.argv[1]); data = Path(sys.argv[2])
from topoclass.workflow import train_from_labels
from topoclass.scoring import score_images
from topoclass.model import load_model
from topoclass.report import write_batch_report
train_from_labels(data / "labels.csv", out / "model", cv=3, seed=7, cache_dir=out / "cache")
model = load_model(out / "model")
images = sorted((data / "images").glob("*"))[:10]
score_images(model, images, out / "run" / "scores.csv", cache_dir=out / "cache")
write_batch_report(out / "run" / "scores.csv", model=model)
"""


def run_job(tree: Path, out: Path) -> None:
    # SVG files carry a date and random ids; fix both so that equal figures give equal files.
    env = {**os.environ, "PYTHONPATH": str(tree), "MPLBACKEND": "Agg",
           "SOURCE_DATE_EPOCH": "0"}
    subprocess.run([sys.executable, "-c", JOB, str(out), str(ROOT / "data_demo")], env=env,
                   check=True, cwd=tree)


def compare(a: Path, b: Path) -> list[str]:
    problems = []
    files_a = {p.relative_to(a) for p in a.rglob("*") if p.is_file() and "cache" not in p.parts}
    files_b = {p.relative_to(b) for p in b.rglob("*") if p.is_file() and "cache" not in p.parts}
    for rel in sorted(files_a ^ files_b):
        problems.append(f"only in one run: {rel}")
    for rel in sorted(files_a & files_b):
        if rel.name == "card.json":
            ca, cb = (json.loads((x / rel).read_text()) for x in (a, b))
            for card in (ca, cb):
                card.pop("created_utc", None)
                card.pop("sha256", None)
            if ca != cb:
                problems.append(f"differs: {rel}")
        elif rel.suffix == ".skops":
            continue  # holds the class paths of the code that wrote it; compared via outputs
        elif rel.suffix == ".html":
            ta, tb = ((x / rel).read_text().replace(str(x), "OUT") for x in (a, b))
            if ta != tb:
                problems.append(f"differs: {rel}")
        elif not filecmp.cmp(a / rel, b / rel, shallow=False):
            problems.append(f"differs: {rel}")
    return problems


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--against", default="HEAD~1", help="git revision to compare with")
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        old_tree = tmp / "old-tree"
        subprocess.run(["git", "worktree", "add", "--detach", str(old_tree), args.against],
                       cwd=ROOT, check=True, capture_output=True)
        try:
            run_job(old_tree, tmp / "old")
            run_job(ROOT, tmp / "new")
        finally:
            subprocess.run(["git", "worktree", "remove", "--force", str(old_tree)], cwd=ROOT,
                           check=False, capture_output=True)
        problems = compare(tmp / "old", tmp / "new")
    for p in problems:
        print(p)
    print("same outputs" if not problems else f"{len(problems)} difference(s)")
    return 0 if not problems else 1


if __name__ == "__main__":
    sys.exit(main())
