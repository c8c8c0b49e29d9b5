"""Tests of the report stage: inspection pictures, defect map, metric figures, importance, HTML."""

from __future__ import annotations

import base64
import io
import json
import subprocess
import sys
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from _report_data import CLASSES, scores_fixture, vacancy_lattice, write_png
from matplotlib.colors import to_rgb
from PIL import Image
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial import Delaunay, distance_matrix

from topoclass import report
from topoclass.errors import TopoclassError
from topoclass.persistence import pattern_persistence
from topoclass.scoring import CAUTION
from topoclass.sites import find_sites


@pytest.fixture(scope="module")
def vacancy():
    image, removed, spacing = vacancy_lattice()
    pattern = find_sites(image)
    return image, removed, spacing, pattern


def _rgb(path: Path) -> np.ndarray:
    return np.asarray(Image.open(path).convert("RGB"), dtype=float)


# --------------------------------------------------------------------------------------------
# Site overlay


def test_overlay_colours_each_site_by_its_delaunay_coordination(vacancy, tmp_path):
    image, _, _, pattern = vacancy
    report.save_figure(report.plot_sites(image, pattern), tmp_path / "overlay.png")
    picture = _rgb(tmp_path / "overlay.png")
    scale, strip = report.image_to_figure_pixels(image.shape)
    assert picture.shape[:2] == (round(image.shape[0] * scale) + strip,
                                 round(image.shape[1] * scale))
    # Reference coordination: scipy's Delaunay triangulation, counted here independently.
    indptr, _ = Delaunay(pattern.xy).vertex_neighbor_vertices
    coord = np.diff(indptr)
    assert {5, 7} <= set(coord[~pattern.border].tolist())  # the vacancy makes 5/7 sites
    checked = 0
    for (x, y), c in zip(pattern.xy[~pattern.border], coord[~pattern.border], strict=True):
        label = "≤4" if c <= 4 else "≥8" if c >= 8 else str(c)
        want = np.array(to_rgb(report.COORDINATION_COLOURS[label])) * 255
        px = picture[int(scale * (y + 0.5)), int(scale * (x + 0.5))]
        assert np.abs(px - want).max() <= 3, (x, y, c, px, want)
        checked += 1
    assert checked == int((~pattern.border).sum()) > 50
    # Where a site is drawn the picture is coloured, while the micrograph itself is grey.
    grey = picture[: int(image.shape[0] * scale)]
    assert np.mean(np.ptp(grey, axis=2) > 30) > 0.05


def test_coordination_class_names_the_overlay_colour_of_each_count():
    # A site with 6 Delaunay neighbours is the ideal of a triangular lattice; 5 and 7 are the
    # usual disclination pair and 4 or fewer, 8 or more are lumped (common practice).
    keys = report.coordination_class(np.array([2, 4, 5, 6, 7, 8, 11]))
    assert keys.tolist() == ["≤4", "≤4", "5", "6", "7", "≥8", "≥8"]
    assert set(keys) <= set(report.COORDINATION_COLOURS)


def test_overlay_draws_border_sites_hollow(vacancy, tmp_path):
    image, _, _, pattern = vacancy
    report.save_figure(report.plot_sites(image, pattern), tmp_path / "overlay.png")
    picture = _rgb(tmp_path / "overlay.png")
    scale, _ = report.image_to_figure_pixels(image.shape)
    inside = [(x, y) for x, y in pattern.xy[pattern.border]
              if 2 < x < image.shape[1] - 3 and 2 < y < image.shape[0] - 3]
    # The centre of a hollow marker shows the (grey) micrograph, not a palette colour.
    spreads = [np.ptp(picture[int(scale * (y + 0.5)), int(scale * (x + 0.5))])
               for x, y in inside]
    assert len(spreads) > 10 and np.median(spreads) < 10


# --------------------------------------------------------------------------------------------
# Defect map


