"""Tests of topoclass.model on plain numeric data (independent of the feature modules)."""

from __future__ import annotations

import copy
import hashlib
import json
import pickle
import warnings

import numpy as np
import pytest
import sklearn
from sklearn.calibration import CalibratedClassifierCV, calibration_curve
from sklearn.compose import ColumnTransformer
from sklearn.datasets import make_classification
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    confusion_matrix,
    f1_score,
    log_loss,
    precision_score,
    recall_score,
)
from sklearn.preprocessing import FunctionTransformer

from topoclass.errors import ModelFileError, TopoclassError
from topoclass.model import (
    CLASSIFIERS,
    ModelVersionWarning,
    build_pipeline,
    choose_calibration,
    cross_validate_model,
    load_model,
    metrics_from_probabilities,
    reliability_table,
    save_model,
    select_model,
    train_model,
    validate_model,
)

CLASS_NAMES = np.array(["disordered", "ordered", "vacancies"])  # invented labels for the tests


def _numeric_set(n=400, seed=0):
    """Three well-separated classes; informative columns first, then two pure-noise columns."""
    X, y = make_classification(n_samples=n, n_features=7, n_informative=4, n_redundant=1,
                               n_classes=3, n_clusters_per_class=1, class_sep=1.5,
                               shuffle=False, random_state=seed)
    perm = np.random.default_rng(seed).permutation(n)  # rows only; columns keep their meaning
    return X[perm], CLASS_NAMES[y[perm]]


@pytest.fixture(scope="module")
def data():
    X, y = _numeric_set()
    return X[:90], y[:90], X[90:], y[90:]


@pytest.fixture(scope="module")
def trained(data):
    X, y, _, _ = data
    return train_model(X, y, features=None, feature_set_name="numeric", cv=3, seed=0,
                       classifier="logistic")


def _random_predictions(n=200, seed=1):
    rng = np.random.default_rng(seed)
    y = CLASS_NAMES[rng.integers(0, 3, n)]
    proba = rng.dirichlet([0.7, 0.7, 0.7], size=n)
    # Make the predictions informative so that every metric is away from its trivial value.
    proba[np.arange(n), np.searchsorted(CLASS_NAMES, y)] += 0.5
    return y, proba / proba.sum(axis=1, keepdims=True)


# ----------------------------------------------------------------------------- metrics


def test_metrics_equal_scikit_learn():
    # Reference library: scikit-learn's own metric functions on the same predictions.
    y, proba = _random_predictions()
    m = metrics_from_probabilities(y, proba, CLASS_NAMES)
    pred = CLASS_NAMES[proba.argmax(axis=1)]
    assert m["accuracy"] == pytest.approx(accuracy_score(y, pred), abs=1e-12)
    assert m["macro_f1"] == pytest.approx(f1_score(y, pred, average="macro"), abs=1e-12)
    assert m["log_loss"] == pytest.approx(log_loss(y, proba, labels=CLASS_NAMES), abs=1e-12)
    assert m["brier"] == pytest.approx(brier_score_loss(y, proba, labels=CLASS_NAMES),
                                       abs=1e-12)
    # The multi-class Brier score of scikit-learn 1.9 is mean_i sum_c (y_ic - p_ic)^2
    # (its docstring's formula; range 0-2), not a one-vs-rest mean.
    onehot = (y[:, None] == CLASS_NAMES[None, :]).astype(float)
    assert m["brier"] == pytest.approx(np.mean(np.sum((onehot - proba) ** 2, axis=1)))
    assert m["confusion_matrix"] == confusion_matrix(y, pred, labels=CLASS_NAMES).tolist()
    prec = precision_score(y, pred, labels=CLASS_NAMES, average=None)
    rec = recall_score(y, pred, labels=CLASS_NAMES, average=None)
    for k, c in enumerate(CLASS_NAMES):
        assert m["per_class"][c]["precision"] == pytest.approx(prec[k], abs=1e-12)
        assert m["per_class"][c]["recall"] == pytest.approx(rec[k], abs=1e-12)
        assert m["per_class"][c]["support"] == int(np.sum(y == c))


