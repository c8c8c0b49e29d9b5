"""Scoring on a Dask cluster (local worker processes on 127.0.0.1): the same rows as --jobs 1,
no row lost or doubled when a worker dies or the scheduler goes, clear one-line errors.

The reference for equality is the project's own single-process run (``jobs=1``); the fault
behaviour checked is the one Dask distributed documents for its scheduler (tasks of a dead
worker run again elsewhere, futures are cancelled when the scheduler connection is lost).
"""

from __future__ import annotations

import os
import signal
import socket
import sys
import threading
import time
from collections import Counter
from pathlib import Path

import pytest

pytest.importorskip("distributed", reason='the cluster extra is not installed (pip install '
                    '".[cluster]"); .ci/run installs it with the test extra')

from topoclass.cluster import ClusterEngine, parse_cluster  # noqa: E402
from topoclass.errors import ClusterError, TopoclassError  # noqa: E402
from topoclass.images import collect_image_paths  # noqa: E402
from topoclass.scoring import read_scores, score_images  # noqa: E402


@pytest.fixture(scope="module")
def forty(tmp_path_factory) -> list[Path]:
    """Forty invented micrographs (4 classes x 10), other samples than the training set's."""
    from topoclass.synth import write_dataset

    sheet = write_dataset(tmp_path_factory.mktemp("forty"), per_class=10, size=256, seed=5)
    paths = collect_image_paths([sheet.parent / "images"])
    assert len(paths) == 40
    return paths


@pytest.fixture(scope="module")
def engine():
    """Two one-thread worker processes on 127.0.0.1, closed after the module."""
    with ClusterEngine("local:2") as eng:
        yield eng


def _kill_when_cached(cache: Path, action, at_least: int = 3, limit: float = 120.0) -> dict:
    """Run ``action`` in a thread once workers have cached ``at_least`` images (mid-run)."""
    seen: dict = {}

    def watch():
        end = time.monotonic() + limit
        while time.monotonic() < end:
            n = len(list(cache.rglob("*.npz")))
            if n >= at_least:
                seen["cached_at_action"] = n
                action()
                return
            time.sleep(0.02)

    thread = threading.Thread(target=watch, daemon=True)
    thread.start()
    seen["thread"] = thread
    return seen


def test_parse_cluster_forms():
    assert parse_cluster("tcp://10.0.0.5:8786").address == "tcp://10.0.0.5:8786"
    assert parse_cluster("tcp://scheduler-1.lab:8786").address == "tcp://scheduler-1.lab:8786"
    assert parse_cluster(" local:3 ").local_workers == 3
    for bad in ("10.0.0.5:8786", "tcp://host", "local:0", "local:two", "tcp://h:99999"):
        with pytest.raises(TopoclassError, match="tcp://HOST:PORT"):
            parse_cluster(bad)


def test_cluster_scores_equal_single_process(engine, small_model, forty, tmp_path):
    paths = forty[::4]  # one image in four: every class, a few seconds
    one, two = tmp_path / "jobs1.csv", tmp_path / "cluster.csv"
    score_images(small_model.model, paths, one, jobs=1, cache_dir=False)
    summary = score_images(small_model.model, paths, two, cache_dir=False, engine=engine)
    assert summary.scored == len(paths) and summary.failed == 0
    # Row for row and byte for byte, in the input order (the file's documented order).
    assert two.read_text() == one.read_text()


def test_unreadable_path_is_an_error_row_naming_path_and_worker(engine, small_model, forty,
                                                                tmp_path):
    missing = tmp_path / "share-not-mounted" / "membrane_0001.tif"
    out = tmp_path / "scores.csv"
    summary = score_images(small_model.model, [forty[0], missing, forty[1]], out,
                           cache_dir=False, engine=engine)
    rows = read_scores(out)
    assert [r["image"] for r in rows] == [str(forty[0]), str(missing), str(forty[1])]
    assert [r["status"] for r in rows] == ["ok", "error", "ok"]
    assert summary.failed == 1
    message = rows[1]["message"]
    assert str(missing) in message and "cannot read the file" in message
    workers = set(engine.client.scheduler_info()["workers"])
    assert any(f"on cluster worker {w}" in message for w in workers), message
    assert all(w.startswith("tcp://127.0.0.1:") for w in workers)  # local:N stays local
    assert "127.0.0.1, 2 worker(s)" in engine.describe()


def test_killed_worker_leaves_exactly_forty_rows(engine, small_model, forty, tmp_path):
    pids = engine.client.run(os.getpid)
    victim = sorted(pids.values())[0]
    cache = tmp_path / "cache"
    seen = _kill_when_cached(cache, lambda: os.kill(victim, signal.SIGKILL))
    out = tmp_path / "scores.csv"
    summary = score_images(small_model.model, forty, out, cache_dir=cache, engine=engine)
    seen["thread"].join(5)
    assert seen.get("cached_at_action", 40) < 40, "the worker was not killed mid-run"
    rows = read_scores(out)
    assert [r["image"] for r in rows] == [str(p) for p in forty]  # each once, in order
    assert all(r["status"] == "ok" for r in rows), [r["message"] for r in rows]
    assert summary.scored == 40
    # The scheduler's nanny started a new worker process in its place.
    deadline = time.monotonic() + 30
    while len(engine.client.scheduler_info()["workers"]) < 2 and time.monotonic() < deadline:
        time.sleep(0.1)
    assert victim not in engine.client.run(os.getpid).values()


def test_lost_scheduler_stops_in_one_line_and_resume_finishes(engine, small_model, forty,
                                                              tmp_path):
    batch = forty[:20]
    cache = tmp_path / "cache"
    out = tmp_path / "scores.csv"
    with ClusterEngine("local:2") as lost:
        seen = _kill_when_cached(cache, lost._cluster.close)
        with pytest.raises(ClusterError) as caught:
            score_images(small_model.model, batch, out, cache_dir=cache, engine=lost)
        seen["thread"].join(5)
    text = str(caught.value)
    assert "\n" not in text and "lost the Dask scheduler" in text and "--resume" in text
    before = read_scores(out)
    assert len(before) < 20 and len({r["image"] for r in before}) == len(before)
    assert not out.with_name(out.name + ".lock").exists()  # the lock went with the run
    # Another scheduler (the module's) finishes the batch.
    summary = score_images(small_model.model, batch, out, cache_dir=cache, engine=engine,
                           resume=True)
    rows = read_scores(out)
    assert Counter(r["image"] for r in rows) == Counter(str(p) for p in batch)
    assert summary.skipped == len(before) and summary.scored == 20 - len(before)


def test_unreachable_scheduler_is_one_line_exit_2(small_model, forty, tmp_path, monkeypatch,
                                                   capsys):
    import topoclass.cluster
    from topoclass import cli

    with socket.socket() as s:  # a port nobody listens on
        s.bind(("127.0.0.1", 0))
        port = s.getsockname()[1]
    monkeypatch.setattr(topoclass.cluster, "CONNECT_SECONDS", 2.0)
    out = tmp_path / "scores.csv"
    monkeypatch.setattr(sys, "argv", ["topoclass", "score", str(small_model.directory),
                                      str(forty[0]), "--out", str(out),
                                      "--cluster", f"tcp://127.0.0.1:{port}"])
    with pytest.raises(SystemExit) as code:
        cli.main()
    assert code.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith(f"topoclass: error: cannot reach a Dask scheduler at tcp://127.0.0.1:{port}")
    assert "dask scheduler" in err[0]
    assert not out.exists()  # refused before any work
