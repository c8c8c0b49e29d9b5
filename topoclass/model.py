"""Build, cross-validate, calibrate, save and load a classifier of micrograph features.

Stage 6 of the pipeline. The feature transformer is an argument (any scikit-learn transformer,
for example ``topoclass.vectorize.make_features(name)``), so everything here works on whatever
``X`` that transformer accepts: a list of per-image records, or a plain numeric array.

The model that is shipped is ``features → non-finite values as missing → median imputation →
standardisation → classifier``, wrapped in :class:`~sklearn.calibration.CalibratedClassifierCV`
whose calibration folds are grouped like the validation folds. Beside it sits a novelty
detector (:class:`MahalanobisNovelty`) that says when an image lies outside the training cloud.

Saving uses skops (``model.skops``) plus a JSON card and a Markdown validation report; loading
checks the file's sha256 against the card and trusts only an explicit list of types.
"""

from __future__ import annotations

import hashlib
import importlib
import json
import os
import warnings
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _dist_version
from pathlib import Path
from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin, clone
from sklearn.calibration import CalibratedClassifierCV
from sklearn.covariance import LedoitWolf
from sklearn.ensemble import GradientBoostingClassifier, RandomForestClassifier
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    confusion_matrix,
    f1_score,
    log_loss,
    precision_recall_fscore_support,
)
from sklearn.model_selection import StratifiedGroupKFold, StratifiedKFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC
from sklearn.utils import _safe_indexing
from sklearn.utils.validation import _check_feature_names_in, check_is_fitted, validate_data

from topoclass.errors import ModelFileError, TopoclassError

# Small labelled sets (20–60 images per class) with a few hundred correlated features are the
# normal case. A random forest needs no feature scaling, is insensitive to many redundant or
# useless columns (it picks splits feature by feature) and averages 300 trees, so its
# probabilities are smooth; on the invented demo sets (24 per class, grouped 5-fold CV, all
# features) it gave macro-F1 0.95-0.99 with ECE 0.01-0.02, where logistic regression (C=1) gave
# 0.94-0.96 with ECE about 0.2 even after calibration: with 244 features and ~100 images the
# classes separate linearly and the logistic fit becomes overconfident on its mistakes.
# Numbers from benchmarks/accuracy.md (feature sets x classifiers).
DEFAULT_CLASSIFIER = "forest"

CLASSIFIERS: dict[str, str] = {
    "logistic": "multinomial logistic regression, L2 penalty, C=1 (few features, e.g. 'order')",
    "forest": "random forest, 300 trees (default: robust on small sets with many features)",
    "boosting": "gradient boosting, 150 depth-2 trees, learning rate 0.1, subsample 0.8",
    "svm": "RBF support-vector machine; probabilities come from the calibration step",
}

CALIBRATION_METHODS = ("auto", "sigmoid", "temperature", "isotonic")

# Isotonic regression is non-parametric and overfits small calibration sets (Niculescu-Mizil &
# Caruana 2005, "Predicting good probabilities with supervised learning"; the scikit-learn user
# guide gives ~1000 samples as the rough limit). For small multi-class sets, one-vs-rest sigmoid
# calibration with renormalisation flattened the probabilities in our measurement
# (benchmarks/calibration_choice.md: ECE 0.15 vs 0.05 for temperature scaling, 30 per class),
# while temperature scaling (one parameter, keeps the ranking; Guo et al. 2017) did not.
ISOTONIC_MIN_SAMPLES = 1000
ISOTONIC_MIN_PER_CLASS = 100

MODEL_FILE = "model.skops"
CARD_FILE = "card.json"
REPORT_FILE = "cv_report.md"
CARD_FORMAT = 1

# Libraries whose *classes* (and numpy ufuncs) may be rebuilt from a model file. Their functions
# are not trusted: a function stored in, e.g., a FunctionTransformer would run at scoring time.
_TRUSTED_LIBRARIES = ("sklearn", "numpy", "scipy")
_DENIED_SUBPACKAGES = ("numpy.testing", "numpy.f2py", "numpy.distutils", "scipy._lib")
_OWN_PREFIX = "topoclass."


class ModelVersionWarning(UserWarning):
    """A model file was written by another version of topoclass or scikit-learn."""


# --------------------------------------------------------------------------------------------
# Pipeline
# --------------------------------------------------------------------------------------------


class NonFiniteAsMissing(TransformerMixin, BaseEstimator):
    """Turn ``±inf`` into NaN so that the imputer after it treats them as missing values.

    Order measures can be infinite for degenerate images (for example a ratio with an empty
    denominator); a scaler would fail on them, and an imputer only recognises NaN.
    """

    def fit(self, X, y=None):
        validate_data(self, X, dtype=np.float64, ensure_all_finite=False, reset=True)
        return self

    def transform(self, X):
        check_is_fitted(self, "n_features_in_")
        X = validate_data(self, X, dtype=np.float64, ensure_all_finite=False, reset=False,
                          copy=True)
        X[~np.isfinite(X)] = np.nan
        return X

    def get_feature_names_out(self, input_features=None):
        return _check_feature_names_in(self, input_features)

    def __sklearn_tags__(self):
        tags = super().__sklearn_tags__()
        tags.input_tags.allow_nan = True
        return tags


def build_pipeline(features: Any = None, classifier: str = DEFAULT_CLASSIFIER, *,
                   seed: int = 0) -> Pipeline:
    """Make the unfitted pipeline ``features → finite → impute → scale → classifier``.

    Parameters
    ----------
    features : scikit-learn transformer or None
        Turns the raw ``X`` into a numeric matrix; None (or ``"passthrough"``) when ``X`` is
        already numeric.
    classifier : str
        A key of :data:`CLASSIFIERS`.
    seed : int
        Random state of every random step.

    Returns
    -------
    Pipeline with steps ``features, non_finite, impute, scale, classify``.

    Notes
    -----
    Columns that are non-finite for every training image are dropped by the imputer
    (``keep_empty_features=False``); single non-finite values get the training median.
    """
    if features is None:
        features = "passthrough"
    return Pipeline([
        ("features", features),
        ("non_finite", NonFiniteAsMissing()),
        ("impute", SimpleImputer(strategy="median", keep_empty_features=False)),
        ("scale", StandardScaler()),
        ("classify", _make_classifier(classifier, seed)),
    ])


# --------------------------------------------------------------------------------------------
# Metrics
# --------------------------------------------------------------------------------------------