def test_metrics_do_not_depend_on_column_order():
    # Columns given in a non-alphabetical class order must give the same numbers (scikit-learn's
    # log_loss/brier read columns in sorted label order, so we must reorder before calling them).
    y, proba = _random_predictions()
    order = [2, 0, 1]
    a = metrics_from_probabilities(y, proba, CLASS_NAMES)
    b = metrics_from_probabilities(y, proba[:, order], CLASS_NAMES[order])
    for key in ("accuracy", "macro_f1", "log_loss", "brier", "ece"):
        assert b[key] == pytest.approx(a[key], abs=1e-12)


def test_binary_brier_is_the_usual_binary_score():
    # scikit-learn: for two classes brier_score_loss halves the sum, i.e. the classic
    # mean (y - p_positive)^2 (Brier 1950).
    rng = np.random.default_rng(3)
    y = np.array(["a", "b"])[rng.integers(0, 2, 100)]
    p_b = rng.uniform(size=100)
    m = metrics_from_probabilities(y, np.column_stack([1 - p_b, p_b]), ["a", "b"])
    assert m["brier"] == pytest.approx(np.mean(((y == "b") - p_b) ** 2))
    assert m["brier"] == pytest.approx(brier_score_loss(y == "b", p_b))


def test_per_class_reliability_equals_calibration_curve():
    # Reference library: sklearn.calibration.calibration_curve (strategy="uniform", 10 bins).
    y, proba = _random_predictions()
    table = reliability_table(y, proba, CLASS_NAMES, n_bins=10)
    for k, c in enumerate(CLASS_NAMES):
        prob_true, prob_pred = calibration_curve(y == c, proba[:, k], n_bins=10)
        rows = [r for r in table["per_class"][c] if r["count"] > 0]
        np.testing.assert_allclose([r["observed"] for r in rows], prob_true, atol=1e-12)
        np.testing.assert_allclose([r["mean_predicted"] for r in rows], prob_pred, atol=1e-12)
        assert sum(r["count"] for r in table["per_class"][c]) == y.shape[0]
    assert sum(r["count"] for r in table["top_label"]) == y.shape[0]


def test_ece_hand_worked_example():
    # Top-label ECE (Guo et al. 2017; Naeini et al. 2015), 10 equal-width bins:
    #   conf 0.95 right, 0.92 wrong  -> bin (0.9, 1.0]: n=2, conf 0.935, acc 0.5, gap 0.435
    #   conf 0.65 right, 0.68 wrong  -> bin (0.6, 0.7]: n=2, conf 0.665, acc 0.5, gap 0.165
    #   conf 0.55 right              -> bin (0.5, 0.6]: n=1, conf 0.55,  acc 1.0, gap 0.45
    #   ECE = 2/5*0.435 + 2/5*0.165 + 1/5*0.45 = 0.174 + 0.066 + 0.090 = 0.330
    classes = np.array(["a", "b"])
    proba = np.array([[0.95, 0.05], [0.92, 0.08], [0.35, 0.65], [0.32, 0.68], [0.55, 0.45]])
    y = np.array(["a", "b", "b", "a", "a"])
    table = reliability_table(y, proba, classes)
    assert table["ece"] == pytest.approx(0.330, abs=1e-12)
    assert metrics_from_probabilities(y, proba, classes)["ece"] == pytest.approx(0.330)
    top = table["top_label"]
    assert [r["count"] for r in top] == [0, 0, 0, 0, 0, 1, 2, 0, 0, 2]
    assert top[9]["confidence"] == pytest.approx(0.935)
    assert top[9]["accuracy"] == pytest.approx(0.5)


# ----------------------------------------------------------------------------- CV


