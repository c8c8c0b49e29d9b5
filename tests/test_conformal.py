"""The review band: split-conformal prediction sets, checked against worked examples and the
finite-sample guarantee."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.stats import binomtest
from sklearn.datasets import make_classification
from sklearn.linear_model import LogisticRegression

from topoclass.errors import TopoclassError
from topoclass.model import REVIEW, UNFAMILIAR, ReviewBand, conformal_quantile, train_model
from topoclass.model.conformal import class_scores

CLASSES = np.array(["disordered", "ordered", "vacancies"])  # invented labels for the tests


def test_quantile_hand_worked_with_the_n_plus_one_correction():
    # Split-conformal threshold: the ceil((n + 1)(1 - alpha))-th smallest score (Angelopoulos &
    # Bates 2021, "A gentle introduction to conformal prediction", section 1). Worked by hand
    # for the nine scores 0.1 ... 0.9:
    scores = np.array([0.5, 0.1, 0.9, 0.3, 0.7, 0.2, 0.8, 0.4, 0.6])
    assert conformal_quantile(scores, 0.2) == pytest.approx(0.8)  # ceil(10 * 0.8) = 8th
    assert conformal_quantile(scores, 0.1) == pytest.approx(0.9)  # ceil(10 * 0.9) = 9th
    assert conformal_quantile(scores, 0.25) == pytest.approx(0.8)  # ceil(7.5) = 8th
    assert conformal_quantile(scores, 0.3) == pytest.approx(0.7)  # ceil(7.0) = 7th
    # ceil(10 * 0.95) = 10 > 9 scores: nothing can be ruled out.
    assert conformal_quantile(scores, 0.05) == math.inf


def test_sets_hand_worked_example():
    # Calibration: nine images whose true-class probabilities are 0.9, 0.8, ..., 0.1, so their
    # least-ambiguous scores 1 - p are 0.1 ... 0.9; alpha 0.2 gives the threshold 0.8 (above),
    # so a class is in the set when p >= 0.2 (Sadinle, Lei & Wasserman 2019).
    p_true = np.linspace(0.9, 0.1, 9)
    y = np.array(["ordered"] * 9)
    proba = np.column_stack([(1 - p_true) / 2, p_true, (1 - p_true) / 2])
    band = ReviewBand(0.2, per_class=False).fit(proba, y, CLASSES)
    assert band.thresholds_ == pytest.approx([0.8, 0.8, 0.8])
    new = np.array([[0.10, 0.85, 0.05],   # only "ordered" >= 0.2
                    [0.45, 0.45, 0.10],   # two classes >= 0.2
                    [0.19, 0.62, 0.19],   # one
                    [0.20, 0.60, 0.20]])  # p = 0.2 exactly is inside: three classes
    sets = band.prediction_sets(new)
    assert sets.tolist() == [[False, True, False], [True, True, False], [False, True, False],
                             [True, True, True]]
    assert band.verdicts(new) == ["ordered", REVIEW, "ordered", REVIEW]
    # Flagged by a novelty check: unfamiliar whatever the set.
    assert band.verdicts(new, [False, False, True, False])[2] == UNFAMILIAR


def test_empty_set_is_unfamiliar():
    y = np.array(["ordered"] * 19)
    proba = np.tile([0.005, 0.99, 0.005], (19, 1))
    band = ReviewBand(0.05, per_class=False).fit(proba, y, CLASSES)  # rank ceil(19) = 19
    assert band.thresholds_[0] == pytest.approx(0.01)
    assert band.verdicts(np.array([[0.3, 0.4, 0.3]])) == [UNFAMILIAR]


def test_adaptive_scores_hand_worked():
    # Adaptive score of class c: total probability of the classes at least as probable as c
    # (Angelopoulos & Bates 2021, section 2.1, non-randomised).
    proba = np.array([[0.2, 0.5, 0.3]])
    assert class_scores(proba, "adaptive")[0] == pytest.approx([1.0, 0.5, 0.8])
    assert class_scores(proba, "least-ambiguous")[0] == pytest.approx([0.8, 0.5, 0.7])


@pytest.mark.parametrize("score", ["least-ambiguous", "adaptive"])
def test_coverage_within_its_binomial_interval(score):
    # The finite-sample guarantee of split conformal prediction (Vovk, Gammerman & Shafer
    # 2005; Angelopoulos & Bates 2021, Theorem 1 and Appendix D): for exchangeable data and
    # continuous scores, P(true class in set) lies in [1 - alpha, 1 - alpha + 1 / (n + 1)].
    # Each trial draws a fresh calibration set of n and ONE test image, so the trials are
    # independent Bernoulli draws and the count of covered trials is binomial.
    X, y = make_classification(n_samples=24000, n_features=8, n_informative=4, n_classes=3,
                               n_clusters_per_class=1, class_sep=0.6, flip_y=0.05,
                               random_state=4)
    model = LogisticRegression(max_iter=500).fit(X[:4000], y[:4000])
    proba, labels = model.predict_proba(X[4000:]), CLASSES[y[4000:]]
    rng = np.random.default_rng(7)
    n, alpha, trials = 60, 0.1, 2000
    covered = 0
    for _ in range(trials):
        pick = rng.choice(proba.shape[0], size=n + 1, replace=False)
        band = ReviewBand(alpha, score=score, per_class=False).fit(
            proba[pick[:n]], labels[pick[:n]], CLASSES)
        covered += int(band.prediction_sets(proba[pick[n:]])[0, np.searchsorted(
            CLASSES, labels[pick[n]])])
    ci = binomtest(covered, trials).proportion_ci(confidence_level=0.999)
    assert ci.high >= 1 - alpha and ci.low <= 1 - alpha + 1 / (n + 1), (covered, ci)


def test_class_conditional_band_covers_a_small_class():
    # Class-conditional ("Mondrian") conformal prediction (Vovk et al. 2005, ch. 4): one
    # threshold per class, so a rare, hard class is covered at 1 - alpha too, where a pooled
    # threshold spends the error budget on it.
    X, y = make_classification(n_samples=30000, n_features=6, n_informative=3, n_classes=3,
                               n_clusters_per_class=1, weights=[0.8, 0.15, 0.05],
                               class_sep=0.5, random_state=2)
    model = LogisticRegression(max_iter=500).fit(X[:5000], y[:5000])
    proba, labels = model.predict_proba(X[5000:]), CLASSES[y[5000:]]
    cal, test = slice(0, 12000), slice(12000, None)
    alpha = 0.1
    mondrian = ReviewBand(alpha, per_class=True).fit(proba[cal], labels[cal], CLASSES)
    pooled = ReviewBand(alpha, per_class=False).fit(proba[cal], labels[cal], CLASSES)
    rare = labels[test] == CLASSES[2]
    col = np.searchsorted(CLASSES, labels[test])
    hit_m = mondrian.prediction_sets(proba[test])[np.arange(col.size), col]
    hit_p = pooled.prediction_sets(proba[test])[np.arange(col.size), col]
    n_rare = int(rare.sum())
    ci = binomtest(int(hit_m[rare].sum()), n_rare).proportion_ci(confidence_level=0.999)
    assert ci.high >= 1 - alpha
    assert hit_m[rare].mean() > hit_p[rare].mean()


def test_auto_per_class_needs_enough_images_per_class():
    y = np.array(["ordered"] * 30 + ["vacancies"] * 30 + ["disordered"] * 10)
    proba = np.full((70, 3), 1 / 3)
    assert ReviewBand(0.05).fit(proba, y, CLASSES).per_class_ is False  # 10 < 1/0.05 - 1
    assert ReviewBand(0.2).fit(proba, y, CLASSES).per_class_ is True  # 10 >= 4
    with pytest.raises(TopoclassError, match="alpha"):
        ReviewBand(1.5).fit(proba, y, CLASSES)
    band = ReviewBand(0.2).fit(proba, y, CLASSES)
    assert band.with_alpha(0.05).per_class_ is False
    assert band.with_alpha(0.05).alpha_ == 0.05 and band.alpha_ == 0.2


def test_trained_model_has_a_band_from_its_out_of_fold_scores():
    X, y = make_classification(n_samples=150, n_features=6, n_informative=3, n_classes=3,
                               n_clusters_per_class=1, class_sep=1.0, random_state=0)
    y = CLASSES[y]
    model = train_model(X, y, features=None, feature_set_name="numeric", cv=3, seed=0,
                        classifier="logistic", alpha=0.1)
    band = model.review_band
    assert band is not None and band.alpha_ == 0.1
    # Fitted on the out-of-fold probabilities as scoring reports them: faded by each training
    # image's out-of-fold unfamiliarity.
    oof = model.cv_report.oof_proba
    oof_doubt = model.novelty.oof_distances_ / model.novelty.threshold_
    expected = ReviewBand(0.1).fit(model.doubt.apply(oof, oof_doubt), model.cv_report.y_true,
                                   model.classes)
    assert band.thresholds_ == pytest.approx(expected.thresholds_)
    proba, score, _ = model.assess(X)
    verdicts = model.verdicts(proba, score)
    assert set(verdicts) <= set(model.classes.tolist()) | {REVIEW, UNFAMILIAR}
    # A looser band (larger alpha) never sends more images to review.
    loose = model.verdicts(proba, score, alpha=0.3)
    assert loose.count(REVIEW) <= verdicts.count(REVIEW)


def test_scores_csv_has_the_verdict_and_the_summary_says_what_it_covers(
        small_model, small_dataset, feature_cache, tmp_path):
    from topoclass.images import collect_image_paths
    from topoclass.scoring import CAUTION, read_scores, score_images, summary_text

    paths = collect_image_paths([small_dataset.parent / "images"])[:6]
    summary = score_images(small_model.model, paths, tmp_path / "scores.csv",
                           cache_dir=feature_cache, alpha=0.2)
    rows = read_scores(tmp_path / "scores.csv")
    classes = {str(c) for c in small_model.model.classes}
    assert all(r["verdict"] in classes | {REVIEW, UNFAMILIAR} for r in rows)
    assert summary.alpha == 0.2
    assert sum(summary.per_class.values()) + summary.review + summary.unfamiliar == len(rows)
    text = summary_text(summary)
    assert "alpha = 0.2" in text and "only for images like the labelled training set" in text
    assert CAUTION in text
    with pytest.raises(TopoclassError, match="alpha"):
        score_images(small_model.model, paths, tmp_path / "other.csv", alpha=0)