def test_defect_map_marks_the_vacancy_and_nothing_far_from_it(vacancy, tmp_path):
    image, removed, spacing, pattern = vacancy
    # All bars kept: this checks the placing of the bars, independent of the border filter.
    diagrams = pattern_persistence(pattern, exclude_border=False)
    paths = report.write_inspection_figures(image, pattern, diagrams, tmp_path)
    assert [p.name for p in paths] == ["overlay.png", "diagram.png", "defects.png",
                                       "defects.csv"]
    rows = _read_defects(tmp_path / "defects.csv")
    h1 = [r for r in rows if r["kind"] == "h1"]
    top = h1[0]
    assert top["rank"] == "1"
    # Geometry of the triangular lattice: the hexagon around a vacancy is born at about a and
    # filled at about sqrt(3) a, so its bar is about 0.73 spacings long; the others are tiny,
    # below the noise floor, so the one vacancy is the one loop.
    assert float(top["length"]) == pytest.approx(np.sqrt(3) - 1, abs=0.12)
    assert len(h1) == 1 and top["kind_count"] == "1"
    assert float(top["floor"]) == pytest.approx(report.LOOP_FLOOR)
    where = np.array([float(top["x"]), float(top["y"])])
    assert np.hypot(*(where - removed)) < 1.0 * spacing
    assert top["located_by"] == "death edge"
    # The death edge is a short diagonal (sqrt(3) a) of the hexagon around the vacancy.
    i, j = int(top["site_i"]), int(top["site_j"])
    assert np.hypot(*(pattern.xy[i] - pattern.xy[j])) == pytest.approx(
        float(top["death"]) * pattern.spacing, rel=1e-5)
    for s in (i, j):
        assert np.hypot(*(pattern.xy[s] - removed)) < 1.3 * spacing


def test_defect_map_h0_rows_are_the_longest_mst_edges(vacancy, tmp_path):
    _, _, _, pattern = vacancy
    diagrams = pattern_persistence(pattern, exclude_border=False)
    # An intact lattice has no gap above the floor; with the floor at 0 every merge is listed.
    assert not [r for r in report.locate_defects(pattern, diagrams) if r["kind"] == "h0"]
    rows = [r for r in report.locate_defects(pattern, diagrams, gap_floor=0.0)
            if r["kind"] == "h0"]
    # Reference: scipy's minimum spanning tree of the full distance matrix (H0 deaths of a
    # Rips filtration are the MST edge lengths: single linkage, common practice).
    pts = pattern.xy / pattern.spacing
    mst = minimum_spanning_tree(distance_matrix(pts, pts)).tocoo()
    assert len(rows) == mst.data.size
    np.testing.assert_allclose([r["length"] for r in rows], np.sort(mst.data)[::-1], rtol=1e-9)
    for r in rows[:5]:
        mid = 0.5 * (pattern.xy[r["site_i"]] + pattern.xy[r["site_j"]])
        np.testing.assert_allclose([r["x"], r["y"]], mid)
        assert np.hypot(*(pattern.xy[r["site_i"]] - pattern.xy[r["site_j"]])) == pytest.approx(
            r["length"] * pattern.spacing)


def _vacancy_membrane(seed: int, shape=(320, 320), a=12.0):
    """Invented membrane from topoclass.synth with vacancies only (no merged pores)."""
    from topoclass.synth import make_sites, render_micrograph

    rng = np.random.default_rng(seed)
    xy, info = make_sites("vacancies", shape, a, rng=rng, params={
        "vacancy_fraction": 0.06, "merge_fraction": 0.0, "jitter": 0.03, "angle_deg": 0.0})
    image = render_micrograph(xy, shape, 0.3 * a, blur=0.8, noise=0.04, seed=seed)
    return image, np.array(info["vacancy_sites"]), a, shape


