"""`topoclass score` as a script sees it: the report page's name, refusals, --strict, last line."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

from topoclass.scoring import read_scores

REPO = Path(__file__).resolve().parents[1]


def _cli(*args, cwd=None):
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.run([sys.executable, "-m", "topoclass", *map(str, args)], env=env,
                          capture_output=True, text=True, cwd=cwd, timeout=300)


def _batch(small_dataset, folder: Path, good: int = 2) -> Path:
    folder.mkdir()
    for src in sorted((small_dataset.parent / "images").iterdir())[:good]:
        shutil.copy(src, folder / src.name)
    (folder / "zz_cut.png").write_bytes(b"\x89PNG\r\n\x1a\n")  # a file cut off in transfer
    return folder


def test_strict_exit_1_and_failed_count_last(small_model, small_dataset, feature_cache,
                                             tmp_path):
    batch = _batch(small_dataset, tmp_path / "batch")
    out = tmp_path / "line-A.csv"
    done = _cli("score", small_model.directory, batch, "--out", out, "--cache", feature_cache)
    assert done.returncode == 0, done.stderr  # failures alone do not fail the run by default
    assert done.stdout.splitlines()[-1] == "failed: 1 of 3"
    assert (tmp_path / "line-A.html").is_file() and (tmp_path / "line-A_files").is_dir()
    assert "report: " + str(tmp_path / "line-A.html") in done.stdout
    # The counts of the summary add up to the images given.
    assert "images 3: scored 2, failed 1" in done.stdout
    # --strict: the same batch (resumed, nothing left to do) fails the script.
    strict = _cli("score", small_model.directory, batch, "--out", out, "--cache",
                  feature_cache, "--resume", "--strict")
    assert strict.returncode == 1, strict.stderr
    assert strict.stdout.splitlines()[-1] == "failed: 1 of 3"
    assert "already done 3 (1 of them failed)" in strict.stdout
    assert len(read_scores(out)) == 3


def test_strict_exit_0_when_nothing_failed(small_model, small_dataset, feature_cache, tmp_path):
    batch = _batch(small_dataset, tmp_path / "batch")
    (batch / "zz_cut.png").unlink()
    done = _cli("score", small_model.directory, batch, "--out", tmp_path / "s.csv", "--cache",
                feature_cache, "--strict")
    assert done.returncode == 0, done.stderr
    assert done.stdout.splitlines()[-1] == "failed: 0 of 2"


def test_existing_page_is_refused_before_any_work(tmp_path):
    page = tmp_path / "scores.html"
    page.write_text("an earlier batch's page\n")
    # The model folder does not even exist: the page is checked first, nothing is scored.
    done = _cli("score", tmp_path / "no-model", tmp_path, "--out", tmp_path / "scores.csv")
    assert done.returncode == 2
    lines = done.stderr.splitlines()
    assert len(lines) == 1 and str(page) in lines[0] and "--overwrite" in lines[0]
    assert page.read_text() == "an earlier batch's page\n"
    assert not (tmp_path / "scores.csv").exists()