def test_grouped_cv_is_honest_where_plain_cv_is_optimistic():
    # Common practice (scikit-learn user guide, "cross-validation iterators for grouped data"):
    # near-duplicate images of one sample on both sides of a split leak the label. Here each
    # group is one random centre plus tiny noise and the labels are random per group, so
    # there is nothing to learn: honest accuracy is chance (1/3).
    rng = np.random.default_rng(0)
    n_groups, per_group = 36, 4
    centres = rng.normal(size=(n_groups, 5))
    group_label = CLASS_NAMES[rng.permutation(np.arange(n_groups) % 3)]
    X = np.repeat(centres, per_group, axis=0) + rng.normal(scale=0.01, size=(144, 5))
    y = np.repeat(group_label, per_group)
    groups = np.repeat(np.arange(n_groups), per_group)
    pipeline = build_pipeline(None, "forest", seed=0)
    plain = cross_validate_model(pipeline, X, y, cv=3, seed=0)
    grouped = cross_validate_model(pipeline, X, y, groups, cv=3, seed=0)
    assert plain.splitter == "StratifiedKFold"
    assert grouped.splitter == "StratifiedGroupKFold"
    assert plain.accuracy > 0.9
    # 36 groups: the sd of the accuracy around 1/3 is about sqrt(1/3*2/3/36) = 0.08.
    assert grouped.accuracy < 0.6
    for g in range(n_groups):  # every group is held out in one fold only
        assert np.unique(grouped.fold[groups == g]).shape[0] == 1
    assert set(np.unique(grouped.fold)) == {0, 1, 2}


def test_cv_report_probabilities_are_out_of_fold(data):
    X, y, _, _ = data
    report = cross_validate_model(build_pipeline(None, "logistic"), X, y, cv=3, seed=0)
    np.testing.assert_allclose(report.oof_proba.sum(axis=1), 1.0)
    # Refit by hand on fold 0's training part: its predictions are the report's.
    test = report.fold == 0
    manual = build_pipeline(None, "logistic").fit(X[~test], y[~test]).predict_proba(X[test])
    np.testing.assert_allclose(report.oof_proba[test], manual, atol=1e-12)
    # The report's scores are those of its out-of-fold probabilities (scikit-learn's metrics).
    predicted = report.classes[np.argmax(report.oof_proba, axis=1)]
    assert report.metrics["accuracy"] == pytest.approx(accuracy_score(y, predicted))
    assert report.metrics["macro_f1"] == pytest.approx(f1_score(y, predicted, average="macro"))
    assert report.metrics["log_loss"] == pytest.approx(
        log_loss(y, report.oof_proba, labels=report.classes))


def test_refuses_class_with_fewer_groups_than_folds(data):
    X, y, _, _ = data
    groups = np.arange(y.shape[0])
    groups[y == "ordered"] = 1000 + np.arange(np.sum(y == "ordered")) % 2  # two samples only
    with pytest.raises(TopoclassError, match=r"'ordered' has only 2 sample groups.*3"):
        cross_validate_model(build_pipeline(), X, y, groups, cv=3)
    few = np.concatenate([np.flatnonzero(y != "vacancies"), np.flatnonzero(y == "vacancies")[:2]])
    with pytest.raises(TopoclassError, match=r"'vacancies' has only 2 images"):
        cross_validate_model(build_pipeline(), X[few], y[few], cv=3)


def test_unknown_classifier_and_seeds():
    with pytest.raises(TopoclassError, match="unknown classifier"):
        build_pipeline(None, "nearest")
    for name in CLASSIFIERS:
        assert build_pipeline(None, name, seed=7)[-1].random_state == 7


def test_non_finite_columns_are_handled(data):
    X, y, X_test, _ = data
    X = X.copy()
    X[:, 0] = np.inf  # a column that is never finite is dropped
    X[::7, 1] = np.nan  # single missing values get the training median
    X[::11, 2] = -np.inf
    with pytest.warns(UserWarning, match="Skipping features without any observed values"):
        model = build_pipeline(None, "logistic").fit(X, y)  # scikit-learn says it drops it
    assert model.named_steps["scale"].n_features_in_ == X.shape[1] - 1
    with pytest.warns(UserWarning, match="Skipping features"):
        proba = model.predict_proba(np.where(np.arange(X.shape[1]) == 3, np.nan, X_test))
    assert np.all(np.isfinite(proba))