@pytest.mark.parametrize("seed", [0, 3])
def test_defect_map_marks_every_vacancy_of_a_synthetic_membrane(seed):
    from scipy.sparse.csgraph import connected_components
    from scipy.spatial import cKDTree

    image, vacancies, a, shape = _vacancy_membrane(seed)
    pattern = find_sites(image)
    rows = report.locate_defects(pattern, pattern_persistence(pattern))
    loops = np.array([[r["x"], r["y"]] for r in rows if r["kind"] == "h1"])
    # Neighbouring vacancies open one loop together: count clusters of vacancies closer than
    # 1.5 spacings (first neighbours are 1 apart, second sqrt(3)).
    pairs = cKDTree(vacancies).query_pairs(1.5 * a, output_type="ndarray")
    from scipy.sparse import coo_matrix

    n = len(vacancies)
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(n, n))
    n_clusters, label = connected_components(graph, directed=False)
    inner = np.all((vacancies > 3 * a) & (vacancies < np.array(shape)[::-1] - 3 * a), axis=1)
    inner_clusters = {c for c in range(n_clusters) if inner[label == c].all()}
    assert len(inner_clusters) > 10  # more than the old fixed cap of ten loops
    # Every loop sits on a vacancy; every vacancy cluster away from the frame (border sites
    # are left out of persistence) has a loop within a spacing; no cluster has two.
    near = cKDTree(vacancies).query(loops)[0]
    assert near.max() < a
    dist = cKDTree(loops).query(vacancies)[0]
    for c in inner_clusters:
        assert dist[label == c].min() < a, f"vacancy cluster {c} unmarked"
    assert len(inner_clusters) <= len(loops) <= n_clusters
    counts = report.defect_counts(rows)
    assert counts["h1"] == len(loops) and all(r["kind_count"] == counts[r["kind"]] for r in rows)


def test_defect_drawing_is_capped_and_says_so(tmp_path):
    image, _, _, _ = _vacancy_membrane(0)
    pattern = find_sites(image)
    rows = report.locate_defects(pattern, pattern_persistence(pattern))
    n1 = report.defect_counts(rows)["h1"]
    fig = report.plot_defects(image, pattern, rows, max_drawn=5)
    texts = [t.get_text() for t in fig.legends[0].get_texts()]
    assert texts[0].startswith(f"{n1} H1 loops > 0.2 spacing (drawn: longest 5)")
    circles = [p for p in fig.axes[0].patches if p.get_edgecolor()[:3] == to_rgb(
        report.DEFECT_COLOURS["h1"])]
    assert len(circles) == 5
    full = report.plot_defects(image, pattern, rows)
    assert "drawn" not in full.legends[0].get_texts()[0].get_text()


def test_defect_picture_shows_the_defects_where_the_csv_says(vacancy, tmp_path):
    image, _, _, pattern = vacancy
    diagrams = pattern_persistence(pattern, exclude_border=False)
    paths = report.write_inspection_figures(image, pattern, diagrams, tmp_path)
    picture = _rgb(paths[2])
    scale, _ = report.image_to_figure_pixels(image.shape)
    top = _read_defects(paths[3])[0]
    x, y = float(top["x"]), float(top["y"])
    radius = max(0.5 * float(top["length"]), 0.25) * pattern.spacing * scale
    # The ring of the top loop, drawn in the H1 colour, crosses the row through its centre.
    row = picture[int(scale * (y + 0.5)), :]
    want = np.array(to_rgb(report.DEFECT_COLOURS["h1"])) * 255
    hits = np.flatnonzero(np.abs(row - want).max(axis=1) < 40)
    cx = scale * (x + 0.5)
    assert np.any(np.abs(hits - (cx + radius)) < 4) and np.any(np.abs(hits - (cx - radius)) < 4)


def test_cut_bars_are_placed_in_a_wide_hole(tmp_path):
    # A missing patch wider than the radius limit (2.5 spacings) leaves an H1 class alive at
    # the limit; its place is the largest empty circle, inside the patch.
    shape, a = (240, 240), 12.0
    from topoclass.synth import hexagonal_lattice, render_micrograph

    xy = hexagonal_lattice(shape, a, jitter=0.02, margin=-a, seed=4)
    centre = np.array([120.0, 120.0])
    xy = xy[np.hypot(*(xy - centre).T) > 1.8 * a]
    image = render_micrograph(xy, shape, 0.3 * a, blur=0.8, noise=0.03, seed=5)
    pattern = find_sites(image)
    diagrams = pattern_persistence(pattern, exclude_border=False)
    assert diagrams.h1_truncated.any()
    rows = report.locate_defects(pattern, diagrams)
    cut = [r for r in rows if r["kind"] == "h1" and r["truncated"]]
    assert cut and cut[0]["located_by"] == "largest empty circle"
    assert np.hypot(cut[0]["x"] - centre[0], cut[0]["y"] - centre[1]) < 1.0 * a