def metrics_from_probabilities(y_true, proba, classes, *, n_bins: int = 10) -> dict:
    """Classification and calibration metrics of predicted class probabilities.

    Used for out-of-fold predictions in cross-validation and for a held-out set alike.

    Parameters
    ----------
    y_true : array-like of shape (n_samples,)
        True labels.
    proba : array-like of shape (n_samples, n_classes)
        Predicted probabilities, columns in the order of ``classes``.
    classes : array-like of shape (n_classes,)
        The class labels of the columns.
    n_bins : int
        Bins of the reliability table and the ECE.

    Returns
    -------
    dict (JSON-ready) with ``n_samples, classes, accuracy, macro_f1, log_loss, brier, ece,
    per_class`` (precision, recall, f1, support per class), ``confusion_matrix`` (rows true,
    columns predicted, in ``classes`` order) and ``reliability`` (see :func:`reliability_table`).

    Notes
    -----
    ``brier`` is scikit-learn's ``brier_score_loss`` with ``labels=classes``: for three or more
    classes the multi-class Brier score ``mean_i sum_c (y_ic - p_ic)^2`` (range 0–2); for two
    classes half of it, i.e. the usual binary Brier score of either class (range 0–1).
    ``ece`` is the top-label expected calibration error, defined in :func:`reliability_table`.
    """
    y_true, proba, classes = _check_probabilities(y_true, proba, classes)
    predicted = classes[np.argmax(proba, axis=1)]
    # log_loss and brier_score_loss read the columns in sorted label order.
    order = np.argsort(classes, kind="stable")
    sorted_classes, sorted_proba = classes[order], proba[:, order]
    precision, recall, f1, support = precision_recall_fscore_support(
        y_true, predicted, labels=classes, zero_division=0
    )
    reliability = reliability_table(y_true, proba, classes, n_bins=n_bins)
    return {
        "n_samples": int(y_true.shape[0]),
        "classes": [_plain(c) for c in classes],
        "accuracy": float(accuracy_score(y_true, predicted)),
        "macro_f1": float(f1_score(y_true, predicted, labels=classes, average="macro",
                                   zero_division=0)),
        "log_loss": float(log_loss(y_true, sorted_proba, labels=sorted_classes)),
        "brier": float(brier_score_loss(y_true, sorted_proba, labels=sorted_classes)),
        "ece": reliability["ece"],
        "per_class": {
            str(c): {"precision": float(p), "recall": float(r), "f1": float(f),
                     "support": int(s)}
            for c, p, r, f, s in zip(classes, precision, recall, f1, support, strict=True)
        },
        "confusion_matrix": confusion_matrix(y_true, predicted, labels=classes).tolist(),
        "reliability": reliability,
    }


def reliability_table(y_true, proba, classes, n_bins: int = 10) -> dict:
    """Reliability (calibration) tables of predicted probabilities, with counts.

    Bins are ``n_bins`` equal-width intervals of [0, 1], closed on the right
    (``[0, 0.1], (0.1, 0.2], …``), the binning of ``sklearn.calibration.calibration_curve``
    with ``strategy="uniform"``.

    Returns
    -------
    dict with
    ``top_label``: one row per bin ``{lower, upper, count, confidence, accuracy}``, where the
        confidence of a sample is its largest probability and accuracy is the fraction of the
        bin's samples whose top class is right (None for empty bins);
    ``per_class``: for each class, one-vs-rest rows ``{lower, upper, count, mean_predicted,
        observed}`` — the non-empty rows equal ``calibration_curve(y_true == c, proba[:, c])``;
    ``ece``: the top-label expected calibration error
        ``ECE = sum_b (n_b / N) * |accuracy_b - confidence_b|`` over the non-empty bins
        (Naeini, Cooper & Hauskrecht 2015, AAAI; Guo, Pleiss, Sun & Weinberger 2017, ICML).
    """
    y_true, proba, classes = _check_probabilities(y_true, proba, classes)
    n = y_true.shape[0]
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    confidence = proba.max(axis=1)
    correct = (classes[np.argmax(proba, axis=1)] == y_true).astype(float)
    count, conf_mean, acc_mean = _bin_means(confidence, correct, edges)
    filled = count > 0
    ece = float(np.sum(count[filled] / n * np.abs(acc_mean[filled] - conf_mean[filled])))
    top = [
        {"lower": float(edges[b]), "upper": float(edges[b + 1]), "count": int(count[b]),
         "confidence": _or_none(conf_mean[b]), "accuracy": _or_none(acc_mean[b])}
        for b in range(n_bins)
    ]
    per_class = {}
    for k, c in enumerate(classes):
        cnt, pred_mean, obs_mean = _bin_means(proba[:, k], (y_true == c).astype(float), edges)
        per_class[str(c)] = [
            {"lower": float(edges[b]), "upper": float(edges[b + 1]), "count": int(cnt[b]),
             "mean_predicted": _or_none(pred_mean[b]), "observed": _or_none(obs_mean[b])}
            for b in range(n_bins)
        ]
    return {"n_bins": int(n_bins), "ece": ece, "top_label": top, "per_class": per_class}


# --------------------------------------------------------------------------------------------
# Cross-validation
# --------------------------------------------------------------------------------------------


@dataclass
class CVReport:
    """Out-of-fold predictions of a cross-validation and their metrics.

    Attributes
    ----------
    classes : ndarray
        Class labels, the column order of ``oof_proba``.
    y_true : ndarray of shape (n_samples,)
        True labels.
    oof_proba : ndarray of shape (n_samples, n_classes)
        Each sample's probabilities from the model that did not see it (or its group).
    fold : ndarray of int, shape (n_samples,)
        The fold in which each sample was held out.
    splitter : str
        ``"StratifiedGroupKFold"`` when groups were given, else ``"StratifiedKFold"``.
    n_splits, seed : int
        Number of folds and their random seed.
    calibration : str or None
        Calibration method fitted inside each fold (None: the bare pipeline was validated).
    metrics : dict
        :func:`metrics_from_probabilities` of the out-of-fold probabilities.
    """

    classes: np.ndarray
    y_true: np.ndarray
    oof_proba: np.ndarray
    fold: np.ndarray
    splitter: str
    n_splits: int
    seed: int
    calibration: str | None
    metrics: dict = field(default_factory=dict)

    @property
    def accuracy(self) -> float:
        return self.metrics["accuracy"]

    @property
    def macro_f1(self) -> float:
        return self.metrics["macro_f1"]

    @property
    def log_loss(self) -> float:
        return self.metrics["log_loss"]

    @property
    def brier(self) -> float:
        return self.metrics["brier"]

    @property
    def ece(self) -> float:
        return self.metrics["ece"]

    @property
    def per_class(self) -> dict:
        return self.metrics["per_class"]

    @property
    def confusion_matrix(self) -> np.ndarray:
        return np.asarray(self.metrics["confusion_matrix"])

    @property
    def reliability(self) -> dict:
        return self.metrics["reliability"]

    def summary(self) -> dict:
        """JSON-ready settings and metrics (no per-sample arrays)."""
        return {"splitter": self.splitter, "n_splits": self.n_splits, "seed": self.seed,
                "calibration": self.calibration, **self.metrics}

    def to_markdown(self, title: str = "Cross-validation report") -> str:
        """The report as Markdown: metrics, per-class table, confusion matrix, reliability."""
        how = (f"{self.n_splits}-fold {self.splitter} (seed {self.seed}); calibration inside "
               f"each fold: {self.calibration or 'none'}")
        return metrics_markdown(self.metrics, title=title, subtitle=how)


