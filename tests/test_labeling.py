"""The label book, the labelling order and ``topoclass suggest``.

Outside references: the margin of a probability vector is the published formula (Scheffer,
Decomain & Wrobel 2001; uncertainty sampling after Lewis & Gale 1994), checked on hand-worked
values; k-centre greedy (Sener & Savarese 2018) is checked on a worked example on a line, where
the farthest-first order can be read off by hand.
"""

from __future__ import annotations

import csv
import json
import os
import subprocess
import sys

import numpy as np
import pytest
from typer.testing import CliRunner

from topoclass.cli import app
from topoclass.errors import LabelSheetError, TopoclassError
from topoclass.labeling import LabelBook, diverse_order, margin_uncertainty, rank_records
from topoclass.labels import read_labels


def _rows(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


# ------------------------------------------------------------------ label book


def test_every_label_is_on_disk_at_once_relative_to_the_sheet(tmp_path):
    (tmp_path / "img").mkdir()
    a, b = tmp_path / "img" / "a.png", tmp_path / "img" / "b.png"
    sheet = tmp_path / "labels.csv"
    with LabelBook(sheet, classes=["ordered", "vacancies"]) as book:
        book.set_label(a, "ordered")
        assert _rows(sheet) == [["image", "label"], ["img/a.png", "ordered"]]
        book.set_label(b, "vacancies", group="sample-07")
        assert _rows(sheet) == [["image", "label", "group"], ["img/a.png", "ordered", ""],
                                ["img/b.png", "vacancies", "sample-07"]]
        book.set_label(a, "vacancies", group="sample-07")  # relabel keeps the row's place
        assert _rows(sheet)[1] == ["img/a.png", "vacancies", "sample-07"]
    assert not [p for p in tmp_path.iterdir() if p.name.endswith(".tmp")]


def test_undo_puts_the_previous_row_back(tmp_path):
    sheet = tmp_path / "labels.csv"
    with LabelBook(sheet) as book:
        book.set_label(tmp_path / "a.png", "ordered")
        before = book.row(tmp_path / "a.png")
        book.set_label(tmp_path / "a.png", "grains")
        book.restore(tmp_path / "a.png", before)
        assert _rows(sheet) == [["image", "label"], ["a.png", "ordered"]]
        book.restore(tmp_path / "a.png", None)
        assert _rows(sheet) == [["image", "label"]]
        assert len(read_labels(sheet, partial=True)) == 0


def test_reopening_continues_and_keeps_other_columns(tmp_path):
    sheet = tmp_path / "labels.csv"
    sheet.write_text("image,label,note\nx.png,ordered,seen twice\n", encoding="utf-8")
    with LabelBook(sheet, classes=["grains"]) as book:
        assert book.label_of(tmp_path / "x.png") == "ordered"
        assert book.classes == ["grains", "ordered"]
        book.set_label(tmp_path / "y.png", "grains")
    assert _rows(sheet) == [["image", "label", "note"], ["x.png", "ordered", "seen twice"],
                            ["y.png", "grains", ""]]


def test_a_page_sheet_with_extra_columns_trains_unchanged(small_dataset, feature_cache,
                                                          tmp_path):
    # A lab's sheet often carries its own columns (operator, date); the page keeps them and
    # `topoclass train` reads the sheet exactly as the page left it.
    labelled = read_labels(small_dataset)
    rows = list(zip(labelled.images, labelled.labels, labelled.groups, strict=True))
    sheet = small_dataset.parent / "page_labels.csv"
    head = "".join(f"{os.path.relpath(i, sheet.parent)},{lab},{g},A. Operator,2026-11-30\n"
                   for i, lab, g in rows[:4])
    sheet.write_text("image,label,group,operator,date\n" + head, encoding="utf-8")
    with LabelBook(sheet) as book:
        for image, label, group in rows[4:]:
            book.set_label(image, label, group)
    written = sheet.read_bytes()
    assert _rows(sheet)[0] == ["image", "label", "group", "operator", "date"]
    assert _rows(sheet)[1][3:] == ["A. Operator", "2026-11-30"] and _rows(sheet)[5][3:] == ["", ""]
    result = CliRunner().invoke(app, ["train", str(sheet), "--model", str(tmp_path / "model"),
                                      "--cv", "3", "--cache", str(feature_cache)])
    assert result.exit_code == 0, result.output
    assert sheet.read_bytes() == written
    card = json.loads((tmp_path / "model" / "card.json").read_text())
    assert sorted(card["classes"]) == sorted(set(labelled.labels))


def test_a_second_book_on_one_sheet_is_refused_until_the_first_closes(tmp_path):
    sheet = tmp_path / "labels.csv"
    first = LabelBook(sheet)
    with pytest.raises(TopoclassError, match="another labelling page"):
        LabelBook(sheet)
    first.close()
    LabelBook(sheet).close()


def test_lock_of_a_killed_process_is_released(tmp_path):
    sheet = tmp_path / "labels.csv"
    code = ("import os, sys; from topoclass.labeling import LabelBook; "
            f"b = LabelBook({str(sheet)!r}); b.set_label({str(tmp_path / 'a.png')!r}, 'ordered');"
            " os._exit(0)")  # ends without closing the book
    subprocess.run([sys.executable, "-c", code], check=True,
                   env={**os.environ, "PYTHONPATH": os.getcwd()})
    with LabelBook(sheet) as book:
        assert book.label_of(tmp_path / "a.png") == "ordered"


def test_a_broken_sheet_is_reported_naming_the_file(tmp_path):
    sheet = tmp_path / "labels.csv"
    sheet.write_text("image,label\na.png,ordered\na.png,ordered\n", encoding="utf-8")
    with pytest.raises(LabelSheetError, match="labels.csv.*duplicate"):
        LabelBook(sheet)
    sheet.write_text("image,label\n", encoding="utf-8")
    LabelBook(sheet).close()  # the lock was released after the failure


def test_bad_class_names_are_refused(tmp_path):
    with LabelBook(tmp_path / "labels.csv") as book, pytest.raises(TopoclassError):
        book.add_class("a,b")


def test_partial_sheets_read_but_training_still_checks(tmp_path):
    sheet = tmp_path / "labels.csv"
    (tmp_path / "a.png").write_bytes(b"")
    sheet.write_text("image,label,note\na.png,ordered,x\n", encoding="utf-8")
    assert read_labels(sheet, partial=True).labels == ("ordered",)
    assert read_labels(sheet, partial=True).extra == {"note": ("x",)}  # kept as a note
    sheet.write_text("image,label\na.png,ordered\n", encoding="utf-8")
    with pytest.raises(LabelSheetError, match="only one class"):
        read_labels(sheet)
    sheet.write_text("image,label\n", encoding="utf-8")
    assert len(read_labels(sheet, partial=True)) == 0


# ------------------------------------------------------------------ ranking


def test_margin_uncertainty_hand_worked():
    # 1 - (p_first - p_second) (Scheffer et al. 2001), worked by hand.
    proba = np.array([[0.5, 0.5, 0.0], [1.0, 0.0, 0.0], [0.1, 0.6, 0.3], [0.25, 0.25, 0.5]])
    np.testing.assert_allclose(margin_uncertainty(proba), [1.0, 0.0, 0.7, 0.75])


def test_plain_k_centre_greedy_on_a_line():
    # Worked example: labelled {0}; pool {1, 2, 10, 11, 5}. Farthest-first: 11 (d=11), then 5
    # (min(5, 6) = 5 beats 2's min(2, 9) = 2), then 2 (min(2, 3) = 2 beats 1's 1 and 10's 1),
    # then 1 and 10 (both at 1, lower index first).
    pool = np.array([[1.0], [2.0], [10.0], [11.0], [5.0]])
    order, _ = diverse_order(pool, np.array([[0.0]]))
    assert order.tolist() == [3, 4, 1, 0, 2]


def test_near_copies_are_not_suggested_in_a_row():
    labelled = np.array([[0.0, 0.0], [1.0, 0.0], [0.0, 1.0]])  # radius 1
    pool = np.array([[5.0, 5.0], [5.0, 5.001], [-5.0, 3.0]])
    uncertainty = np.array([0.9, 0.9, 0.6])
    order, distance = diverse_order(pool, labelled, uncertainty)
    assert order.tolist() == [0, 2, 1]
    assert distance[-1] < 0.01  # the copy came last, and was seen to be a copy


def test_ranking_is_repeatable_and_the_ambiguous_image_comes_first(labelled_records,
                                                                   pool_records):
    records, y = labelled_records
    pool, names = pool_records
    first = rank_records(records, y, pool, seed=4)
    again = rank_records(records, y, pool, seed=4)
    assert [s.index for s in first] == [s.index for s in again]
    assert names[first[0].index] == "half-ordered"
    assert first[0].uncertainty > max(s.uncertainty for s in first[1:])
    assert "hesitates" in first[0].reason


def test_pool_rows_are_kept_and_only_new_images_transformed(labelled_records, pool_records):
    from topoclass.labeling import PoolFeatures

    records, _ = labelled_records
    pool, _ = pool_records
    table = PoolFeatures()
    first = table.rows(range(len(records)), records)
    # The same as scikit-learn's own fit-transform of the same steps on the same images.
    from topoclass.labeling.ranking import quick_model

    expected = np.clip(quick_model()[:-1].fit_transform(records), -5, 5)
    np.testing.assert_allclose(first, expected)
    seen = []
    transform = table._transform.transform
    table._transform.transform = lambda batch: seen.append(len(batch)) or transform(batch)
    keys, both = list(range(len(records) + 2)), records + pool[:2]
    grown = table.rows(keys, both)
    assert seen == [2]  # the two new images only; fewer than twice as many: no refit
    np.testing.assert_array_equal(grown[:len(records)], first)
    np.testing.assert_allclose(table.transform(pool[:2]), grown[len(records):])
    seen.clear()
    doubled = list(range(2 * len(records)))
    table.rows(doubled, (records * 2)[:len(doubled)])  # twice the images: fitted again
    assert seen == [] and len(table) == len(doubled)  # by a new transform, not the old one


def test_before_three_labels_per_class_the_order_spreads_over_the_set(labelled_records,
                                                                      pool_records):
    records, y = labelled_records
    pool, _ = pool_records
    pick = [y.index("ordered"), y.index("grains"), y.index("grains") + 1]  # 1 and 2 labels
    ranked = rank_records([records[i] for i in pick], [y[i] for i in pick], pool)
    assert sorted(s.index for s in ranked) == list(range(len(pool)))
    assert all(s.predicted is None and "3 labels" in s.reason for s in ranked)


# ------------------------------------------------------------------ topoclass suggest


def test_suggest_command_prints_the_same_list_twice(small_dataset, feature_cache, pool_files,
                                                    tmp_path):
    sheet = tmp_path / "labels.csv"
    labelled = read_labels(small_dataset)
    with LabelBook(sheet) as book:
        for image, label in zip(labelled.images, labelled.labels, strict=True):
            book.set_label(image, label)
    args = ["suggest", *map(str, labelled.images), *map(str, pool_files.values()),
            "--sheet", str(sheet), "--count", "3", "--cache", str(feature_cache)]
    runner = CliRunner()
    one, two = runner.invoke(app, args), runner.invoke(app, args)
    assert one.exit_code == 0, one.output
    lines = one.stdout.strip().splitlines()
    assert lines == two.stdout.strip().splitlines() and len(lines) == 3
    assert lines[0] == str(pool_files["half-ordered"])
    parsed = json.loads(runner.invoke(app, args + ["--json"]).stdout)
    assert [p["image"] for p in parsed] == lines
    assert {"predicted", "confidence", "reason"} <= set(parsed[0])


# ------------------------------------------------------------------ fixtures


@pytest.fixture(scope="module")
def labelled_records(small_dataset, feature_cache):
    from topoclass.features import FeatureSettings
    from topoclass.workflow import labelled_records as records_of

    records, y, _, failures = records_of(read_labels(small_dataset), FeatureSettings(),
                                         cache_dir=feature_cache)
    assert not failures
    return records, list(y)


@pytest.fixture(scope="module")
def pool_files(small_dataset, tmp_path_factory):
    """Two more images of one labelled sample per class, and one half ordered, half disordered.

    The new images come from the same simulated membranes as labelled ones (their parameters are
    in the training set's truth files), as more images of known samples do on a real line.
    """
    from topoclass.synth import KINDS, make_micrograph
    from topoclass.synth import write_grey_png as write_png

    truth = small_dataset.parent / "truth"
    samples = {k: json.loads((truth / f"{k}_000.json").read_text())["sample"] for k in KINDS}
    out = tmp_path_factory.mktemp("pool")
    files = {}
    for kind, sample in samples.items():
        for j in range(2):
            image, _ = make_micrograph(kind, size=256, seed=500 + j, sample=sample)
            files[f"{kind}-{j}"] = out / f"{kind}-{j}.png"
            write_png(files[f"{kind}-{j}"], image)
    ordered = samples["ordered"]
    shared = ("spacing_range_px", "radius_fraction", "radius_spread", "blur_px", "noise",
              "contrast", "edge_width_px")  # one membrane look on both halves
    disordered = {**samples["disordered"], **{k: ordered[k] for k in shared}}
    left, _ = make_micrograph("ordered", size=256, seed=77, sample=ordered)
    right, _ = make_micrograph("disordered", size=256, seed=77, sample=disordered)
    files["half-ordered"] = out / "half-ordered.png"
    write_png(files["half-ordered"], np.hstack([left[:, :128], right[:, 128:]]))
    return files


@pytest.fixture(scope="module")
def pool_records(pool_files, feature_cache):
    from topoclass.features import measure_patterns

    results = measure_patterns(list(pool_files.values()), cache_dir=feature_cache)
    assert all(r.ok for r in results)
    return [r.record for r in results], list(pool_files)
