"""Metrics, reliability tables and grouped cross-validation of a pipeline."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from sklearn.base import clone
from sklearn.metrics import (
    accuracy_score,
    brier_score_loss,
    confusion_matrix,
    f1_score,
    log_loss,
    precision_recall_fscore_support,
)
from sklearn.utils import _safe_indexing

from topoclass.errors import TopoclassError
from topoclass.model.calibration import CALIBRATION_METHODS, fit_calibrated, limit_by_evidence
from topoclass.model.folds import check_lengths, fold_splits, plain_value


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
        "classes": [plain_value(c) for c in classes],
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
    check_lengths(X, y, groups)
    if calibration is not None and calibration not in CALIBRATION_METHODS[1:]:
        raise TopoclassError(f"calibration must be None or one of "
                             f"{', '.join(CALIBRATION_METHODS[1:])}, not {calibration!r}")
    classes = np.unique(y)
    splits = fold_splits(y, groups, cv, seed)
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
            model = fit_calibrated(pipeline, X_tr, y_tr, g_tr, calibration, cv, seed)
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