def limit_by_evidence(proba, n_train: int) -> np.ndarray:
    """Mix class probabilities with one uniform pseudo-image: ``(n p + 1/K) / (n + 1)``.

    A classifier trained on ``n`` images can separate them perfectly, and calibration on such
    folds then drives probabilities to exactly 0 and 1 (a temperature fitted to zero errors
    tends to zero). No finite labelled set supports certainty: with ``n`` images and no error,
    Laplace's rule of succession still leaves an error rate of about ``1 / (n + 2)``. Adding one
    uniform pseudo-observation keeps every probability in
    ``[1 / (K (n + 1)), 1 - (K - 1) / (K (n + 1))]``, keeps the ranking and the sum of 1, and
    fades as the labelled set grows.
    """
    proba = np.asarray(proba, dtype=np.float64)
    n = float(n_train)
    return (n * proba + 1.0 / proba.shape[1]) / (n + 1.0)


def cross_validate_model(pipeline, X, y, groups=None, *, cv: int = 5, seed: int = 0,
                         calibration: str | None = None) -> CVReport:
    """Out-of-fold class probabilities and metrics of a pipeline.

    Parameters
    ----------
    pipeline : scikit-learn classifier
        Typically :func:`build_pipeline`; cloned for each fold, never fitted in place.
    X : array-like or list
        Whatever the pipeline's feature step accepts.
    y : array-like of shape (n_samples,)
        Class labels.
    groups : array-like of shape (n_samples,) or None
        Sample (specimen) of each image. When given, folds come from ``StratifiedGroupKFold``
        so that the images of one sample are never on both sides of a split; near-duplicate
        images of one sample would otherwise make the scores optimistic.
    cv : int
        Number of folds; every class needs at least ``cv`` images (or groups).
    seed : int
        Seed of the fold shuffling.
    calibration : {None, "sigmoid", "temperature", "isotonic"}
        When given, each fold fits the calibrated model exactly as :func:`train_model` ships
        it (inner calibration folds grouped the same way), so the report describes that model.

    Returns
    -------
    CVReport

    Raises
    ------
    TopoclassError
        When a class has fewer images (or groups) than folds, or there is only one class.
    """
    y = np.asarray(y)
    groups = None if groups is None else np.asarray(groups)
    _check_lengths(X, y, groups)
    if calibration is not None and calibration not in CALIBRATION_METHODS[1:]:
        raise TopoclassError(f"calibration must be None or one of "
                             f"{', '.join(CALIBRATION_METHODS[1:])}, not {calibration!r}")
    classes = np.unique(y)
    splits = _fold_splits(y, groups, cv, seed)
    fold = np.full(y.shape[0], -1, dtype=int)
    oof = np.zeros((y.shape[0], classes.shape[0]), dtype=np.float64)
    for k, (train, test) in enumerate(splits):
        X_tr, y_tr = _safe_indexing(X, train), y[train]
        g_tr = None if groups is None else groups[train]
        if calibration is None:
            model = clone(pipeline).fit(X_tr, y_tr)
            if not hasattr(model, "predict_proba"):
                raise TopoclassError("this classifier gives no probabilities by itself; "
                                     "cross-validate it with calibration='sigmoid'")
        else:
            model = _fit_calibrated(pipeline, X_tr, y_tr, g_tr, calibration, cv, seed)
        proba = model.predict_proba(_safe_indexing(X, test))
        if calibration is not None:  # the shipped path: exactly what TrainedModel returns
            proba = limit_by_evidence(proba, len(train))
        # A class absent from a training part gets probability 0 in that fold.
        oof[np.ix_(test, np.searchsorted(classes, model.classes_))] = proba
        fold[test] = k
    metrics = metrics_from_probabilities(y, oof, classes)
    return CVReport(classes=classes, y_true=y, oof_proba=oof, fold=fold,
                    splitter="StratifiedGroupKFold" if groups is not None else "StratifiedKFold",
                    n_splits=int(cv), seed=int(seed), calibration=calibration, metrics=metrics)


def choose_calibration(y, requested: str = "auto") -> tuple[str, str]:
    """Pick the calibration method and say why.

    ``auto`` picks isotonic regression when there are at least :data:`ISOTONIC_MIN_SAMPLES`
    samples and :data:`ISOTONIC_MIN_PER_CLASS` in every class (it needs that much data not to
    overfit); otherwise sigmoid (Platt) scaling for two classes and temperature scaling (one
    shared parameter, a multi-class softmax) for three or more, where one-vs-rest sigmoids
    with renormalisation make small-set probabilities underconfident.

    Returns
    -------
    (method, reason)
    """
    if requested not in CALIBRATION_METHODS:
        raise TopoclassError(f"unknown calibration {requested!r}; choose one of "
                             f"{', '.join(CALIBRATION_METHODS)}")
    y = np.asarray(y)
    n = int(y.shape[0])
    _, counts = np.unique(y, return_counts=True)
    smallest = int(counts.min()) if n else 0
    if requested != "auto":
        return requested, f"{requested}: requested ({n} samples, smallest class {smallest})"
    if n >= ISOTONIC_MIN_SAMPLES and smallest >= ISOTONIC_MIN_PER_CLASS:
        return "isotonic", (
            f"isotonic (auto): {n} samples, smallest class {smallest}; enough for the "
            f"non-parametric calibration"
        )
    why = (f"{n} samples, smallest class {smallest}: too few for isotonic regression (needs "
           f"{ISOTONIC_MIN_SAMPLES} samples and {ISOTONIC_MIN_PER_CLASS} per class)")
    if counts.shape[0] <= 2:
        return "sigmoid", f"sigmoid (auto): {why}; two classes, so Platt scaling"
    return "temperature", (f"temperature (auto): {why}; {counts.shape[0]} classes, so one "
                           f"shared temperature instead of one-vs-rest sigmoids")