def test_diagram_picture_draws_both_dimensions(vacancy, tmp_path):
    _, _, _, pattern = vacancy
    diagrams = pattern_persistence(pattern, exclude_border=False)
    report.save_figure(report.diagram_and_barcode_figure(diagrams), tmp_path / "diagram.png")
    picture = _rgb(tmp_path / "diagram.png")
    for kind in ("h0", "h1"):
        want = np.array(to_rgb(report.DEFECT_COLOURS[kind])) * 255
        assert np.sum(np.abs(picture - want).max(axis=2) < 10) > 200, kind


def test_locate_defects_refuses_diagrams_of_another_pattern(vacancy):
    _, _, _, pattern = vacancy
    diagrams = pattern_persistence(pattern, exclude_border=False)
    from topoclass.sites import SitePattern

    small = SitePattern(xy=pattern.xy[:10], spacing=pattern.spacing, polarity="dark",
                        border=pattern.border[:10], shape=pattern.shape)
    with pytest.raises(TopoclassError, match="do not belong"):
        report.locate_defects(small, diagrams)


def test_inspect_out_writes_pictures_and_summary(tmp_path):
    from topoclass.inspection import inspect_image

    image, _, _ = vacancy_lattice(seed=3)
    path = write_png(tmp_path / "membrane.png", image)
    summary = inspect_image(path, out=tmp_path / "out")
    names = sorted(Path(p).name for p in summary["outputs"])
    assert names == sorted(["sites.csv", "summary.json", "overlay.png", "diagram.png",
                            "defects.png", "defects.csv", "grains.png"])
    saved = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert saved == {k: v for k, v in summary.items() if k != "outputs"}
    for name in ("overlay.png", "diagram.png", "defects.png", "grains.png"):
        with Image.open(tmp_path / "out" / name) as im:
            assert im.width > 300 and im.height > 300


def test_inspect_defect_map_finds_the_vacancy_end_to_end(tmp_path):
    from topoclass.inspection import inspect_image

    image, removed, spacing = vacancy_lattice()
    path = write_png(tmp_path / "membrane.png", image)
    inspect_image(path, out=tmp_path / "out")
    top = _read_defects(tmp_path / "out" / "defects.csv")[0]
    assert np.hypot(float(top["x"]) - removed[0], float(top["y"]) - removed[1]) < spacing


def _read_defects(path: Path) -> list[dict]:
    import csv

    with open(path, newline="", encoding="utf-8") as fh:
        rows = list(csv.DictReader(fh))
    assert rows and list(rows[0]) == list(report.DEFECT_COLUMNS)
    return rows


# --------------------------------------------------------------------------------------------
# Metric figures and permutation importance


def _metrics():
    from topoclass.model import metrics_from_probabilities

    rng = np.random.default_rng(0)
    y = np.repeat(np.array(CLASSES), 20)
    proba = rng.dirichlet(np.ones(3), size=60)
    proba[np.arange(60), np.repeat([0, 1, 2], 20)] += 1.0
    proba /= proba.sum(axis=1, keepdims=True)
    return metrics_from_probabilities(y, proba, np.array(CLASSES)), y, proba


def test_reliability_diagram_counts_are_the_bin_counts():
    metrics, _, proba = _metrics()
    fig = report.plot_reliability(metrics)
    counts_axis = fig.axes[1]
    heights = [p.get_height() for p in counts_axis.patches]
    # Reference: numpy's histogram of the top-label confidence over ten equal bins (no value
    # falls on an inner edge here, so numpy's closed-left bins equal the closed-right ones).
    conf = proba.max(axis=1)
    assert not np.any(np.isclose(conf[:, None], np.linspace(0.1, 0.9, 9)[None, :]))
    np.testing.assert_array_equal(heights, np.histogram(conf, bins=10, range=(0, 1))[0])


def test_confusion_figure_shows_sklearn_counts():
    from sklearn.metrics import confusion_matrix

    metrics, y, proba = _metrics()
    fig = report.plot_confusion(metrics)
    texts = [int(t.get_text()) for t in fig.axes[0].texts]
    predicted = np.array(CLASSES)[np.argmax(proba, axis=1)]
    np.testing.assert_array_equal(texts, confusion_matrix(y, predicted, labels=CLASSES).ravel())


