"""Nearest labelled images by the sliced Wasserstein distance between H1 diagrams.

References: hand-worked values of the distance (below), persim.sliced_wasserstein (reference
implementation, same directions), persim.wasserstein (exact matching) with the equivalence
bound of Carrière, Cuturi & Oudot (ICML 2017, Theorem 3.3; stated from memory):
W1 / (2 M) <= SW <= 2 sqrt(2) W1 with M = 1 + 2 N (2 N - 1) for diagrams of at most N points.
"""

from __future__ import annotations

import numpy as np
import persim
import pytest

from topoclass.model import load_model
from topoclass.model.neighbours import LabelledDiagrams, labelled_diagrams, sliced_distance
from topoclass.persistence import pattern_persistence
from topoclass.records import PatternRecord
from topoclass.sites import SitePattern
from topoclass.synth import hexagonal_lattice


def test_hand_worked_single_point_against_the_empty_diagram():
    # D1 = {(0, 1)}, D2 = {}: the point is matched to its diagonal projection (1/2, 1/2), so
    # each direction theta costs |<theta, (-1/2, 1/2)>| = |sin t - cos t| / 2, whose mean over
    # a half circle is (1/pi) * (sqrt(2)/2) * 2 = sqrt(2)/pi = 0.450158.
    assert sliced_distance([[0.0, 1.0]], np.zeros((0, 2)), n_directions=4000) == pytest.approx(
        np.sqrt(2) / np.pi, rel=1e-6)


def test_hand_worked_shifted_point():
    # D1 = {(0, 1)}, D2 = {(0, 1 + e)}: the points pair with each other (cost e |sin t|) and
    # the two diagonal projections with each other (cost (e/2) |sin t + cos t|); half-circle
    # means 2/pi and 2 sqrt(2)/pi give SW = e (2 + sqrt(2)) / pi.
    e = 1e-3
    got = sliced_distance([[0.0, 1.0]], [[0.0, 1.0 + e]], n_directions=4000)
    assert got == pytest.approx(e * (2 + np.sqrt(2)) / np.pi, rel=2e-3)
    assert sliced_distance([[0.2, 0.9], [1.0, 1.5]], [[0.2, 0.9], [1.0, 1.5]]) == 0.0


@pytest.mark.parametrize("sizes", [(7, 9), (40, 25), (1, 0), (0, 3)])
def test_equals_persim_sliced_wasserstein(sizes):
    rng = np.random.default_rng(sum(sizes))
    a, b = (_diagram(rng, n) for n in sizes)
    assert sliced_distance(a, b) == pytest.approx(persim.sliced_wasserstein(a, b, M=50),
                                                  rel=1e-6, abs=1e-12)


def test_ranks_clear_cases_as_the_exact_wasserstein_distance_does():
    # By the bound, SW(A, B) < SW(A, C) whenever W1(A, C) > 4 sqrt(2) M W1(A, B); a further
    # factor 2 covers the ground norm (persim.wasserstein matches in the sup norm, the bound
    # may be stated for the Euclidean one: they differ by at most sqrt(2) each way).
    rng = np.random.default_rng(0)
    checked = 0
    for _ in range(40):
        a = _diagram(rng, 3)
        near = a + rng.normal(0, 1e-5, a.shape)
        far = _diagram(rng, 3)
        n_points = 3
        m = 1 + 2 * n_points * (2 * n_points - 1)
        w_near, w_far = persim.wasserstein(a, near), persim.wasserstein(a, far)
        if w_far > 2 * 4 * np.sqrt(2) * m * w_near:
            checked += 1
            assert sliced_distance(a, near) < sliced_distance(a, far)
    assert checked >= 30


def test_nearest_training_images_are_ordered_as_persim_orders_them():
    records, labels = _lattice_records()
    store = labelled_diagrams(records, labels, thumbnails=False)
    assert len(store) == len(records) and list(store.labels) == labels
    query = _lattice_record(vacancies=6, seed=99).diagrams.h1
    nearest = store.nearest(query, k=3)
    reference = [persim.sliced_wasserstein(query, store.diagram(i)) for i in range(len(store))]
    assert [n["index"] for n in nearest] == list(np.argsort(reference, kind="stable")[:3])
    assert nearest[0]["label"] == "vacancies"
    assert [n["distance"] for n in nearest] == sorted(n["distance"] for n in nearest)
    with pytest.raises(ValueError, match="k must be"):
        store.nearest(query, k=0)