# ----------------------------------------------------------------------------- training


def test_same_seed_same_numbers(data, tmp_path):
    X, y, X_test, _ = data
    a = train_model(X, y, features=None, feature_set_name="numeric", cv=3, seed=4)
    b = train_model(X, y, features=None, feature_set_name="numeric", cv=3, seed=4)
    np.testing.assert_array_equal(a.predict_proba(X_test), b.predict_proba(X_test))
    np.testing.assert_array_equal(a.unfamiliarity(X_test), b.unfamiliarity(X_test))
    card_a = json.loads((save_model(a, tmp_path / "a") / "card.json").read_text())
    card_b = json.loads((save_model(b, tmp_path / "b") / "card.json").read_text())
    assert card_a["cv"] == card_b["cv"]
    other = cross_validate_model(build_pipeline(None), X, y, cv=3, seed=5)
    assert not np.array_equal(a.cv_report.fold, other.fold)  # the seed does matter


def test_auto_calibration_choice_says_why(trained):
    y_small_binary = np.repeat(["ordered", "vacancies"], 40)
    method, reason = choose_calibration(y_small_binary)
    assert method == "sigmoid"
    assert "80 samples" in reason and "isotonic" in reason
    # Three classes, 30 each: temperature scaling (see benchmarks/calibration_choice.md).
    assert trained.calibration == "temperature"
    assert "90 samples" in trained.calibration_reason
    assert trained.estimator.method == "temperature"
    assert choose_calibration(np.repeat(CLASS_NAMES, 400))[0] == "isotonic"
    assert choose_calibration(np.repeat(CLASS_NAMES, 30), "sigmoid")[0] == "sigmoid"
    with pytest.raises(TopoclassError, match="unknown calibration"):
        choose_calibration(y_small_binary, "beta")


def test_final_model_is_calibrated_with_grouped_folds(data):
    X, y, _, _ = data
    groups = np.arange(y.shape[0]) // 3
    model = train_model(X, y, groups, features=None, feature_set_name="numeric",
                        classifier="svm", cv=3, seed=0)
    assert isinstance(model.estimator, CalibratedClassifierCV)
    assert model.cv_report.splitter == "StratifiedGroupKFold"
    for train, test in model.estimator.cv:
        assert not set(groups[train]) & set(groups[test])
    assert model.settings["n_groups"] == 30
    assert model.cv_report.accuracy > 0.7  # well-separated classes


def test_novelty_flags_far_points_only(trained, data):
    X, _, X_test, _ = data
    scores_train = trained.unfamiliarity(X)
    # Design rate: 1 - quantile (1 %) of out-of-fold distances, times a margin of 1.1.
    design = trained.novelty.design_rate_
    assert design == pytest.approx(0.01)
    assert np.mean(scores_train > 1) <= design + 0.04
    assert np.mean(trained.is_unfamiliar(X_test)) <= design + 0.04  # new images, same population
    far = X_test[:10] + 20.0 * X.std(axis=0)
    assert np.all(trained.is_unfamiliar(far))
    assert np.all(trained.unfamiliarity(far) > 3)


def test_select_model_keeps_the_informative_candidate(data):
    X, y, _, _ = data
    noise_only = ColumnTransformer([("noise", "passthrough", [5, 6])])  # make_classification
    candidates = [("noise", noise_only, "logistic"), ("numeric", None, "logistic")]
    best, table = select_model(X, y, candidates=candidates, cv=3, seed=0)
    assert best.feature_set_name == "numeric"
    assert [r["selected"] for r in table] == [False, True]
    assert table[1]["macro_f1"] > table[0]["macro_f1"]
    assert table[1]["macro_f1"] == pytest.approx(best.cv_report.macro_f1)