# --------------------------------------------------------------------------------------------
# Novelty
# --------------------------------------------------------------------------------------------


class MahalanobisNovelty:
    """Flags images whose features lie outside the training cloud.

    The distance is the Mahalanobis distance in the standardised feature space of the model's
    own preprocessing (features, imputation, scaling), with a Ledoit–Wolf shrunk covariance
    (well-conditioned even with fewer images than features; Ledoit & Wolf 2004).

    Threshold rule: each training image's distance is measured out-of-fold (preprocessing and
    covariance fitted without its fold, using the cross-validation folds), and the threshold is
    ``margin`` times the ``quantile`` of those distances. In-sample distances would be too
    small — an image always looks familiar to a covariance fitted on it. With the defaults,
    about 1 % (or fewer, because of the margin) of new images from the training population
    are flagged (the design rate).

    ``score(X) = distance / threshold``; a score above 1 means unfamiliar.
    """

    def __init__(self, preprocess, *, quantile: float = 0.99, margin: float = 1.1):
        self.preprocess = preprocess
        self.quantile = quantile
        self.margin = margin

    def fit(self, X, y=None, *, folds: np.ndarray | None = None) -> MahalanobisNovelty:
        """Fit on all training images; ``folds`` (one fold id per image) sets the threshold."""
        n = len(X) if not hasattr(X, "shape") else X.shape[0]
        if folds is None:
            folds = np.arange(n) % 5
        folds = np.asarray(folds)
        oof = np.empty(n, dtype=np.float64)
        for k in np.unique(folds):
            test = np.flatnonzero(folds == k)
            train = np.flatnonzero(folds != k)
            pre = clone(self.preprocess).fit(_safe_indexing(X, train),
                                             None if y is None else np.asarray(y)[train])
            cov = LedoitWolf().fit(pre.transform(_safe_indexing(X, train)))
            oof[test] = np.sqrt(cov.mahalanobis(pre.transform(_safe_indexing(X, test))))
        self.preprocess_ = clone(self.preprocess).fit(X, y)
        self.covariance_ = LedoitWolf().fit(self.preprocess_.transform(X))
        self.oof_distances_ = oof
        self.threshold_ = max(float(np.quantile(oof, self.quantile)) * self.margin, 1e-12)
        self.design_rate_ = 1.0 - self.quantile
        return self

    def distance(self, X) -> np.ndarray:
        """Mahalanobis distance of each image to the training mean, in the scaled space."""
        return np.sqrt(self.covariance_.mahalanobis(self.preprocess_.transform(X)))

    def score(self, X) -> np.ndarray:
        """Distance over threshold; above 1 means beyond the threshold (unfamiliar)."""
        return self.distance(X) / self.threshold_

    def is_unfamiliar(self, X) -> np.ndarray:
        return self.score(X) > 1.0


class RangeNovelty:
    """Flags images whose acquisition measures lie outside the range seen in training.

    A Mahalanobis distance over hundreds of features hardly moves when one feature is far off,
    yet a single measure such as the site spacing in pixels (the magnification) or the site
    density (how much of the frame holds a lattice at all) is enough to say the model has never
    seen such an image. ``context`` is a transformer giving a few positive, named columns
    (e.g. :class:`topoclass.vectorize.AcquisitionContext`); ``fit`` records each column's
    training minimum and maximum, and an image is unfamiliar when a value lies beyond that range
    by more than the relative ``tolerance``.

    ``score(X)``: the largest ratio ``max(lo / v, v / hi)`` over the columns, divided by
    ``1 + tolerance``; above 1 means unfamiliar.
    """

    def __init__(self, context, *, tolerance: float = 0.25):
        self.context = context
        self.tolerance = tolerance

    def fit(self, X, y=None) -> RangeNovelty:
        self.context_ = clone(self.context).fit(X, y)
        values = np.asarray(self.context_.transform(X), dtype=np.float64)
        self.names_ = [str(n) for n in self.context_.get_feature_names_out()]
        self.low_ = np.nanmin(values, axis=0)
        self.high_ = np.nanmax(values, axis=0)
        return self

    def ratios(self, X) -> np.ndarray:
        """Per image and column, how far beyond the training range (1 = at or inside it)."""
        v = np.asarray(self.context_.transform(X), dtype=np.float64)
        with np.errstate(divide="ignore", invalid="ignore"):
            r = np.fmax(np.where(v > 0, self.low_ / v, np.inf), v / self.high_)
        return np.where(np.isfinite(v), np.maximum(r, 1.0), np.inf)

    def score(self, X) -> np.ndarray:
        return self.ratios(X).max(axis=1) / (1.0 + self.tolerance)

    def reasons(self, X) -> list[list[str]]:
        """Per image, the measures outside the training range, in words."""
        v = np.asarray(self.context_.transform(X), dtype=np.float64)
        out = []
        for row, ratio in zip(v, self.ratios(X), strict=True):
            out.append([f"{name} {x:.3g} outside the training range {lo:.3g}-{hi:.3g}"
                        for name, x, r, lo, hi in zip(self.names_, row, ratio, self.low_,
                                                      self.high_, strict=True)
                        if r > 1.0 + self.tolerance])
        return out


# --------------------------------------------------------------------------------------------
# Training and selection
# --------------------------------------------------------------------------------------------