def test_metric_figures_are_written_as_png_and_svg(tmp_path):
    metrics, _, _ = _metrics()
    paths = report.write_metric_figures(metrics, tmp_path, prefix="validation_")
    assert [p.name for p in paths] == ["validation_confusion.png", "validation_reliability.png",
                                       "validation_per_class.png"]
    for p in paths:
        assert p.with_suffix(".svg").read_text().lstrip().startswith("<?xml")
        with Image.open(p) as im:
            assert np.ptp(np.asarray(im.convert("L"))) > 100


@pytest.mark.parametrize("feature_step", ["passthrough", "scaler"])
def test_feature_importance_equals_sklearn_permutation_importance(feature_step):
    # Reference: sklearn.inspection.permutation_importance on the raw columns of scikit-learn's
    # wine data. A column-wise standardiser as the feature step is monotone and per column, so
    # permuting its output column j is the same as permuting raw column j.
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.datasets import load_wine
    from sklearn.inspection import permutation_importance
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import StandardScaler

    X, y = load_wine(return_X_y=True)
    step = "passthrough" if feature_step == "passthrough" else StandardScaler()
    pipe = Pipeline([("features", step), ("scale", StandardScaler()),
                     ("classify", LogisticRegression(max_iter=500))])
    model = CalibratedClassifierCV(pipe, method="sigmoid", cv=3).fit(X, y)
    ours = report.feature_importance(model, X, y, n_repeats=3, seed=4)
    ref = permutation_importance(model, X, y, scoring="neg_log_loss", n_repeats=3,
                                 random_state=4)
    np.testing.assert_allclose(ours["importances"], ref.importances, rtol=1e-9, atol=1e-12)
    assert ours["names"] == [f"x{k}" for k in range(X.shape[1])]
    assert ours["importances_mean"].max() > 0.01
    # Every wine column is its own family, so permuting families is permuting columns.
    grouped = report.feature_importance(model, X, y, n_repeats=3, seed=4, grouped=True)
    np.testing.assert_allclose(grouped["importances"], ref.importances, rtol=1e-9, atol=1e-12)


def test_grouped_importance_permutes_a_family_together():
    # Reference: sklearn.inspection.permutation_importance on the raw columns, where the raw
    # data holds each family once; the feature step copies a raw column into a family of
    # identical columns, so permuting the family is permuting that raw column.
    from sklearn.calibration import CalibratedClassifierCV
    from sklearn.datasets import load_wine
    from sklearn.inspection import permutation_importance
    from sklearn.linear_model import LogisticRegression
    from sklearn.pipeline import Pipeline
    from sklearn.preprocessing import FunctionTransformer, StandardScaler

    X, y = load_wine(return_X_y=True)
    X = X[:, :3]
    names = ["h1_pimage_b0.10_p0.20", "h1_pimage_b0.10_p0.40", "psi6_global", "nn_cv"]
    step = FunctionTransformer(lambda a: a[:, [0, 0, 1, 2]],
                               feature_names_out=lambda *_: np.array(names, dtype=object))
    pipe = Pipeline([("features", step), ("scale", StandardScaler()),
                     ("classify", LogisticRegression(max_iter=500))])
    model = CalibratedClassifierCV(pipe, method="sigmoid", cv=3).fit(X, y)
    ours = report.feature_importance(model, X, y, n_repeats=3, seed=2, grouped=True)
    ref = permutation_importance(model, X, y, scoring="neg_log_loss", n_repeats=3,
                                 random_state=2)
    assert ours["names"] == ["h1_pimage", "psi6_global", "nn_cv"]
    np.testing.assert_allclose(ours["importances"], ref.importances, rtol=1e-9, atol=1e-12)


