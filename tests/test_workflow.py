"""The job end to end: label → train → validate → score, on invented demo micrographs."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import skimage.data
import skimage.io

from topoclass.features import FeatureSettings
from topoclass.images import collect_image_paths
from topoclass.scoring import read_scores, score_images
from topoclass.workflow import run_demo, train_from_labels

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo exactly as ``topoclass demo`` runs it (training set, production batch)."""
    workdir = tmp_path_factory.mktemp("demo")
    return run_demo(workdir, jobs=min(2, os.cpu_count() or 1), progress=False,
                    log=lambda *_: None)


def test_demo_quality_held_out_by_group(demo):
    card = json.loads((demo.training.directory / "card.json").read_text())
    # Grouped cross-validation: every image is predicted by a model that saw no image of its
    # simulated membrane sample. Targets from the workflow issue: macro-F1 >= 0.95, ECE <= 0.05.
    assert card["cv"]["splitter"] == "StratifiedGroupKFold"
    assert card["cv"]["macro_f1"] >= 0.95
    assert card["cv"]["ece"] <= 0.05
    # The production batch is other samples made with another seed: held out twice over.
    assert demo.validation.metrics["macro_f1"] >= 0.95
    rows = {Path(r["image"]).name: r for r in read_scores(demo.scores)}
    # The batch also holds a photograph of something else and a truncated file.
    assert rows.pop("zz_not_a_membrane.png")["unfamiliar"] == "yes"
    damaged = rows.pop("zz_damaged_transfer.png")
    assert damaged["status"] == "error" and "zz_damaged_transfer.png" in damaged["message"]
    assert all(r["status"] == "ok" for r in rows.values())
    # The novelty threshold is set for about 1 % of in-population images (model.py); allow 2.
    flagged = sum(r["unfamiliar"] == "yes" for r in rows.values())
    # The summary's unfamiliar count also holds images no class fits (empty review-band set).
    no_class = sum(r["verdict"] == "unfamiliar" and r["unfamiliar"] == "no"
                   for r in rows.values())
    assert flagged <= 2 and demo.score_summary.unfamiliar == 1 + flagged + no_class
    assert demo.score_summary.failed == 1
    assert (demo.scores.parent / "scores.html").is_file()


def test_photo_of_something_else_is_flagged_unfamiliar(demo, tmp_path):
    # scikit-image's shipped photographs (camera man, coins, astronaut): not membranes.
    paths = []
    for name in ("camera", "coins", "astronaut"):
        path = tmp_path / f"{name}.png"
        skimage.io.imsave(path, getattr(skimage.data, name)())
        paths.append(path)
    out = tmp_path / "scores.csv"
    score_images(demo.training.model, paths, out,
                 settings=FeatureSettings.from_model(demo.training.model), cache_dir="")
    rows = {Path(r["image"]).stem: r for r in read_scores(out)}
    # Either no lattice is found at all (an error row saying so) or the image is flagged.
    assert rows["camera"]["status"] == "ok" and rows["camera"]["unfamiliar"] == "yes"
    for r in rows.values():
        assert r["status"] == "error" or r["unfamiliar"] == "yes", r


def test_same_seed_same_card_metrics_and_same_scores(small_dataset, small_model, feature_cache,
                                                     tmp_path):
    again = train_from_labels(small_dataset, tmp_path / "again", cv=3, seed=3,
                              cache_dir=feature_cache, figures=False)
    first = json.loads((small_model.directory / "card.json").read_text())
    second = json.loads((again.directory / "card.json").read_text())
    assert first["cv"] == second["cv"]
    paths = collect_image_paths([small_dataset.parent / "images"])[:6]
    a, b = tmp_path / "a.csv", tmp_path / "b.csv"
    score_images(small_model.model, paths, a, cache_dir=feature_cache)
    score_images(again.model, paths, b, cache_dir=feature_cache)
    assert a.read_bytes() == b.read_bytes()


def test_card_records_what_a_reviewer_needs(small_model, small_dataset):
    card = json.loads((small_model.directory / "card.json").read_text())
    for key in ("classes", "class_counts", "feature_set", "classifier", "calibration",
                "settings", "cv", "versions", "label_sheet_sha256", "model_file", "sha256"):
        assert key in card, key
    assert card["class_counts"] == {"disordered": 6, "grains": 6, "ordered": 6, "vacancies": 6}
    assert card["settings"]["features"]["max_scale"] == 2.5
    import hashlib

    assert card["label_sheet_sha256"] == hashlib.sha256(small_dataset.read_bytes()).hexdigest()
    assert (small_model.directory / "cv_report.md").is_file()


def _cli(*args, cwd=None):
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    return subprocess.run([sys.executable, "-m", "topoclass", *map(str, args)], env=env,
                          capture_output=True, text=True, cwd=cwd)


def test_cli_validate_and_score(small_model, small_dataset, feature_cache, tmp_path):
    done = _cli("validate", small_model.directory, small_dataset, "--cache", feature_cache)
    assert done.returncode == 0, done.stderr
    assert "macro-F1" in done.stdout and "reliability" in done.stdout
    out = tmp_path / "scores.csv"
    done = _cli("score", small_model.directory, small_dataset.parent / "images",
                "--out", out, "--cache", feature_cache, "--jobs", "2")
    assert done.returncode == 0, done.stderr
    assert "Caution" in done.stdout and "re-validate" in done.stdout.lower()
    rows = read_scores(out)
    assert len(rows) == 24 and {r["status"] for r in rows} == {"ok"}
    classes = [c for c in rows[0] if c.startswith("p_")]
    assert np.allclose([sum(float(r[c]) for c in classes) for r in rows], 1, atol=1e-4)


def test_cli_score_refuses_when_nothing_could_be_scored(small_model, tmp_path):
    bad = tmp_path / "bad.png"
    bad.write_text("no image here")
    done = _cli("score", small_model.directory, bad, "--out", tmp_path / "s.csv")
    assert done.returncode == 2
    assert done.stderr.strip().splitlines()[-1].startswith("topoclass: error:")
    assert "Traceback" not in done.stderr


def test_cli_train_with_bad_sheet_is_one_line_exit_2(tmp_path):
    sheet = tmp_path / "labels.csv"
    sheet.write_text("image,label,colour\nmissing.png,ordered,red\n")
    done = _cli("train", sheet, "--model", tmp_path / "m")
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("topoclass: error:") and "labels.csv" in lines[0]


def test_cli_unreadable_model_folder_is_one_line_exit_2(tmp_path):
    (tmp_path / "model").mkdir()
    (tmp_path / "model" / "card.json").write_text("{not json")
    img = tmp_path / "x.png"
    skimage.io.imsave(img, skimage.data.checkerboard())
    done = _cli("score", tmp_path / "model", img, "--out", tmp_path / "s.csv")
    assert done.returncode == 2
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "card.json" in lines[0] and "Traceback" not in done.stderr
