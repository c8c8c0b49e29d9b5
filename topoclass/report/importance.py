"""Permutation importance of a trained model's features, column by column or by family."""

from __future__ import annotations

import copy
import re

import numpy as np

from topoclass.errors import TopoclassError


def feature_importance(model, X, y, *, n_repeats: int = 3, seed: int = 0,
                       grouped: bool = False) -> dict:
    """Permutation importance of the model's feature columns (log-loss), readable names.

    The raw inputs are per-image records, so whole feature columns only exist after the
    feature step. Each calibrated member of the ensemble has its own fitted feature step;
    column ``j`` is permuted the same way in every member's transformed matrix and the rest of
    each member's pipeline (imputation, scaling, classifier, calibrator) scores the result,
    averaged over the members as the model itself averages them. The permutations, repeats
    and scoring are those of :func:`sklearn.inspection.permutation_importance` (Breiman 2001),
    which is called on a matrix of row indices that picks the permuted values.

    Parameters
    ----------
    model : TrainedModel or fitted scikit-learn classifier
        A :class:`~topoclass.model.TrainedModel` (its ``estimator``), a fitted
        ``CalibratedClassifierCV`` over a pipeline whose first step is the feature step, or
        such a pipeline itself.
    X, y
        Training inputs (as the feature step takes them) and labels.
    n_repeats, seed
        Permutations per column and their seed.
    grouped : bool
        Permute whole feature families together (:func:`feature_family`: every pixel of the H1
        persistence image, every point of one landscape or Betti curve) instead of single
        columns. Neighbouring pixels of a persistence image are strongly correlated, and the
        permutation importance of one column of a correlated block is close to zero even when
        the block matters (the scikit-learn user guide warns of this); a family is also what
        a person can act on. It is also far cheaper: tens of families instead of hundreds of
        columns.

    Returns
    -------
    dict with ``names`` (feature names), ``importances_mean``, ``importances_std`` and
    ``importances`` (n_features, n_repeats): drop of the negative log-loss when the column is
    permuted (larger = more important), ``baseline_log_loss``.
    """
    from sklearn.inspection import permutation_importance

    # A TrainedModel wraps the fitted estimator; a CalibratedClassifierCV's own ``estimator``
    # is its unfitted template, so it is used as it stands.
    fitted = hasattr(model, "calibrated_classifiers_") or hasattr(model, "steps")
    estimator = model if fitted else model.estimator
    members = getattr(estimator, "calibrated_classifiers_", None)
    if members is None:
        pipes, rests = [estimator], [estimator[1:]]
    else:
        pipes = [m.estimator for m in members]
        rests = []
        for m in members:
            rest = copy.copy(m)
            rest.estimator = m.estimator[1:]
            rests.append(rest)
    mats = [_feature_matrix(p, X) for p in pipes]
    names = _feature_names(pipes[0], mats[0].shape[1])
    if any(m.shape != mats[0].shape for m in mats):
        raise TopoclassError("the calibrated members give feature matrices of different "
                             "shapes; permutation importance needs one set of columns")
    column_group = np.arange(mats[0].shape[1])
    if grouped:
        families = [feature_family(n) for n in names]
        unique = list(dict.fromkeys(families))
        column_group = np.array([unique.index(f) for f in families])
        names = unique
    wrapper = _PermutedColumns(mats, rests, estimator.classes_, column_group)
    index = np.repeat(np.arange(mats[0].shape[0])[:, None], len(names), axis=1)
    result = permutation_importance(wrapper, index, np.asarray(y), scoring="neg_log_loss",
                                    n_repeats=n_repeats, random_state=seed)
    baseline = -_neg_log_loss(wrapper, index, np.asarray(y))
    return {"names": names, "importances_mean": result.importances_mean,
            "importances_std": result.importances_std, "importances": result.importances,
            "baseline_log_loss": baseline}


def feature_family(name: str) -> str:
    """The family of a feature name: the name without its grid coordinates.

    ``h1_pimage_b0.95_p0.30`` → ``h1_pimage``; ``h1_landscape_k2_t0.85`` → ``h1_landscape_k2``;
    ``betti1_t1.20`` → ``betti1``; a barcode statistic or order measure is its own family.
    """
    parts = name.split("_")
    while len(parts) > 1 and re.fullmatch(r"[btp]-?\d+(\.\d+)?", parts[-1]):
        parts.pop()
    return "_".join(parts)


def _feature_matrix(pipe, X) -> np.ndarray:
    step = pipe.steps[0][1]
    if step is None or (isinstance(step, str) and step == "passthrough"):
        return np.asarray(X, dtype=np.float64)
    return np.asarray(step.transform(X), dtype=np.float64)


def _feature_names(pipe, n: int) -> list[str]:
    step = pipe.steps[0][1]
    try:
        names = step.get_feature_names_out()
    except (AttributeError, TypeError, ValueError):
        names = None
    if names is None or len(names) != n:
        return [f"x{k}" for k in range(n)]
    return [str(v) for v in names]


class _PermutedColumns:
    """A fitted classifier over a matrix of row indices: column ``j`` of the input picks the
    rows of column ``j`` of every member's transformed feature matrix."""

    _estimator_type = "classifier"

    def __init__(self, mats, rests, classes, column_group=None):
        self.mats, self.rests, self.classes_ = mats, rests, np.asarray(classes)
        # Input column g permutes every feature column c with column_group[c] == g.
        width = mats[0].shape[1]
        self.column_group = np.arange(width) if column_group is None else column_group

    def __sklearn_tags__(self):
        from sklearn.utils import ClassifierTags, Tags, TargetTags

        return Tags(estimator_type="classifier", target_tags=TargetTags(required=True),
                    classifier_tags=ClassifierTags())

    def fit(self, X, y=None):  # pragma: no cover - never refitted; present for the API
        return self

    def get_params(self, deep=True):  # scikit-learn's scorers may ask
        return {}

    def predict_proba(self, index) -> np.ndarray:
        index = np.asarray(index).astype(np.int64)[:, self.column_group]
        cols = np.arange(index.shape[1])[None, :]
        total = None
        for mat, rest in zip(self.mats, self.rests, strict=True):
            proba = rest.predict_proba(mat[index, cols])
            total = proba if total is None else total + proba
        return total / len(self.mats)

    def predict(self, index) -> np.ndarray:
        return self.classes_[np.argmax(self.predict_proba(index), axis=1)]


def _neg_log_loss(model, X, y) -> float:
    from sklearn.metrics import get_scorer

    return float(get_scorer("neg_log_loss")(model, X, y))