def test_validate_model_and_progress(data):
    X, y, X_test, y_test = data
    calls = []
    model = train_model(X, y, features=None, feature_set_name="numeric", cv=3,
                        classifier="logistic",
                        progress=lambda step, done, total: calls.append((done, total)))
    assert calls[-1][0] == calls[-1][1]
    # Held-out rows plus 10 rows far outside the training data (every column 50 standard
    # deviations off): scikit-learn's own metrics are the reference for the scores, and the
    # unfamiliar fraction must count exactly the far rows.
    far = np.full((10, X_test.shape[1]), 50.0) * X.std(axis=0) + X.mean(axis=0)
    X_all = np.vstack([X_test, far])
    y_all = np.concatenate([y_test, y_test[:10]])
    metrics = validate_model(model, X_all, y_all)
    predicted = model.classes[np.argmax(model.predict_proba(X_all), axis=1)]
    assert metrics["macro_f1"] == pytest.approx(f1_score(y_all, predicted, average="macro"))
    assert metrics["accuracy"] == pytest.approx(accuracy_score(y_all, predicted))
    assert metrics["log_loss"] == pytest.approx(
        log_loss(y_all, model.predict_proba(X_all), labels=model.classes))
    assert metrics["unfamiliar_fraction"] == pytest.approx(10 / len(X_all))
    with pytest.raises(TopoclassError, match="not classes of this model"):
        validate_model(model, X_test[:3], ["ordered", "grain_boundary", "ordered"])


# ----------------------------------------------------------------------------- save / load


def test_save_load_round_trip(trained, data, tmp_path):
    _, _, X_test, _ = data
    folder = save_model(trained, tmp_path / "model", extra_card={"label_sheet_sha256": "ab12"})
    card = json.loads((folder / "card.json").read_text())
    digest = hashlib.sha256((folder / "model.skops").read_bytes()).hexdigest()
    assert card["model_file"] == "model.skops" and card["sha256"] == digest
    assert card["classes"] == CLASS_NAMES.tolist()
    assert sum(card["class_counts"].values()) == 90
    assert card["calibration"]["method"] == "temperature"
    assert card["versions"]["scikit-learn"] == sklearn.__version__
    assert card["label_sheet_sha256"] == "ab12"
    assert card["cv"]["macro_f1"] == trained.cv_report.macro_f1
    assert "## Confusion matrix" in (folder / "cv_report.md").read_text()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # same versions: no warning
        loaded = load_model(folder)
    np.testing.assert_array_equal(loaded.predict_proba(X_test), trained.predict_proba(X_test))
    np.testing.assert_array_equal(loaded.unfamiliarity(X_test), trained.unfamiliarity(X_test))
    np.testing.assert_array_equal(loaded.predict(X_test), trained.predict(X_test))