def _label_copied_into_one_family(seed=0):
    """60 images in 20 sample groups of 3; family ``psi6_*`` is a noisy one-hot copy of the
    label, two other families are pure noise. The answer is known by construction."""
    from sklearn.preprocessing import FunctionTransformer

    rng = np.random.default_rng(seed)
    classes = np.array(CLASSES)
    groups = np.repeat(np.arange(20), 3)
    y = classes[groups % 3]
    onehot = (y[:, None] == classes[None, :]).astype(float)
    X = np.hstack([onehot + 0.3 * rng.standard_normal((60, 3)),
                   rng.standard_normal((60, 6))])
    names = ["psi6_t0", "psi6_t1", "psi6_t2"] + [f"h1_pimage_b0.{k}0_p0.20" for k in range(3)] \
        + [f"betti1_t{k}.00" for k in range(3)]
    step = FunctionTransformer(feature_names_out=lambda *_: np.array(names, dtype=object))
    return X, y, groups, step


def test_importance_finds_the_family_that_holds_the_label():
    # Known answer by construction: only the psi6 family carries the label. The shipped model's
    # probabilities are bounded by limit_by_evidence, so no importance may exceed the log-loss
    # of the bound, -log(1 / (K (n + 1))) (the bound of the probabilities, see its docstring).
    from topoclass.model import train_model

    X, y, groups, step = _label_copied_into_one_family()
    model = train_model(X, y, groups, features=step, feature_set_name="known", cv=3, seed=0)
    imp = report.feature_importance(model, X, y, groups=groups, n_repeats=8, seed=1,
                                    grouped=True)
    assert imp["names"] == ["psi6", "h1_pimage", "betti1"]
    scores = dict(zip(imp["names"], imp["importances_mean"], strict=True))
    label_family = scores["psi6"]
    noise = [scores["h1_pimage"], scores["betti1"]]
    assert label_family > 0.2
    assert max(noise) < 0.05 and label_family > 5 * max(abs(v) for v in noise)
    top = -np.log(1.0 / (3 * (60 + 1)))
    assert imp["importances_max"].max() <= top - imp["baseline_log_loss"] + 1e-9
    assert imp["across_groups"] and imp["importances"].shape[1] == 8


def test_cross_group_permutation_never_keeps_a_value_within_its_group():
    from topoclass.report.importance import _cross_group_permutation

    rng = np.random.default_rng(3)
    for _ in range(50):
        sizes = rng.integers(1, 6, size=rng.integers(3, 12))
        if sizes.max() * 2 > sizes.sum():
            continue
        groups = np.repeat(np.arange(sizes.shape[0]), sizes)
        source = _cross_group_permutation(groups, rng)
        np.testing.assert_array_equal(np.sort(source), np.arange(groups.shape[0]))
        assert np.all(groups[source] != groups)


def test_training_figures_of_a_fitted_model(tmp_path):
    from sklearn.datasets import load_iris

    from topoclass.model import train_model

    X, y = load_iris(return_X_y=True)
    names = np.array(["setosa", "versicolor", "virginica"])[y]
    model = train_model(X, names, features=None, feature_set_name="iris", cv=3, seed=0)
    paths = report.write_training_figures(model, tmp_path, X, names, top=4)
    assert [p.name for p in paths] == ["cv_confusion.png", "cv_reliability.png",
                                       "cv_per_class.png", "importance.png", "importance.csv"]
    lines = (tmp_path / "importance.csv").read_text().splitlines()
    assert lines[0] == ("feature,importance_mean,importance_std,importance_min,importance_max,"
                        "repeats") and len(lines) == 5
    # Petal measurements (x2, x3) separate the iris species (Fisher 1936; common knowledge).
    assert {lines[1].split(",")[0], lines[2].split(",")[0]} & {"x2", "x3"}


# --------------------------------------------------------------------------------------------
# HTML batch report


class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.imgs, self.links, self.scripts_src, self.styles_href = [], [], [], []
        self.body_rows, self.head_cells = 0, []
        self._in_tbody = self._in_th = False
        self.text = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.imgs.append(a.get("src", ""))
        elif tag == "a":
            self.links.append(a.get("href", ""))
        elif tag == "script" and "src" in a:
            self.scripts_src.append(a["src"])
        elif tag == "link" and a.get("rel") == "stylesheet":
            self.styles_href.append(a.get("href"))
        elif tag == "tbody":
            self._in_tbody = True
        elif tag == "tr" and self._in_tbody:
            self.body_rows += 1
        elif tag == "th":
            self._in_th = True
            self.head_cells.append("")

    def handle_endtag(self, tag):
        if tag == "tbody":
            self._in_tbody = False
        elif tag == "th":
            self._in_th = False

    def handle_data(self, data):
        self.text.append(data)
        if self._in_th:
            self.head_cells[-1] += data


