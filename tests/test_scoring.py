"""Batch scoring: one row per image, nothing lost on a crash, resume, lock, reproducibility."""

from __future__ import annotations

import csv
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pytest

from topoclass.errors import TopoclassError
from topoclass.images import collect_image_paths
from topoclass.scoring import CAUTION, read_scores, score_columns, score_images, summary_text

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture()
def batch(small_dataset, tmp_path):
    """The small set's images plus three bad files, copied so tests may change them."""
    folder = tmp_path / "batch"
    shutil.copytree(small_dataset.parent / "images", folder)
    (folder / "zz_empty.png").write_bytes(b"")
    (folder / "zz_text.tif").write_text("not an image\n")
    (folder / "zz_flat.png").write_bytes((small_dataset.parent / "images").joinpath(
        sorted(os.listdir(small_dataset.parent / "images"))[0]).read_bytes()[:200])
    return folder


def test_mixed_batch_scores_every_good_image(small_model, batch, feature_cache, tmp_path):
    paths = collect_image_paths([batch])
    out = tmp_path / "scores.csv"
    summary = score_images(small_model.model, paths, out, cache_dir=feature_cache)
    rows = read_scores(out)
    assert [r["image"] for r in rows] == [str(p) for p in paths]  # input order, one row each
    bad = {r["image"] for r in rows if r["status"] == "error"}
    assert bad == {str(batch / n) for n in ("zz_empty.png", "zz_text.tif", "zz_flat.png")}
    assert summary.failed == 3 and summary.scored == len(paths) - 3
    classes = [str(c) for c in small_model.model.classes]
    for r in rows:
        if r["status"] == "ok":
            p = np.array([float(r[f"p_{c}"]) for c in classes])
            assert abs(p.sum() - 1) < 1e-4
            assert r["predicted"] == classes[int(np.argmax(p))]
            assert float(r["confidence"]) == pytest.approx(p.max(), abs=1e-5)
        else:
            assert r["message"] and "\n" not in r["message"]
            assert Path(r["image"]).name in r["message"]
    assert "Caution" in summary_text(summary) and CAUTION in summary_text(summary)


def test_existing_output_is_not_overwritten_silently(small_model, batch, feature_cache, tmp_path):
    out = tmp_path / "scores.csv"
    out.write_text("precious\n")
    with pytest.raises(TopoclassError, match="--resume"):
        score_images(small_model.model, collect_image_paths([batch])[:2], out,
                     cache_dir=feature_cache)
    assert out.read_text() == "precious\n"


def test_resume_skips_done_and_rescores_changed(small_model, batch, feature_cache, tmp_path):
    paths = collect_image_paths([batch])[:6]
    out = tmp_path / "scores.csv"
    score_images(small_model.model, paths[:3], out, cache_dir=feature_cache)
    # A changed file under a scored name must be scored again, not kept stale.
    shutil.copy(paths[5], paths[0])
    summary = score_images(small_model.model, paths, out, resume=True, cache_dir=feature_cache)
    assert summary.skipped == 2 and summary.scored + summary.failed == 4
    rows = read_scores(out)
    assert sorted(r["image"] for r in rows) == sorted(str(p) for p in paths)
    assert len(rows) == len(paths)