def test_tampered_model_file_is_refused(trained, tmp_path):
    folder = save_model(trained, tmp_path / "model")
    data = bytearray((folder / "model.skops").read_bytes())
    data[len(data) // 2] ^= 0xFF
    (folder / "model.skops").write_bytes(bytes(data))
    with pytest.raises(ModelFileError, match="sha256"):
        load_model(folder)


class _Payload:
    """A pickle that creates a marker file when unpickled."""

    def __init__(self, marker):
        self.marker = str(marker)

    def __reduce__(self):
        return (open, (self.marker, "w"))


def test_pickle_in_place_of_the_model_never_runs(trained, tmp_path):
    payload = pickle.dumps(_Payload(tmp_path / "probe" / "ran"))
    # The payload is live: unpickling it does create its marker (so the check below can fail).
    (tmp_path / "probe").mkdir()
    pickle.loads(payload).close()
    assert (tmp_path / "probe" / "ran").exists()

    marker = tmp_path / "marker"
    payload = pickle.dumps(_Payload(marker))
    folder = save_model(trained, tmp_path / "model")
    (folder / "model.skops").write_bytes(payload)
    card = json.loads((folder / "card.json").read_text())
    card["sha256"] = hashlib.sha256(payload).hexdigest()  # an attacker can update the card too
    (folder / "card.json").write_text(json.dumps(card))
    with pytest.raises(ModelFileError, match="not a valid skops model file"):
        load_model(folder)
    assert not marker.exists()


def test_untrusted_function_in_model_is_refused(data, tmp_path):
    # copy.copy works as a feature step, but a stored function outside the allow-list could be
    # any callable at scoring time: the loader must name it and refuse.
    X, y, _, _ = data
    model = train_model(X, y, features=FunctionTransformer(func=copy.copy),
                        feature_set_name="numeric", cv=3, classifier="logistic")
    folder = save_model(model, tmp_path / "model")
    with pytest.raises(ModelFileError, match=r"copy\.copy"):
        load_model(folder)


def test_other_version_warns_naming_both(trained, tmp_path):
    folder = save_model(trained, tmp_path / "model")
    card = json.loads((folder / "card.json").read_text())
    card["versions"]["scikit-learn"] = "1.0.2"
    (folder / "card.json").write_text(json.dumps(card))
    with pytest.warns(ModelVersionWarning, match="1.0.2") as record:
        load_model(folder)
    assert any(sklearn.__version__ in str(w.message) for w in record)


def test_missing_folder_and_card(tmp_path):
    with pytest.raises(ModelFileError, match="does not exist"):
        load_model(tmp_path / "nowhere")
    (tmp_path / "empty").mkdir()
    with pytest.raises(ModelFileError, match="card.json is missing"):
        load_model(tmp_path / "empty")


def test_range_check_flags_values_beyond_the_training_range_and_says_which():
    from sklearn.preprocessing import FunctionTransformer

    from topoclass.model import RangeNovelty

    rng = np.random.default_rng(0)
    train = np.column_stack([rng.uniform(8, 20, 50), rng.uniform(1.0, 1.2, 50)])
    context = FunctionTransformer(feature_names_out="one-to-one")
    check = RangeNovelty(context, tolerance=0.25).fit(train)
    lo, hi = train.min(axis=0), train.max(axis=0)
    inside = np.array([[lo[0] / 1.2, hi[1] * 1.2], [10.0, 1.1]])
    outside = np.array([[hi[0] * 1.3, 1.1], [10.0, lo[1] / 2]])
    assert np.all(check.score(inside) <= 1.0)
    assert np.all(check.score(outside) > 1.0)
    reasons = check.reasons(outside)
    assert "x0" in reasons[0][0] and "x1" in reasons[1][0] and check.reasons(inside) == [[], []]
    # The message shows the range actually applied (the training range widened by 25 %),
    # beside the training range itself.
    assert (f"accepted range {lo[0] / 1.25:.3g}-{hi[0] * 1.25:.3g} (training range "
            f"{lo[0]:.3g}-{hi[0]:.3g} widened by 25%)") in reasons[0][0]
    assert np.all(check.score(np.array([[0.0, 1.1], [np.nan, 1.1]])) == np.inf)


def test_probabilities_are_limited_by_the_size_of_the_training_set():
    from topoclass.model import limit_by_evidence

    # Laplace's rule of succession (common practice): n images without an error still leave
    # an error rate of about 1/(n+2); one uniform pseudo-image keeps p away from 0 and 1.
    proba = np.array([[1.0, 0.0, 0.0], [0.2, 0.5, 0.3]])
    limited = limit_by_evidence(proba, 9)
    np.testing.assert_allclose(limited.sum(axis=1), 1.0)
    np.testing.assert_allclose(limited[0], [(9 + 1 / 3) / 10, (1 / 3) / 10, (1 / 3) / 10])
    assert np.array_equal(limited.argmax(axis=1), proba.argmax(axis=1))
    # Two well-separated clouds: even a perfect classifier never claims certainty.
    rng = np.random.default_rng(0)
    X = np.vstack([rng.normal(0, 0.1, (20, 2)), rng.normal(5, 0.1, (20, 2))])
    y = np.repeat(["a", "b"], 20)
    model = train_model(X, y, features=None, feature_set_name="numeric", cv=3, seed=0)
    p = model.predict_proba(X)
    assert p.max() <= 1 - 1 / (2 * 41) + 1e-12 and p.min() >= 1 / (2 * 41) - 1e-12
    assert model.cv_report.oof_proba.max() < 1.0