def test_batch_report_is_self_contained_and_complete(tmp_path):
    scores, rows = scores_fixture(tmp_path / "batch")
    out = report.write_batch_report(scores, details=2)
    assert out == scores.with_name("scores.html")  # named after the CSV
    page = _Page()
    page.feed(out.read_text(encoding="utf-8"))
    text = " ".join(" ".join(page.text).split())
    assert " ".join(CAUTION.split()) in text
    assert page.body_rows == len(rows)
    # Nothing is fetched from the network: no external script, style sheet or picture.
    assert not page.scripts_src and not page.styles_href
    assert all(src.startswith("data:image/png;base64,") for src in page.imgs)
    # Every thumbnail is a real, small PNG of the micrograph (failed image: none).
    assert len(page.imgs) == len(rows) - 1
    for src in page.imgs:
        with Image.open(io.BytesIO(base64.b64decode(src.split(",", 1)[1]))) as im:
            assert max(im.size) <= 72 and np.ptp(np.asarray(im)) > 50
    # Failed and unfamiliar images come first, before the table; the failed message is shown.
    failed_msg = rows[-1]["message"]
    assert text.index("Look at these first") < text.index("All images")
    assert text.index(failed_msg) < text.index("All images")
    assert text.count(failed_msg) == 2  # listed first and in its table row
    assert text.index("membrane_0.png") < text.index("All images")  # the unfamiliar one
    # Sortable headers: each class probability and each order measure.
    for c in CLASSES:
        assert f"p {c}" in page.head_cells
    assert "psi6_global" in page.head_cells and "defect_fraction" in page.head_cells
    # Detail views: bounded (2 here), the unfamiliar image first, with real pictures.
    details = [h for h in page.links if h.startswith("scores_files/")]
    assert len(set(details)) == 2 and "detail views for at most 2 images" in text.lower()
    first = out.parent / details[0]
    assert first.parent.name.startswith("00000-")
    for name in ("micrograph.jpg", "defects.csv"):
        assert (first.parent / name).is_file()
    detail = first.read_text()
    assert out.name == "scores.html"
    assert f"../../{out.name}" in detail and (first.parent / f"../../{out.name}").resolve() == out
    assert detail.count("<svg") >= 4 and "micrograph.jpg" in detail


def test_detail_views_go_to_the_most_doubtful_images_first():
    rows = [{"unfamiliar": "no", "p_a": "0.9", "p_b": "0.1"},
            {"unfamiliar": "no", "p_a": "0.55", "p_b": "0.45"},
            {"unfamiliar": "yes", "p_a": "0.99", "p_b": "0.01"},
            {"unfamiliar": "no", "p_a": "0.3", "p_b": "0.7"}]
    order = report.most_doubtful_first(rows, ["a", "b"])
    assert [rows.index(r) for r in order] == [2, 1, 3, 0]


def test_detail_view_draws_every_site_and_defect_over_one_small_jpeg(vacancy, tmp_path):
    import xml.etree.ElementTree as ET

    from topoclass.report.detail_view import write_detail_pictures

    image, removed, spacing, pattern = vacancy
    diagrams = pattern_persistence(pattern, exclude_border=False)
    fragment = write_detail_pictures(image, pattern, diagrams, tmp_path)
    with Image.open(tmp_path / "micrograph.jpg") as im:
        assert im.format == "JPEG" and im.size == image.shape[::-1]
    svgs = [ET.fromstring(m) for m in
            __import__("re").findall(r"<svg.*?</svg>", fragment, flags=__import__("re").S)]
    ns = "{http://www.w3.org/2000/svg}"
    sites, defects = svgs[0], svgs[1]
    # One round-capped dot per interior site, at its coordinates (image pixels), and one
    # hollow circle per border site.
    dots = [d for p in sites.iter() if p.tag in ("path", ns + "path") and
            p.get("stroke") != "black" for d in p.get("d").split("M")[1:]]
    xy = np.array([[float(v) for v in d[:-2].split()] for d in dots])
    assert len(xy) == int((~pattern.border).sum())
    np.testing.assert_allclose(np.sort(xy, axis=0),
                               np.sort(np.round(pattern.xy[~pattern.border], 1), axis=0),
                               atol=0.051)
    rings = [c for c in sites.iter() if c.tag in ("circle", ns + "circle")]
    assert len(rings) == int(pattern.border.sum())
    # The defect map: one loop, at the CSV's place, near the removed site.
    rows = _read_defects(tmp_path / "defects.csv")
    loops = [c for c in defects.iter() if c.tag in ("circle", ns + "circle")]
    assert len(loops) == len(rows) == 1
    centre = np.array([float(loops[0].get("cx")), float(loops[0].get("cy"))])
    assert np.hypot(*(centre - removed)) < spacing


