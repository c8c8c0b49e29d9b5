"""A model folder holds one model and only reports about that model."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from topoclass._files import file_sha256
from topoclass.errors import TopoclassError
from topoclass.workflow import train_from_labels, validate_from_labels

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture()
def old_model(small_model, tmp_path):
    """A copy of the session's model with a validation report beside it."""
    folder = tmp_path / "line-A"
    shutil.copytree(small_model.directory, folder)
    (folder / "validation.md").write_text("# Validation of the old model\n")
    return folder


def test_existing_model_is_refused_before_any_work(old_model, tmp_path):
    before = {p.name: p.read_bytes() for p in old_model.iterdir()}
    # The label sheet does not even exist: the folder is checked first.
    with pytest.raises(TopoclassError, match="--overwrite") as excinfo:
        train_from_labels(tmp_path / "no-sheet.csv", old_model)
    assert str(old_model) in str(excinfo.value)
    assert {p.name: p.read_bytes() for p in old_model.iterdir()} == before


def test_a_folder_that_holds_no_model_is_never_cleared(small_dataset, tmp_path):
    folder = tmp_path / "notes"
    folder.mkdir()
    (folder / "thesis.txt").write_text("keep me\n")
    with pytest.raises(TopoclassError, match="no model"):
        train_from_labels(small_dataset, folder, overwrite=True)
    assert (folder / "thesis.txt").read_text() == "keep me\n"


def test_overwrite_replaces_the_model_and_leaves_no_stale_report(old_model, small_dataset,
                                                                 feature_cache):
    old_hash = file_sha256(old_model / "model.skops")
    (old_model / "old_figures").mkdir()
    (old_model / "old_figures" / "x.png").write_bytes(b"")
    run = train_from_labels(small_dataset, old_model, cv=3, seed=4, cache_dir=feature_cache,
                            figures=False, overwrite=True)
    names = {p.name for p in old_model.iterdir()}
    assert "validation.md" not in names and "old_figures" not in names
    assert {"model.skops", "card.json"} <= names
    assert file_sha256(old_model / "model.skops") != old_hash
    assert run.directory == old_model


def test_validation_report_names_its_model_and_none_survives_a_failed_run(
        small_model, small_dataset, feature_cache, tmp_path):
    out = tmp_path / "held-out"
    run = validate_from_labels(small_model.directory, small_dataset, out=out,
                               cache_dir=feature_cache)
    assert run.report == out / "validation.md"
    text = run.report.read_text()
    assert file_sha256(small_model.directory / "model.skops") in text
    assert (out / "validation_confusion.png").is_file()
    # A held-out sheet none of whose images can be measured: the run fails, and the report
    # of the earlier run is gone rather than left to be read as this one's.
    bad = tmp_path / "bad"
    bad.mkdir()
    for cls in ("ordered", "vacancies"):
        (bad / cls).mkdir()
        for k in range(2):
            (bad / cls / f"cut_{k}.png").write_bytes(b"\x89PNG\r\n\x1a\n")
    with pytest.raises(TopoclassError):
        validate_from_labels(small_model.directory, bad, out=out, cache_dir=feature_cache)
    assert not (out / "validation.md").exists()
    assert not (out / "validation_confusion.png").exists()


def test_validation_rows_carry_the_sheet_s_other_columns(small_model, small_dataset,
                                                          feature_cache, tmp_path):
    from topoclass.labels import read_labels
    from topoclass.scoring import read_scores

    held = read_labels(small_dataset)
    sheet = tmp_path / "held-out.csv"
    lines = ["image,label,group,operator,date"]
    for k, (image, label, group) in enumerate(zip(held.images, held.labels, held.groups,
                                                  strict=True)):
        lines.append(f"{image},{label},{group},op{k % 3},2026-03-{1 + k % 28:02d}")
    sheet.write_text("\n".join(lines) + "\n")
    run = validate_from_labels(small_model.directory, sheet, out=tmp_path / "v",
                               cache_dir=feature_cache)
    rows = read_scores(tmp_path / "v" / "validation.csv")
    assert [r["image"] for r in rows] == [str(p) for p in held.images]
    assert [r["operator"] for r in rows] == [f"op{k % 3}" for k in range(len(rows))]
    assert rows[5]["date"] == "2026-03-06"
    # The rows agree with the metrics: as many right calls as the accuracy says.
    right = sum(r["predicted"] == r["label"] for r in rows)
    assert right == round(run.metrics["accuracy"] * len(rows))


def test_cli_train_into_existing_model_is_one_line_exit_2(old_model, tmp_path):
    env = {**os.environ, "PYTHONPATH": str(REPO) + os.pathsep + os.environ.get("PYTHONPATH", "")}
    done = subprocess.run([sys.executable, "-m", "topoclass", "train", str(tmp_path / "x.csv"),
                           "--model", str(old_model)], env=env, capture_output=True,
                          text=True, timeout=120)
    assert done.returncode == 2
    lines = done.stderr.splitlines()
    assert len(lines) == 1 and str(old_model) in lines[0] and "--overwrite" in lines[0]