@dataclass
class TrainedModel:
    """A calibrated classifier, its novelty detector and the record of how it was made.

    Attributes
    ----------
    estimator : CalibratedClassifierCV
        The fitted calibrated pipeline.
    classes : ndarray
        Class labels, the column order of :meth:`predict_proba`.
    novelty : MahalanobisNovelty
        The fitted novelty detector.
    cv_report : CVReport
        Cross-validation of the same procedure.
    feature_set_name, classifier : str
        What the features and the classifier are called.
    calibration, calibration_reason : str
        Calibration method and why it was chosen.
    class_counts : dict
        Training images per class (string keys).
    settings : dict
        Everything needed to repeat the training (cv, seed, n_samples, n_groups, …).
    """

    estimator: Any
    classes: np.ndarray
    novelty: MahalanobisNovelty
    cv_report: CVReport
    feature_set_name: str
    classifier: str
    calibration: str
    calibration_reason: str
    class_counts: dict
    settings: dict
    range_check: RangeNovelty | None = None

    def predict_proba(self, X) -> np.ndarray:
        """Calibrated probability of each class, columns in the order of ``classes``.

        Limited by the size of the training set (:func:`limit_by_evidence`), as in the
        cross-validation that measured them.
        """
        return limit_by_evidence(self.estimator.predict_proba(X), self.settings["n_samples"])

    def predict(self, X) -> np.ndarray:
        """The most probable class of each image."""
        return self.classes[np.argmax(self.predict_proba(X), axis=1)]

    def unfamiliarity(self, X) -> np.ndarray:
        """Novelty score per image; above 1 means farther from the training set than allowed.

        The larger of the Mahalanobis score over the model's features and, when the model has
        one, the range check of the acquisition measures (:class:`RangeNovelty`).
        """
        score = self.novelty.score(X)
        if self.range_check is not None:
            score = np.maximum(score, self.range_check.score(X))
        return score

    def unfamiliar_reasons(self, X) -> list[list[str]]:
        """Per image, why it is unfamiliar, in words (empty for familiar images)."""
        return self.assess(X)[2]

    def assess(self, X) -> tuple[np.ndarray, np.ndarray, list[list[str]]]:
        """Probabilities, unfamiliarity and its reasons in one pass over the features.

        The same as :meth:`predict_proba`, :meth:`unfamiliarity` and
        :meth:`unfamiliar_reasons`, computing each novelty check once (scoring calls this).
        """
        proba = self.predict_proba(X)
        mahalanobis = self.novelty.score(X)
        score = mahalanobis
        ranges: list[list[str]] = [[] for _ in range(len(mahalanobis))]
        if self.range_check is not None:
            score = np.maximum(score, self.range_check.score(X))
            ranges = self.range_check.reasons(X)
        reasons = []
        for m, r in zip(mahalanobis, ranges, strict=True):
            words = list(r)
            if m > 1.0:
                words.append(f"features far from every training image ({m:.3g} times the "
                             "allowed distance)")
            reasons.append(words)
        return proba, score, reasons

    def is_unfamiliar(self, X) -> np.ndarray:
        return self.unfamiliarity(X) > 1.0


def train_model(X, y, groups=None, *, features, feature_set_name: str,
                classifier: str = DEFAULT_CLASSIFIER, cv: int = 5, calibration: str = "auto",
                seed: int = 0, progress=None, context=None) -> TrainedModel:
    """Cross-validate, then fit the calibrated model and its novelty detector on all data.

    Parameters
    ----------
    X : array-like or list
        Training inputs, whatever ``features`` accepts.
    y : array-like of shape (n_samples,)
        Class labels.
    groups : array-like or None
        Sample of each image; keeps a sample's images on one side of every split, in the
        validation and in the calibration folds alike.
    features : scikit-learn transformer or None
        Feature step (for example ``make_features("all")``); None when ``X`` is numeric.
    feature_set_name : str
        Name recorded in the card.
    classifier : str
        A key of :data:`CLASSIFIERS`.
    cv : int
        Folds of the validation and of the calibration.
    calibration : {"auto", "sigmoid", "temperature", "isotonic"}
        See :func:`choose_calibration`.
    seed : int
        Seed of the folds and of every random step.
    progress : None, bool or callable
        True shows a rich progress bar; a callable is called as ``progress(step, done, total)``.
    context : scikit-learn transformer or None
        Acquisition measures for the range check of :class:`RangeNovelty` (for example
        :class:`topoclass.vectorize.AcquisitionContext`); None for none.

    Returns
    -------
    TrainedModel
    """
    pipeline = build_pipeline(features, classifier, seed=seed)
    method, reason = choose_calibration(y, calibration)
    with _Progress(progress, total=2 * cv + 1) as bar:
        bar.step("cross-validating")
        report = cross_validate_model(pipeline, X, y, groups, cv=cv, seed=seed,
                                      calibration=method)
        bar.advance(cv)
        return _fit_final(pipeline, X, y, groups, report, feature_set_name=feature_set_name,
                          classifier=classifier, method=method, reason=reason,
                          calibration_requested=calibration, cv=cv, seed=seed, bar=bar,
                          context=context)


def select_model(X, y, groups=None, *, candidates: Sequence[tuple[str, Any, str]],
                 cv: int = 5, seed: int = 0, calibration: str = "auto",
                 progress=None, context=None) -> tuple[TrainedModel, list[dict]]:
    """Compare (feature set, transformer, classifier) candidates and train the best.

    Every candidate is cross-validated on the same folds exactly as :func:`train_model` would
    (calibration inside the folds); the best has the highest macro-F1, ties broken by the lower
    log-loss. Only the winner is then fitted on all data.

    Note that the winner's cross-validated score is slightly optimistic, since it was chosen
    on those same folds; validate it on a held-out set before relying on the number.

    Returns
    -------
    (best TrainedModel, comparison table: one dict per candidate, in the given order, with
    ``feature_set, classifier, macro_f1, accuracy, log_loss, brier, ece, rank, selected``)
    """
    if not candidates:
        raise TopoclassError("select_model needs at least one candidate")
    method, reason = choose_calibration(y, calibration)
    rows, reports = [], []
    with _Progress(progress, total=len(candidates) * cv + cv + 1) as bar:
        for name, features, clf in candidates:
            bar.step(f"cross-validating {name} + {clf}")
            pipeline = build_pipeline(features, clf, seed=seed)
            report = cross_validate_model(pipeline, X, y, groups, cv=cv, seed=seed,
                                          calibration=method)
            bar.advance(cv)
            reports.append((pipeline, report))
            rows.append({"feature_set": name, "classifier": clf, "macro_f1": report.macro_f1,
                         "accuracy": report.accuracy, "log_loss": report.log_loss,
                         "brier": report.brier, "ece": report.ece})
        order = sorted(range(len(rows)),
                       key=lambda i: (-round(rows[i]["macro_f1"], 12), rows[i]["log_loss"]))
        for rank, i in enumerate(order, start=1):
            rows[i]["rank"] = rank
            rows[i]["selected"] = rank == 1
        best = order[0]
        pipeline, report = reports[best]
        model = _fit_final(pipeline, X, y, groups, report,
                           feature_set_name=rows[best]["feature_set"],
                           classifier=rows[best]["classifier"], method=method, reason=reason,
                           calibration_requested=calibration, cv=cv, seed=seed, bar=bar,
                           context=context)
    model.settings["selected_from"] = [dict(r) for r in rows]
    return model, rows