def test_batch_report_of_a_partly_written_file(tmp_path):
    scores, rows = scores_fixture(tmp_path / "batch", n_ok=2)
    text = scores.read_text()
    scores.write_text(text[: text.rindex("\n", 0, len(text) - 1) + 1] + "half,a,row")
    out = report.write_batch_report(scores, tmp_path / "elsewhere" / "r.html", details=0)
    page = _Page()
    page.feed(out.read_text())
    assert page.body_rows == len(rows) - 1  # the cut last line is ignored
    assert not [h for h in page.links if h.startswith("r_files/")]


def test_two_batches_in_one_folder_keep_a_page_each(tmp_path):
    first, _ = scores_fixture(tmp_path / "batch", n_ok=2)
    second = first.with_name("line-B.csv")
    second.write_text(first.read_text().replace("membrane_1", "membrane_0"))
    page_a = report.write_batch_report(first, details=2)
    page_b = report.write_batch_report(second, details=2)
    assert (page_a.name, page_b.name) == ("scores.html", "line-B.html")
    assert (tmp_path / "batch" / "scores_files").is_dir()
    assert (tmp_path / "batch" / "line-B_files").is_dir()
    assert "line-B_files/" not in page_a.read_text() and "scores_files/" not in page_b.read_text()
    # An existing page is refused, as the CSV is, unless told to replace it.
    before = page_a.read_bytes()
    with pytest.raises(TopoclassError, match="--overwrite"):
        report.write_batch_report(first)
    assert page_a.read_bytes() == before
    # Replacing it with fewer detail views leaves no detail folder the page does not link.
    report.write_batch_report(first, details=1, overwrite=True)
    linked = {h.split("/")[1] for h in _links(page_a) if h.startswith("scores_files/")}
    assert {f.name for f in (tmp_path / "batch" / "scores_files").iterdir()} == linked
    assert len(linked) == 1


def _links(path: Path) -> list[str]:
    page = _Page()
    page.feed(path.read_text(encoding="utf-8"))
    return page.links


def test_batch_report_refuses_a_missing_or_foreign_csv(tmp_path):
    with pytest.raises(TopoclassError, match="no such scores file"):
        report.write_batch_report(tmp_path / "missing.csv")
    other = tmp_path / "labels.csv"
    other.write_text("a,b\n1,2\n")
    with pytest.raises(TopoclassError, match="image/status"):
        report.write_batch_report(other)


def test_cli_report_rebuilds_the_page(tmp_path):
    scores, _ = scores_fixture(tmp_path / "batch", n_ok=1)
    out = tmp_path / "again.html"
    run = subprocess.run([sys.executable, "-m", "topoclass", "report", str(scores), "--out",
                          str(out), "--details", "0"], capture_output=True, text=True,
                         cwd=Path(__file__).resolve().parents[1], timeout=120)
    assert run.returncode == 0, run.stderr
    assert out.is_file() and str(out) in run.stdout
    bad = subprocess.run([sys.executable, "-m", "topoclass", "report",
                          str(tmp_path / "none.csv")], capture_output=True, text=True,
                         cwd=Path(__file__).resolve().parents[1], timeout=120)
    assert bad.returncode == 2
    assert bad.stderr.strip().count("\n") == 0 and "none.csv" in bad.stderr
