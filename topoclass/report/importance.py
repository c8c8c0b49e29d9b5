"""Permutation importance of a trained model's features, column by column or by family,
on the model as it ships and with permutations that cross sample groups."""

from __future__ import annotations

import copy
import re

import numpy as np

from topoclass.errors import TopoclassError


def feature_importance(model, X, y, *, groups=None, n_repeats: int = 10, seed: int = 0,
                       grouped: bool = False) -> dict:
    """Permutation importance of the model's feature columns (log-loss), readable names.

    The raw inputs are per-image records, so whole feature columns only exist after the
    feature step. Each calibrated member of the ensemble has its own fitted feature step;
    column ``j`` is permuted the same way in every member's transformed matrix and the rest of
    each member's pipeline (imputation, scaling, classifier, calibrator) scores the result,
    averaged over the members as the model itself averages them. A
    :class:`~topoclass.model.TrainedModel` is scored as it ships: its probabilities are then
    bounded by the size of the labelled set (:func:`~topoclass.model.limit_by_evidence`), so
    no permutation can cost more log-loss than that bound allows. (The model's fade toward the
    prior with unfamiliarity is left out on purpose: it answers how far an image is from the
    training set, not which features carry the class.)

    Without ``groups`` the permutations, repeats and scoring are those of
    :func:`sklearn.inspection.permutation_importance` (Breiman 2001), which is called on a
    matrix of row indices that picks the permuted values. With ``groups``, every image takes
    the values of an image of *another* sample group (:func:`_cross_group_permutation`):
    images of one sample are near-copies, so a plain permutation that leaves a value within
    its sample changes little and would understate what the model relies on; the same
    reasoning keeps a sample on one side of every cross-validation split.

    Parameters
    ----------
    model : TrainedModel or fitted scikit-learn classifier
        A :class:`~topoclass.model.TrainedModel`, a fitted ``CalibratedClassifierCV`` over a
        pipeline whose first step is the feature step, or such a pipeline itself.
    X, y
        Training inputs (as the feature step takes them) and labels.
    groups : array-like or None
        Sample group of each image; permutations then move values across groups only.
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
    dict with ``names`` (feature names), ``importances`` (n_features, n_repeats): increase
    of the log-loss when the column is permuted (larger = more important), their
    ``importances_mean``, ``importances_std``, ``importances_min`` and ``importances_max``
    over the repeats, ``baseline_log_loss``, ``n_repeats`` and ``across_groups``.
    """
    from sklearn.inspection import permutation_importance

    if n_repeats < 1:
        raise ValueError(f"n_repeats must be at least 1, got {n_repeats}")
    # A TrainedModel wraps the fitted estimator; a CalibratedClassifierCV's own ``estimator``
    # is its unfitted template, so it is used as it stands.
    fitted = hasattr(model, "calibrated_classifiers_") or hasattr(model, "steps")
    estimator = model if fitted else model.estimator
    bound = None if fitted else int(model.settings["n_samples"])
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
    wrapper = _PermutedColumns(mats, rests, estimator.classes_, column_group, bound=bound)
    n_rows = mats[0].shape[0]
    index = np.repeat(np.arange(n_rows)[:, None], len(names), axis=1)
    y = np.asarray(y)
    baseline = -_neg_log_loss(wrapper, index, y)
    across = groups is not None and np.unique(np.asarray(groups)).shape[0] > 1
    if not across:
        result = permutation_importance(wrapper, index, y, scoring="neg_log_loss",
                                        n_repeats=n_repeats, random_state=seed)
        scores = result.importances
    else:
        groups = np.asarray(groups)
        if groups.shape[0] != n_rows:
            raise ValueError(f"groups has {groups.shape[0]} entries for {n_rows} images")
        rng = np.random.default_rng(seed)
        scores = np.empty((len(names), n_repeats))
        for r in range(n_repeats):
            source = _cross_group_permutation(groups, rng)
            for j in range(len(names)):
                permuted = index.copy()
                permuted[:, j] = source
                scores[j, r] = -_neg_log_loss(wrapper, permuted, y) - baseline
    return {"names": names, "importances": scores,
            "importances_mean": scores.mean(axis=1), "importances_std": scores.std(axis=1),
            "importances_min": scores.min(axis=1), "importances_max": scores.max(axis=1),
            "baseline_log_loss": baseline, "n_repeats": n_repeats, "across_groups": across}


def _cross_group_permutation(groups: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """A permutation of the rows in which no row takes a row of its own group, when possible.

    The rows are laid out group after group (groups in random order, rows shuffled within
    each), and every row takes the row ``shift`` places further on, cyclically. A shift of at
    least the largest group's size and at most ``n`` minus it always lands in another group.
    When one group holds more than half of the rows no such shift exists; the largest
    admissible one is used and some rows of that group stay within it.
    """
    n = groups.shape[0]
    labels, inverse = np.unique(groups, return_inverse=True)
    order = rng.permutation(labels.shape[0])
    layout = np.concatenate([rng.permutation(np.flatnonzero(inverse == g)) for g in order])
    largest = int(np.bincount(inverse).max())
    low, high = largest, n - largest
    shift = int(rng.integers(low, high + 1)) if high >= low else max(high, 1)
    source = np.empty(n, dtype=np.int64)
    source[layout] = layout[(np.arange(n) + shift) % n]
    return source


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

    def __init__(self, mats, rests, classes, column_group=None, bound=None):
        self.mats, self.rests, self.classes_ = mats, rests, np.asarray(classes)
        self.bound = bound  # size of the labelled set when probabilities are limited by it
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
        total = total / len(self.mats)
        if self.bound is not None:
            from topoclass.model.calibration import limit_by_evidence

            total = limit_by_evidence(total, self.bound)
        return total

    def predict(self, index) -> np.ndarray:
        return self.classes_[np.argmax(self.predict_proba(index), axis=1)]


def _neg_log_loss(model, X, y) -> float:
    from sklearn.metrics import get_scorer

    return float(get_scorer("neg_log_loss")(model, X, y))
