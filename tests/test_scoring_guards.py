"""Scoring guards: the model's own settings, loud programming errors, resume, lock and cache.

Each test sets up the failure the guard exists for and checks the observable outcome (a file,
an exception type, a row), so it fails if the guard is removed.
"""

from __future__ import annotations

import copy
import os
import shutil
import time

import numpy as np
import pytest

import topoclass.features as features
from topoclass.errors import TopoclassError
from topoclass.features import FeatureSettings, measure_patterns
from topoclass.images import collect_image_paths
from topoclass.scoring import read_scores, score_images


@pytest.fixture()
def images(small_dataset):
    return sorted((small_dataset.parent / "images").iterdir())[:3]


def _model_with(small_model, **changes):
    model = copy.copy(small_model.model)
    model.settings = copy.deepcopy(model.settings)
    for key, value in changes.items():
        if key == "features":
            model.settings["features"].update(value)
        else:
            setattr(model, key, value)
    return model


def test_scoring_without_settings_uses_the_models_own(small_model, images, tmp_path):
    model = _model_with(small_model, features={"max_scale": 2.0})
    cache = tmp_path / "cache"
    score_images(model, images, tmp_path / "s.csv", cache_dir=cache)
    used = {p.name for p in cache.iterdir()}
    assert used == {FeatureSettings(max_scale=2.0).key()}
    assert FeatureSettings().key() not in used  # the defaults (max_scale 2.5) were not used


def test_a_programming_error_in_measuring_is_raised_not_a_row(images, tmp_path, monkeypatch):
    def broken(pattern):
        raise ZeroDivisionError("a bug")

    monkeypatch.setattr(features, "order_measures", broken)
    with pytest.raises(ZeroDivisionError):
        measure_patterns(images, cache_dir=False)


def test_a_programming_error_in_the_model_is_raised_not_rows(small_model, images, tmp_path):
    model = _model_with(small_model)

    def broken(records):
        raise RuntimeError("a bug in the model")

    model.assess = broken
    with pytest.raises(RuntimeError, match="a bug in the model"):
        score_images(model, images, tmp_path / "s.csv", cache_dir=False)


def test_resume_with_a_comma_in_a_class_name(small_model, images, tmp_path, feature_cache):
    classes = np.array([f"{c}, line A" for c in small_model.model.classes])
    model = _model_with(small_model, classes=classes)
    out = tmp_path / "s.csv"
    score_images(model, images[:2], out, cache_dir=feature_cache)
    summary = score_images(model, images, out, resume=True, cache_dir=feature_cache)
    assert summary.skipped == 2 and summary.scored + summary.failed == 1
    assert "p_" + classes[0] in read_scores(out)[0]


def test_an_empty_lock_is_stale_only_when_old(small_model, images, tmp_path, feature_cache):
    out = tmp_path / "s.csv"
    lock = tmp_path / "s.csv.lock"
    lock.write_text("")  # a run that crashed between creating the lock and writing its PID
    with pytest.raises(TopoclassError, match="another topoclass run"):
        score_images(small_model.model, images[:1], out, cache_dir=feature_cache)
    old = time.time() - 3600
    os.utime(lock, (old, old))
    score_images(small_model.model, images[:1], out, cache_dir=feature_cache)
    assert len(read_scores(out)) == 1 and not lock.exists()


def test_a_failed_cache_write_leaves_no_temporary_file(images, tmp_path, monkeypatch):
    def disk_full(*args, **kwargs):
        raise OSError(28, "No space left on device")

    monkeypatch.setattr(features.np, "savez", disk_full)
    results = measure_patterns(images[:1], cache_dir=tmp_path)
    assert results[0].ok  # the image is measured all the same
    assert [p for p in tmp_path.rglob("*") if p.is_file()] == []


def test_cache_dir_false_writes_no_cache(images, tmp_path, monkeypatch):
    monkeypatch.setenv("TOPOCLASS_CACHE", str(tmp_path / "default"))
    results = measure_patterns(images[:1], cache_dir=False)
    assert results[0].ok
    assert not (tmp_path / "default").exists()
    with pytest.raises(TypeError, match="cache_dir"):
        measure_patterns(images[:1], cache_dir=3)


def test_input_errors_still_become_rows(small_model, small_dataset, tmp_path, feature_cache):
    folder = tmp_path / "batch"
    shutil.copytree(small_dataset.parent / "images", folder)
    (folder / "zz_empty.png").write_bytes(b"")
    paths = collect_image_paths([folder])[-2:]
    summary = score_images(small_model.model, paths, tmp_path / "s.csv", cache_dir=feature_cache)
    assert summary.failed == 1 and summary.scored == 1
