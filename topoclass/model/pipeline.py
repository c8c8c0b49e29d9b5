"""The unfitted pipeline: features → non-finite as missing → impute → scale → classifier."""

from __future__ import annotations

from typing import Any

import numpy as np
from sklearn.base import BaseEstimator, TransformerMixin
from sklearn.ensemble import GradientBoostingClassifier, RandomForestClassifier
from sklearn.impute import SimpleImputer
from sklearn.linear_model import LogisticRegression
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.svm import SVC
from sklearn.utils.validation import _check_feature_names_in, check_is_fitted, validate_data

from topoclass.errors import TopoclassError
from topoclass.model.choices import CLASSIFIERS, DEFAULT_CLASSIFIER


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