def test_resume_finds_rows_however_the_path_is_spelled(small_model, batch, feature_cache,
                                                       tmp_path, monkeypatch):
    monkeypatch.chdir(tmp_path)
    names = sorted(p.name for p in batch.iterdir())[:4]
    relative = [Path("batch") / n for n in names]
    out = tmp_path / "scores.csv"
    score_images(small_model.model, relative[:2], out, cache_dir=feature_cache)
    # The same files, absolute this time: the two finished ones are not scored again.
    absolute = [(tmp_path / p).resolve() for p in relative]
    summary = score_images(small_model.model, absolute, out, resume=True,
                           cache_dir=feature_cache)
    assert summary.skipped == 2 and summary.scored + summary.failed == 2
    # And through a symlink to the folder: every image is already done.
    (tmp_path / "linked").symlink_to(batch, target_is_directory=True)
    linked = [tmp_path / "linked" / n for n in names]
    summary = score_images(small_model.model, linked, out, resume=True, cache_dir=feature_cache)
    assert summary.skipped == 4 and summary.scored + summary.failed == 0
    rows = read_scores(out)
    assert len(rows) == 4  # one row per image, no duplicates
    assert len({Path(r["image"]).resolve() for r in rows}) == 4
    # A copy with the same bytes under another name is another image: it gets its own row.
    copy = tmp_path / "copy_of_first.png"
    shutil.copy(absolute[0], copy)
    summary = score_images(small_model.model, [copy], out, resume=True, cache_dir=feature_cache)
    assert summary.skipped == 0 and len(read_scores(out)) == 5


def test_same_inputs_give_identical_bytes_whatever_the_jobs(small_model, batch, tmp_path):
    paths = collect_image_paths([batch])[:8]
    one, two = tmp_path / "one.csv", tmp_path / "two.csv"
    # Cold caches both times, so both runs compute everything themselves.
    score_images(small_model.model, paths, one, jobs=1, cache_dir=tmp_path / "c1")
    score_images(small_model.model, paths, two, jobs=2, cache_dir=tmp_path / "c2")
    assert one.read_bytes() == two.read_bytes()


def test_second_writer_refuses_while_lock_is_held(small_model, batch, feature_cache, tmp_path):
    out = tmp_path / "scores.csv"
    lock = tmp_path / "scores.csv.lock"
    lock.write_text(str(os.getpid()))  # a live process holds it
    with pytest.raises(TopoclassError, match="another topoclass run"):
        score_images(small_model.model, collect_image_paths([batch])[:1], out,
                     cache_dir=feature_cache)
    assert not out.exists()
    # A lock left by a process that is gone is taken over.
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    lock.write_text(str(dead.pid))
    score_images(small_model.model, collect_image_paths([batch])[:1], out,
                 cache_dir=feature_cache)
    assert len(read_scores(out)) == 1 and not lock.exists()


def test_incomplete_last_line_is_dropped_on_resume(small_model, batch, feature_cache, tmp_path):
    paths = collect_image_paths([batch])[:3]
    out = tmp_path / "scores.csv"
    score_images(small_model.model, paths, out, cache_dir=feature_cache)
    text = out.read_text()
    out.write_text(text[: len(text) - 25])  # as if killed in the middle of writing a row
    assert len(read_scores(out)) == 2
    score_images(small_model.model, paths, out, resume=True, cache_dir=feature_cache)
    rows = read_scores(out)
    assert sorted(r["image"] for r in rows) == sorted(str(p) for p in paths)


def test_sigkill_mid_batch_then_resume_gives_one_row_per_image(small_model, batch, tmp_path):
    paths = collect_image_paths([batch])
    out = tmp_path / "scores.csv"
    cmd = [sys.executable, "-m", "topoclass", "score", str(small_model.directory), str(batch),
           "--out", str(out), "--cache", str(tmp_path / "cache")]
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    proc = subprocess.Popen(cmd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    deadline = time.monotonic() + 120
    while time.monotonic() < deadline and proc.poll() is None:
        if out.exists() and len(read_scores(out)) >= 3:
            break
        time.sleep(0.05)
    assert proc.poll() is None, "the batch finished before it could be killed"
    proc.send_signal(signal.SIGKILL)
    proc.wait()
    before = read_scores(out)  # a valid CSV with every finished image
    assert 3 <= len(before) < len(paths)
    assert list(before[0].keys()) == score_columns([str(c) for c in small_model.model.classes])
    done = subprocess.run(cmd + ["--resume"], env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    after = read_scores(out)
    assert sorted(r["image"] for r in after) == sorted(str(p) for p in paths)
    assert after[: len(before)] == before  # finished rows kept as they were
    with open(out, newline="") as fh:
        assert all(len(row) == len(after[0]) for row in csv.reader(fh))