def test_a_trained_model_keeps_its_training_diagrams(small_model, small_dataset, tmp_path):
    from topoclass.inspection import inspect_image

    model = load_model(small_model.directory)  # through the model file, not the run's object
    store = model.neighbours
    assert isinstance(store, LabelledDiagrams)
    assert len(store) == small_model.model.settings["n_samples"]
    assert sorted(set(store.labels)) == sorted(str(c) for c in model.classes)
    assert store.thumbnails.shape[1:] == (64, 64) and store.thumbnails.std() > 0
    # A training image is its own nearest labelled image, at distance 0, with its own label.
    image = store.images[0]
    summary = inspect_image(image, out=tmp_path, settings=None, model=model)
    first = summary["nearest_labelled"][0]
    assert first["image"] == image and first["distance"] == 0.0
    assert first["label"] == store.labels[0]
    assert (tmp_path / "nearest.csv").read_text().count("\n") == 4
    assert (tmp_path / "nearest_1.png").is_file()


def test_report_detail_view_shows_the_nearest_labelled_images(small_model, small_dataset,
                                                              feature_cache, tmp_path):
    from topoclass.report import write_batch_report
    from topoclass.scoring import score_images

    images = sorted((small_dataset.parent / "images").iterdir())[:2]
    out = tmp_path / "scores.csv"
    score_images(small_model.model, images, out, cache_dir=feature_cache)
    write_batch_report(out, model=small_model.model, details=2, cache_dir=feature_cache)
    pages = list(tmp_path.rglob("index.html"))
    assert pages and all("Nearest labelled images" in p.read_text() for p in pages)


# --------------------------------------------------------------------------------------------


def _diagram(rng, n: int) -> np.ndarray:
    birth = rng.uniform(0.8, 1.2, n)
    return np.column_stack([birth, birth + rng.exponential(0.3, n)])


def _lattice_record(vacancies: int, seed: int, jitter: float = 0.02) -> PatternRecord:
    rng = np.random.default_rng(seed)
    shape, a = (200, 200), 10.0
    xy = hexagonal_lattice(shape, a, jitter=jitter, seed=seed)
    inner = np.flatnonzero(((xy > 3 * a) & (xy < 199 - 3 * a)).all(axis=1))
    xy = np.delete(xy, rng.choice(inner, vacancies, replace=False), axis=0)
    border = ((xy < a) | (xy > 199 - a)).any(axis=1)
    pattern = SitePattern(xy=xy, spacing=a, polarity="dark", border=border, shape=shape)
    return PatternRecord(pattern_persistence(pattern), source=f"membrane_{seed}.tif")


def _lattice_records() -> tuple[list[PatternRecord], list[str]]:
    records, labels = [], []
    for seed in range(4):
        records.append(_lattice_record(0, seed))
        labels.append("ordered")
        records.append(_lattice_record(6, 10 + seed))
        labels.append("vacancies")
        records.append(_lattice_record(0, 20 + seed, jitter=0.2))
        labels.append("disordered")
    return records, labels


def test_inspect_command_lists_the_nearest_labelled_images(small_model, tmp_path):
    import os
    import subprocess
    import sys
    from pathlib import Path

    repo = Path(__file__).resolve().parents[1]
    store = load_model(small_model.directory).neighbours
    env = {**os.environ, "PYTHONPATH": str(repo) + os.pathsep + os.environ.get("PYTHONPATH", ""),
           "TOPOCLASS_CACHE": str(tmp_path / "cache")}
    done = subprocess.run([sys.executable, "-m", "topoclass", "inspect", store.images[1],
                           "--model", str(small_model.directory)],
                          env=env, capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    lines = [ln for ln in done.stdout.splitlines() if "nearest labelled" in ln]
    assert len(lines) == 3 and store.labels[1] in lines[0] and store.images[1] in lines[0]
