"""Probability calibration: which method, fitted on grouped folds, and the evidence limit."""

from __future__ import annotations

import numpy as np
from sklearn.base import clone
from sklearn.calibration import CalibratedClassifierCV

from topoclass.errors import TopoclassError
from topoclass.model.folds import fold_splits

CALIBRATION_METHODS = ("auto", "sigmoid", "temperature", "isotonic")


# Isotonic regression is non-parametric and overfits small calibration sets (Niculescu-Mizil &
# Caruana 2005, "Predicting good probabilities with supervised learning"; the scikit-learn user
# guide gives ~1000 samples as the rough limit). For small multi-class sets, one-vs-rest sigmoid
# calibration with renormalisation flattened the probabilities in our measurement
# (benchmarks/calibration_choice.md, written by benchmarks/bench_calibration.py), while
# temperature scaling (one parameter, keeps the ranking; Guo et al. 2017) did not.
ISOTONIC_MIN_SAMPLES = 1000


ISOTONIC_MIN_PER_CLASS = 100


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


def fit_calibrated(pipeline, X, y, groups, method, cv, seed) -> CalibratedClassifierCV:
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
                             f"calibrate; label more {unit} of every class (fewer folds "
                             "cannot help: each class needs at least 2)")
    splits = fold_splits(y, groups, n_splits, seed)
    # ensemble=False: the calibrator learns from out-of-fold predictions on the grouped folds,
    # then one pipeline fitted on all images is shipped. An ensemble of one pipeline per fold
    # would run the feature step and the classifier once per fold for every image scored,
    # five times the cost on a production line, for calibration that is no better on small
    # sets.
    model = CalibratedClassifierCV(clone(pipeline), method=method, cv=splits, ensemble=False)
    return model.fit(X, y)