def validate_model(model: TrainedModel, X, y) -> dict:
    """Metrics of a trained model on a labelled held-out set.

    Returns :func:`metrics_from_probabilities` plus ``unfamiliar_fraction``.

    Raises
    ------
    TopoclassError
        When the held-out labels include classes the model does not know.
    """
    y = np.asarray(y)
    unknown = sorted(set(y.tolist()) - set(model.classes.tolist()))
    if unknown:
        raise TopoclassError(f"labels {unknown} are not classes of this model "
                             f"({', '.join(map(str, model.classes))}); relabel or retrain")
    metrics = metrics_from_probabilities(y, model.predict_proba(X), model.classes)
    metrics["unfamiliar_fraction"] = float(np.mean(model.is_unfamiliar(X)))
    return metrics


# --------------------------------------------------------------------------------------------
# Saving and loading
# --------------------------------------------------------------------------------------------


def save_model(model: TrainedModel, directory: str | Path, *,
               extra_card: dict | None = None) -> Path:
    """Write ``model.skops``, ``card.json`` and ``cv_report.md`` into ``directory``.

    Parameters
    ----------
    model : TrainedModel
    directory : path
        Created if missing; existing files of these names are replaced.
    extra_card : dict or None
        More JSON-ready entries for the card, e.g. ``{"label_sheet": "labels.csv",
        "label_sheet_sha256": "…"}``; they may not replace the card's own keys.

    Returns
    -------
    Path of the model folder.
    """
    import skops.io as sio

    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    path = directory / MODEL_FILE
    tmp = directory / (MODEL_FILE + ".tmp")
    sio.dump(model, tmp)
    os.replace(tmp, path)  # never leave a half-written model under the real name
    card = {
        "format": CARD_FORMAT,
        "created_utc": datetime.now(UTC).isoformat(timespec="seconds"),
        "classes": [_plain(c) for c in model.classes],
        "class_counts": dict(model.class_counts),
        "feature_set": model.feature_set_name,
        "classifier": model.classifier,
        "classifier_description": CLASSIFIERS.get(model.classifier, ""),
        "calibration": {"method": model.calibration, "reason": model.calibration_reason},
        "novelty": {"method": "Mahalanobis distance, Ledoit-Wolf covariance, scaled features",
                    "quantile": model.novelty.quantile, "margin": model.novelty.margin,
                    "threshold": model.novelty.threshold_,
                    "design_rate": model.novelty.design_rate_,
                    "ranges": None if model.range_check is None else {
                        name: [float(lo), float(hi)] for name, lo, hi in zip(
                            model.range_check.names_, model.range_check.low_,
                            model.range_check.high_, strict=True)},
                    "range_tolerance": None if model.range_check is None
                    else model.range_check.tolerance},
        "settings": _jsonable(model.settings),
        "cv": _jsonable(model.cv_report.summary()),
        "versions": package_versions(),
        "model_file": MODEL_FILE,
        "sha256": _sha256(path),
    }
    if extra_card:
        clash = sorted(set(extra_card) & set(card))
        if clash:
            raise ValueError(f"extra_card may not replace card entries {clash}")
        card.update(_jsonable(extra_card))
    (directory / CARD_FILE).write_text(json.dumps(card, indent=2) + "\n",
                                       encoding="utf-8")
    title = f"Cross-validation of {model.feature_set_name} + {model.classifier}"
    (directory / REPORT_FILE).write_text(model.cv_report.to_markdown(title), encoding="utf-8")
    return directory


