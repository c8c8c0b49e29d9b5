"""Worker processes of a `--jobs 2` run end when the run is killed (kill -9)."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import psutil
import pytest
from PIL import Image

from topoclass.scoring import read_scores

REPO = Path(__file__).resolve().parents[1]


@pytest.mark.skipif(not hasattr(os, "getppid") or sys.platform == "win32",
                    reason="the parent watch relies on POSIX re-parenting")
def test_workers_end_within_seconds_of_a_killed_parent(small_model, small_dataset, tmp_path):
    # Enough distinct images (one pixel changed per copy, so the cache cannot serve them)
    # that the batch is still running when it is killed.
    batch = tmp_path / "batch"
    batch.mkdir()
    for k in range(4):
        for src in sorted((small_dataset.parent / "images").iterdir()):
            pixels = np.array(Image.open(src))
            pixels.flat[k] ^= 1
            Image.fromarray(pixels).save(batch / f"{k}_{src.name}")
    out = tmp_path / "scores.csv"
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen(
        [sys.executable, "-m", "topoclass", "score", str(small_model.directory), str(batch),
         "--out", str(out), "--jobs", "2", "--cache", str(tmp_path / "cache"), "--no-report"],
        env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        parent = psutil.Process(proc.pid)
        deadline = time.monotonic() + 120
        # The first rows are written once the workers have finished images.
        while time.monotonic() < deadline and proc.poll() is None:
            if out.exists() and read_scores(out):
                break
            time.sleep(0.05)
        workers = parent.children(recursive=True)
        assert proc.poll() is None, "the batch finished before it could be killed"
        assert len(workers) >= 2, workers
    finally:
        proc.send_signal(signal.SIGKILL)
        proc.wait()
    gone, alive = psutil.wait_procs(workers, timeout=5)
    for p in alive:  # clean up before failing, so no process outlives the test
        p.kill()
    assert not alive, f"{len(alive)} worker processes outlived their parent by 5 s"
    assert len(read_scores(out)) < len(list(batch.iterdir()))
