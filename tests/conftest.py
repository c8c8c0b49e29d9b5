"""Shared fixtures: a small invented training set and a model trained on it (made once)."""

from __future__ import annotations

import os

import matplotlib
import pytest

matplotlib.use("Agg")  # no display anywhere in the tests


@pytest.fixture(scope="session")
def small_dataset(tmp_path_factory):
    """Invented anodic-alumina micrographs: 6 per class, 3 samples per class, 256 px."""
    from topoclass.synth import write_dataset

    root = tmp_path_factory.mktemp("small-set")
    return write_dataset(root, per_class=6, size=256, seed=11, groups_per_class=3)


@pytest.fixture(scope="session")
def feature_cache(tmp_path_factory):
    return tmp_path_factory.mktemp("feature-cache")


@pytest.fixture(scope="session")
def small_model(small_dataset, feature_cache, tmp_path_factory):
    """A model trained on :func:`small_dataset` with 3 grouped folds."""
    from topoclass.workflow import train_from_labels

    model_dir = tmp_path_factory.mktemp("model") / "small"
    run = train_from_labels(
        small_dataset, model_dir, cv=3, seed=3, cache_dir=feature_cache, figures=False,
        jobs=min(2, os.cpu_count() or 1),
    )
    return run