def load_model(directory: str | Path) -> TrainedModel:
    """Load a model folder written by :func:`save_model`, refusing anything unexpected.

    Checks, in order: the folder and ``card.json`` exist; the card's ``sha256`` matches
    ``model.skops``; the file is a skops archive whose types are all on the allow-list (our own
    ``topoclass.*`` types, and classes or ufuncs of scikit-learn, numpy and scipy — no other
    callables). Nothing from the file is run before these checks pass; pickle is never used.

    Warns with :class:`ModelVersionWarning` when the card records another topoclass or
    scikit-learn version than the one running.

    Raises
    ------
    ModelFileError
        Naming the file and what to do.
    """
    import skops.io as sio

    directory = Path(directory)
    card_path = directory / CARD_FILE
    if not directory.is_dir():
        raise ModelFileError(f"model folder {directory} does not exist; train one with "
                             f"`topoclass train` or give the right folder")
    if not card_path.is_file():
        raise ModelFileError(f"{card_path} is missing; this is not a topoclass model folder "
                             f"(retrain with `topoclass train`)")
    try:
        card = json.loads(card_path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        raise ModelFileError(f"{card_path} is not valid JSON ({exc}); restore the folder or "
                             f"retrain with `topoclass train`") from None
    if not isinstance(card, dict):
        raise ModelFileError(f"{card_path} is not a model card; retrain with `topoclass train`")
    if card.get("format", 0) > CARD_FORMAT:
        raise ModelFileError(f"{card_path} has card format {card.get('format')}, newer than "
                             f"this topoclass reads ({CARD_FORMAT}); upgrade topoclass")
    name = card.get("model_file")
    if name != MODEL_FILE:
        raise ModelFileError(f"{card_path} names model file {name!r}, expected {MODEL_FILE!r}; "
                             f"retrain with `topoclass train`")
    path = directory / MODEL_FILE
    if not path.is_file():
        raise ModelFileError(f"{path} is missing; restore the model folder or retrain")
    if _sha256(path) != card.get("sha256"):
        raise ModelFileError(f"{path} does not match the sha256 in {card_path}: the file was "
                             f"changed or replaced; restore the original folder or retrain "
                             f"with `topoclass train`")
    _warn_versions(card, card_path)
    try:
        untrusted = sio.get_untrusted_types(file=path)
    except Exception as exc:  # a pickle or other non-zip file lands here
        raise ModelFileError(f"{path} is not a valid skops model file ({type(exc).__name__}: "
                             f"{exc}); nothing was loaded; retrain with `topoclass train`"
                             ) from None
    refused = [t for t in untrusted if not _is_allowed_type(t)]
    if refused:
        raise ModelFileError(f"{path} contains types topoclass does not trust: "
                             f"{', '.join(refused)}; nothing was loaded; retrain with "
                             f"`topoclass train` from trusted code")
    try:
        model = sio.load(path, trusted=list(untrusted))
    except Exception as exc:
        raise ModelFileError(f"{path} cannot be loaded faithfully by this installation "
                             f"({type(exc).__name__}: {exc}); retrain with `topoclass train`"
                             ) from None
    if not isinstance(model, TrainedModel):
        raise ModelFileError(f"{path} holds a {type(model).__name__}, not a topoclass model; "
                             f"retrain with `topoclass train`")
    return model


def package_versions() -> dict:
    """Versions of topoclass and the libraries a model depends on (None if not installed)."""
    import topoclass

    out: dict[str, str | None] = {"topoclass": topoclass.__version__}
    for dist in ("numpy", "scipy", "scikit-learn", "skops", "ripser", "persim"):
        try:
            out[dist] = _dist_version(dist)
        except PackageNotFoundError:
            out[dist] = None
    return out


def metrics_markdown(metrics: dict, *, title: str, subtitle: str = "") -> str:
    """Markdown of :func:`metrics_from_probabilities` output (for CV or a held-out set)."""
    classes = [str(c) for c in metrics["classes"]]
    lines = [f"# {title}", ""]
    if subtitle:
        lines += [subtitle, ""]
    lines += ["## Metrics", "", "| metric | value |", "| --- | --- |",
              f"| images | {metrics['n_samples']} |"]
    for key, label in (("accuracy", "accuracy"), ("macro_f1", "macro-F1"),
                       ("log_loss", "log-loss"), ("brier", "Brier score"),
                       ("ece", "expected calibration error (top label, 10 bins)")):
        lines.append(f"| {label} | {metrics[key]:.4f} |")
    if "unfamiliar_fraction" in metrics:
        lines.append(f"| unfamiliar images | {metrics['unfamiliar_fraction']:.1%} |")
    lines += ["", "## Per class", "", "| class | precision | recall | F1 | images |",
              "| --- | --- | --- | --- | --- |"]
    for c in classes:
        row = metrics["per_class"][c]
        lines.append(f"| {c} | {row['precision']:.3f} | {row['recall']:.3f} | "
                     f"{row['f1']:.3f} | {row['support']} |")
    lines += ["", "## Confusion matrix", "", "Rows: true class; columns: predicted class.", "",
              "| true \\ predicted | " + " | ".join(classes) + " |",
              "| --- | " + " | ".join("---" for _ in classes) + " |"]
    for c, row in zip(classes, metrics["confusion_matrix"], strict=True):
        lines.append(f"| {c} | " + " | ".join(str(v) for v in row) + " |")
    lines += ["", "## Reliability (top-label confidence)", "",
              "| confidence bin | images | mean confidence | accuracy |",
              "| --- | --- | --- | --- |"]
    for row in metrics["reliability"]["top_label"]:
        if row["count"]:
            lines.append(f"| {row['lower']:.1f}–{row['upper']:.1f} | {row['count']} | "
                         f"{row['confidence']:.3f} | {row['accuracy']:.3f} |")
    return "\n".join(lines) + "\n"


# --------------------------------------------------------------------------------------------
# Private helpers
# --------------------------------------------------------------------------------------------


def _make_classifier(name: str, seed: int):
    if name == "logistic":
        # lbfgs fits the multinomial model for multi-class y (scikit-learn >= 1.5 default).
        return LogisticRegression(C=1.0, max_iter=2000, random_state=seed)
    if name == "forest":
        return RandomForestClassifier(n_estimators=300, random_state=seed)
    if name == "boosting":
        # Exact (not histogram) boosting: on tens of images the histogram variant spends its
        # time on thread start-up, and shallow trees suit small sets.
        return GradientBoostingClassifier(n_estimators=150, max_depth=2, learning_rate=0.1,
                                          subsample=0.8, random_state=seed)
    if name == "svm":
        # No probability=True (deprecated): the calibration step maps decision values.
        return SVC(kernel="rbf", C=1.0, gamma="scale", random_state=seed)
    raise TopoclassError(f"unknown classifier {name!r}; choose one of "
                         f"{', '.join(CLASSIFIERS)}")


def _fold_splits(y, groups, cv, seed) -> list[tuple[np.ndarray, np.ndarray]]:
    """Stratified (group) folds, after checking that every class can fill every fold."""
    if int(cv) != cv or cv < 2:
        raise TopoclassError(f"cv must be an integer of at least 2, not {cv!r}")
    cv = int(cv)
    classes = np.unique(y)
    if classes.shape[0] < 2:
        raise TopoclassError(f"training needs at least two classes; the labels hold only "
                             f"{[_plain(c) for c in classes]}")
    unit = "images" if groups is None else "sample groups"
    for c in classes:
        members = y == c
        n = int(members.sum()) if groups is None else np.unique(groups[members]).shape[0]
        if n < cv:
            raise TopoclassError(
                f"class {_plain(c)!r} has only {n} {unit}, fewer than the {cv} "
                f"cross-validation folds; label more {unit} of this class or use fewer "
                f"folds (cv={max(n, 2)})"
            )
    if groups is None:
        splitter = StratifiedKFold(n_splits=cv, shuffle=True, random_state=seed)
        return list(splitter.split(np.zeros(y.shape[0]), y))
    splitter = StratifiedGroupKFold(n_splits=cv, shuffle=True, random_state=seed)
    return list(splitter.split(np.zeros(y.shape[0]), y, groups))


def _fit_calibrated(pipeline, X, y, groups, method, cv, seed) -> CalibratedClassifierCV:
    """CalibratedClassifierCV over ``pipeline`` whose folds keep groups together."""
    y = np.asarray(y)
    counts = [
        int((y == c).sum()) if groups is None else np.unique(groups[y == c]).shape[0]
        for c in np.unique(y)
    ]
    n_splits = min(int(cv), min(counts))
    if n_splits < 2:
        unit = "images" if groups is None else "sample groups"
        raise TopoclassError(f"a class has fewer than 2 {unit} in a training part, too few to "
                             f"calibrate; label more {unit} per class or use fewer folds")
    splits = _fold_splits(y, groups, n_splits, seed)
    # ensemble=False: the calibrator learns from out-of-fold predictions on the grouped folds,
    # then one pipeline fitted on all images is shipped. An ensemble of one pipeline per fold
    # would run the feature step and the classifier once per fold for every image scored,
    # five times the cost on a production line, for calibration that is no better on small
    # sets.
    model = CalibratedClassifierCV(clone(pipeline), method=method, cv=splits, ensemble=False)
    return model.fit(X, y)


def _fit_final(pipeline, X, y, groups, report, *, feature_set_name, classifier, method, reason,
               calibration_requested, cv, seed, bar, context=None) -> TrainedModel:
    y = np.asarray(y)
    groups_arr = None if groups is None else np.asarray(groups)
    bar.step("fitting the novelty detector")
    preprocess = Pipeline(clone(pipeline).steps[:-1])
    novelty = MahalanobisNovelty(preprocess).fit(X, y, folds=report.fold)
    range_check = None if context is None else RangeNovelty(context).fit(X, y)
    bar.advance(cv)
    bar.step("fitting the calibrated model")
    estimator = _fit_calibrated(pipeline, X, y, groups_arr, method, cv, seed)
    bar.advance(1)
    classes, counts = np.unique(y, return_counts=True)
    settings = {
        "feature_set": feature_set_name,
        "classifier": classifier,
        "calibration_requested": calibration_requested,
        "calibration": method,
        "cv": int(cv),
        "seed": int(seed),
        "n_samples": int(y.shape[0]),
        "n_groups": None if groups_arr is None else int(np.unique(groups_arr).shape[0]),
        "grouped": groups_arr is not None,
        "pipeline_steps": [name for name, _ in pipeline.steps],
    }
    return TrainedModel(
        estimator=estimator, classes=estimator.classes_, novelty=novelty, cv_report=report,
        feature_set_name=feature_set_name, classifier=classifier, calibration=method,
        calibration_reason=reason,
        class_counts={str(c): int(n) for c, n in zip(classes, counts, strict=True)},
        settings=settings, range_check=range_check,
    )


def _check_probabilities(y_true, proba, classes):
    y_true = np.asarray(y_true)
    proba = np.asarray(proba, dtype=np.float64)
    classes = np.asarray(classes)
    if proba.ndim != 2 or proba.shape != (y_true.shape[0], classes.shape[0]):
        raise ValueError(f"proba must have shape (n_samples, n_classes) = "
                         f"({y_true.shape[0]}, {classes.shape[0]}), not {proba.shape}")
    unknown = set(np.unique(y_true).tolist()) - set(classes.tolist())
    if unknown:
        raise TopoclassError(f"labels {sorted(unknown)} are not among the classes "
                             f"{classes.tolist()}")
    return y_true, proba, classes


def _bin_means(values, targets, edges):
    """Count, mean value and mean target per bin (closed on the right, like calibration_curve)."""
    n_bins = edges.shape[0] - 1
    ids = np.searchsorted(edges[1:-1], values)
    count = np.bincount(ids, minlength=n_bins)
    with np.errstate(invalid="ignore", divide="ignore"):
        mean_value = np.bincount(ids, weights=values, minlength=n_bins) / count
        mean_target = np.bincount(ids, weights=targets, minlength=n_bins) / count
    return count, mean_value, mean_target


def _or_none(value) -> float | None:
    """A bin mean, or None for an empty bin (JSON has no NaN)."""
    return None if not np.isfinite(value) else float(value)


def _check_lengths(X, y, groups) -> None:
    n = X.shape[0] if hasattr(X, "shape") else len(X)
    if n != y.shape[0] or (groups is not None and groups.shape[0] != n):
        raise TopoclassError(f"{n} inputs but {y.shape[0]} labels"
                             + ("" if groups is None else f" and {groups.shape[0]} groups")
                             + "; give one label (and group) per image")


def _is_allowed_type(name: str) -> bool:
    """Our own types, and classes or ufuncs (not other callables) of the trusted libraries."""
    if name.startswith(_OWN_PREFIX):
        return True
    if name.split(".")[0] not in _TRUSTED_LIBRARIES:
        return False
    if any(name == d or name.startswith(d + ".") for d in _DENIED_SUBPACKAGES):
        return False
    obj = _resolve(name)
    return isinstance(obj, type) or isinstance(obj, np.ufunc)


def _resolve(name: str):
    """The object a dotted name refers to, importing only modules of the trusted libraries."""
    parts = name.split(".")
    for cut in range(len(parts) - 1, 0, -1):
        try:
            obj = importlib.import_module(".".join(parts[:cut]))
        except ImportError:
            continue
        try:
            for attr in parts[cut:]:
                obj = getattr(obj, attr)
        except AttributeError:
            return None
        return obj
    return None


def _warn_versions(card: dict, card_path: Path) -> None:
    import sklearn

    import topoclass

    saved = card.get("versions") or {}
    for dist, running in (("scikit-learn", sklearn.__version__),
                          ("topoclass", topoclass.__version__)):
        written = saved.get(dist)
        if written != running:
            warnings.warn(
                f"{card_path}: model written with {dist} {written}, running {dist} {running}; "
                f"predictions may differ — re-validate with `topoclass validate` or retrain",
                ModelVersionWarning, stacklevel=3,
            )


def _sha256(path: Path) -> str:
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def _plain(value):
    return value.item() if isinstance(value, np.generic) else value


def _jsonable(obj):
    """Plain JSON types (numpy scalars and arrays converted; dict keys as strings)."""
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


class _Progress:
    """None/False: silent; True: a rich bar on stderr; callable: ``f(step, done, total)``."""

    def __init__(self, progress: bool | Callable | None, total: int):
        self.progress, self.total, self.done, self.text = progress, total, 0, ""
        self._bar = self._task = None

    def __enter__(self) -> _Progress:
        if self.progress is True:
            from rich.console import Console
            from rich.progress import Progress

            self._bar = Progress(console=Console(stderr=True), transient=True)
            self._bar.start()
            self._task = self._bar.add_task("training", total=self.total)
        return self

    def __exit__(self, *exc) -> None:
        if self._bar is not None:
            self._bar.stop()

    def step(self, text: str) -> None:
        self.text = text
        self._report()

    def advance(self, n: int) -> None:
        self.done = min(self.done + n, self.total)
        self._report()

    def _report(self) -> None:
        if self._bar is not None:
            self._bar.update(self._task, completed=self.done, description=self.text)
        elif callable(self.progress):
            self.progress(self.text, self.done, self.total)
