"""Which images to label next: uncertainty of a quick model times diversity.

The method, in two published parts:

* **Uncertainty** — margin sampling (Lewis & Gale, SIGIR 1994, introduced uncertainty
  sampling; the margin form is Scheffer, Decomain & Wrobel, IDA 2001): a quick model fitted on
  the labels so far gives each unlabelled image class probabilities, and its uncertainty is
  ``1 - (p_first - p_second)``, 1 when the two likeliest classes are tied.
* **Diversity** — k-centre greedy (Sener & Savarese, ICLR 2018): in the scaled feature space
  (standardised on the labelled images, each value clipped to ±5 so that no single near-constant
  feature decides), each image's distance to the nearest image labelled or already suggested.

The order is built greedily: each pick maximises ``uncertainty × min(1, distance / radius)``,
where ``radius`` is the median distance between a labelled image and its nearest labelled
neighbour (how far apart the labelled set is spread already). An image farther than that from
everything labelled counts by its uncertainty alone; a near-copy of a labelled or just-suggested
image is damped towards zero, so ten near-identical images are not suggested in a row. A small
floor on the uncertainty keeps the diversity term in charge when the model is sure of
everything.

Before every class has :data:`MIN_PER_CLASS` labels there is no model worth asking: the order
is then k-centre greedy alone, which spreads the first labels over the set.

The quick model is the project's pipeline (all features, random forest) with fewer trees; its
probabilities are estimates from the labels so far, uncalibrated, and are shown as such.
"""

from __future__ import annotations

import os
from collections import Counter
from collections.abc import Sequence
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
from sklearn.base import clone
from sklearn.metrics import f1_score

from topoclass.errors import TopoclassError
from topoclass.model.folds import fold_splits
from topoclass.model.pipeline import build_pipeline
from topoclass.vectorize import make_features

#: Labels every class needs before the quick model is asked (the issue's rule; also the
#: smallest class that two-fold grouped cross-validation can use with a spare image).
MIN_PER_CLASS = 3
_TREES = 100  # a third of the shipped forest: refitted after every label
_FLOOR = 1e-3  # uncertainty floor, so that diversity still orders a model that is sure
_BOUND = 5.0  # standardised features are clipped to ±5 for distances (see _bounded)


@dataclass(frozen=True)
class Suggestion:
    """One image to label next.

    Attributes
    ----------
    index : int
        Position in the pool given to :func:`rank_records`.
    predicted : str or None
        The quick model's class (None before there is a model). Never an answer to pre-select.
    confidence : float or None
        The quick model's probability of ``predicted`` (uncalibrated estimate).
    uncertainty : float
        Margin uncertainty in [0, 1] (1 before there is a model).
    distance : float
        Distance to the nearest labelled or earlier-suggested image, in units of the radius.
    reason : str
        One sentence saying why it is suggested.
    """

    index: int
    predicted: str | None
    confidence: float | None
    uncertainty: float
    distance: float
    reason: str


def margin_uncertainty(proba: np.ndarray) -> np.ndarray:
    """``1 - (p_first - p_second)`` per row of a probability matrix (1 with one column)."""
    proba = np.asarray(proba, dtype=np.float64)
    if proba.ndim != 2:
        raise ValueError(f"proba must be 2-D (samples, classes), got shape {proba.shape}")
    if proba.shape[1] < 2:
        return np.ones(proba.shape[0])
    top2 = -np.sort(-proba, axis=1)[:, :2]
    return 1.0 - (top2[:, 0] - top2[:, 1])


def diverse_order(pool: np.ndarray, labelled: np.ndarray, weight: np.ndarray | None = None,
                  count: int | None = None) -> tuple[np.ndarray, np.ndarray]:
    """Greedy order of ``pool`` rows by ``weight × min(1, distance / radius)`` (module notes).

    Parameters
    ----------
    pool : ndarray of shape (n, d)
        Scaled features of the unlabelled images.
    labelled : ndarray of shape (m, d)
        Scaled features of the labelled images (m may be 0).
    weight : ndarray of shape (n,), optional
        Uncertainty of each pool image; None gives plain k-centre greedy (each pick the image
        farthest from everything labelled or picked).
    count : int, optional
        How many to order (default all).

    Returns
    -------
    order : ndarray of int
        Pool indices, best first; ties go to the lower index.
    distance : ndarray of float
        Each pick's distance to the nearest labelled or earlier pick when it was chosen,
        divided by the radius (``inf`` for the first pick of an empty labelled set).
    """
    pool = np.asarray(pool, dtype=np.float64)
    labelled = np.asarray(labelled, dtype=np.float64).reshape(-1, pool.shape[1])
    n = pool.shape[0]
    count = n if count is None else max(0, min(int(count), n))
    # Without weights this is plain k-centre greedy (the farthest image first); with them the
    # distance is capped at the radius, so it only damps near-copies.
    plain = weight is None
    weight = np.ones(n) if plain else np.maximum(np.asarray(weight, dtype=np.float64), _FLOOR)
    radius = _radius(labelled, pool)
    nearest = np.full(n, np.inf)
    for start in range(0, labelled.shape[0], 512):  # blocks keep memory at n × 512
        block = _distances(pool, labelled[start:start + 512])
        nearest = np.minimum(nearest, block.min(axis=1))
    order, spread = [], []
    chosen = np.zeros(n, dtype=bool)
    for _ in range(count):
        if labelled.shape[0] == 0 and not order:
            # Nothing labelled: start from the image nearest the centre of the pool, the most
            # typical one, as k-centre greedy does from an empty set.
            pick = int(np.argmin(_distances(pool, pool.mean(axis=0, keepdims=True))[:, 0]))
        else:
            reach = nearest / radius
            score = reach if plain else weight * np.minimum(1.0, reach)
            score[chosen] = -np.inf
            pick = int(np.argmax(score))
        order.append(pick)
        spread.append(nearest[pick] / radius)
        chosen[pick] = True
        nearest = np.minimum(nearest, _distances(pool, pool[pick:pick + 1])[:, 0])
    return np.array(order, dtype=np.int64), np.array(spread, dtype=np.float64)


def quick_model(seed: int = 0):
    """The unfitted quick model: the project's pipeline with all features and fewer trees."""
    pipeline = build_pipeline(make_features("all"), "forest", seed=seed)
    return pipeline.set_params(classify__n_estimators=_TREES)


class PoolFeatures:
    """Scaled feature rows of the images of a labelling pool, kept from one ranking to the next.

    The transform (all features, non-finite values as missing, median imputation, standard
    scaling: the quick model's pipeline without its classifier) learns no labels, so it is
    fitted on every measured image, labelled or not. Rows are kept per image key and only new
    images are transformed; the transform is fitted again (and every row redone) when the
    number of images has doubled since its last fit, so that the scale follows a pool that is
    still being measured while ``n`` images cost at most about ``2 n`` transforms in all.
    """

    def __init__(self) -> None:
        self._transform = None
        self._fitted_on = 0
        self._rows: dict = {}

    def rows(self, keys: Sequence, records: Sequence) -> np.ndarray:
        """The rows of ``records`` (one per key, keys hashable and unique), bounded at ±5."""
        keys, records = list(keys), list(records)
        if len(keys) != len(records):
            raise ValueError(f"{len(keys)} keys but {len(records)} records")
        if not keys:
            return np.empty((0, 0))
        if self._transform is None or len(keys) >= 2 * self._fitted_on:
            self._transform = quick_model()[:-1].fit(records)
            self._fitted_on, self._rows = len(keys), {}
        new = [i for i, k in enumerate(keys) if k not in self._rows]
        if new:
            values = _bounded(self._transform.transform([records[i] for i in new]))
            self._rows.update(zip((keys[i] for i in new), values, strict=True))
        return np.vstack([self._rows[k] for k in keys])

    def transform(self, records: Sequence) -> np.ndarray:
        """Rows of other images (a held-out set) with the current transform; not kept."""
        if self._transform is None:
            raise ValueError("PoolFeatures.rows must be called before transform")
        return _bounded(self._transform.transform(list(records)))

    def __len__(self) -> int:
        return len(self._rows)


def model_ready(labels: Sequence[str]) -> str | None:
    """None when every class has :data:`MIN_PER_CLASS` labels, else what is missing."""
    counts = Counter(labels)
    if len(counts) < 2:
        return (f"label at least {MIN_PER_CLASS} images of each of two or more classes "
                "before the model suggests")
    short = sorted(c for c, n in counts.items() if n < MIN_PER_CLASS)
    if short:
        shown = ", ".join(f"{c} ({counts[c]})" for c in short)
        return f"each class needs {MIN_PER_CLASS} labels before the model suggests: {shown}"
    return None


def rank_records(labelled: Sequence, labels: Sequence[str], pool: Sequence, *,
                 count: int | None = None, seed: int = 0) -> list[Suggestion]:
    """Order unlabelled records by how much a label is likely to help.

    Parameters
    ----------
    labelled : sequence of PatternRecord
        Records of the labelled images.
    labels : sequence of str
        Their labels.
    pool : sequence of PatternRecord
        Records of the unlabelled images.
    count : int, optional
        How many suggestions (default: the whole pool).
    seed : int
        Seed of the quick model; same seed, same order.

    Returns
    -------
    list of Suggestion, best first.

    See Also
    --------
    rank_rows : the same on rows of a :class:`PoolFeatures` kept between rankings.
    """
    if len(labelled) != len(labels):
        raise ValueError(f"{len(labelled)} labelled records but {len(labels)} labels")
    if not len(pool):
        return []
    records = list(pool) + list(labelled)
    scaled = PoolFeatures().rows(range(len(records)), records)
    return rank_rows(scaled[len(pool):], labels, scaled[:len(pool)], count=count, seed=seed)


def rank_rows(labelled: np.ndarray, labels: Sequence[str], pool: np.ndarray, *,
              count: int | None = None, seed: int = 0) -> list[Suggestion]:
    """:func:`rank_records` on scaled feature rows (from :meth:`PoolFeatures.rows`)."""
    labelled = np.asarray(labelled, dtype=np.float64)
    pool = np.asarray(pool, dtype=np.float64)
    if labelled.shape[0] != len(labels):
        raise ValueError(f"{labelled.shape[0]} labelled rows but {len(labels)} labels")
    if not pool.shape[0]:
        return []
    labelled = labelled.reshape(-1, pool.shape[1])
    missing = model_ready(labels)
    if missing is not None:
        # No model yet: spread the first labels over the set (k-centre greedy alone).
        order, spread = diverse_order(pool, labelled, count=count)
        return [Suggestion(int(i), None, None, 1.0, float(d),
                           f"spreads the labels over the set ({missing})")
                for i, d in zip(order, spread, strict=True)]
    model = _ranking_classifier(seed).fit(labelled, np.asarray(labels))
    classes = [str(c) for c in model.classes_]
    proba = model.predict_proba(pool)
    uncertainty = margin_uncertainty(proba)
    order, spread = diverse_order(pool, labelled, uncertainty, count)
    out = []
    for i, d in zip(order, spread, strict=True):
        top = np.argsort(-proba[i], kind="stable")[:2]
        first, second = classes[top[0]], classes[top[1]]
        why = (f"the quick model hesitates between {first} ({proba[i, top[0]]:.2f}) and "
               f"{second} ({proba[i, top[1]]:.2f})" if uncertainty[i] >= 0.5 else
               f"the quick model leans to {first} ({proba[i, top[0]]:.2f})")
        where = ("unlike every labelled image" if d >= 1 else
                 f"close to a labelled image ({d:.2f} of the usual spread)")
        out.append(Suggestion(int(i), first, float(proba[i, top[0]]), float(uncertainty[i]),
                              float(d), f"{why}; {where}"))
    return out


def estimate_macro_f1(records: Sequence, labels: Sequence[str],
                      groups: Sequence[str] | None = None, *, seed: int = 0,
                      max_folds: int = 5) -> float | None:
    """Grouped cross-validated macro-F1 of the quick model on the labels so far.

    The folds are the project's (:func:`topoclass.model.fold_splits`: stratified, grouped by
    sample when groups are given), with as many folds as the smallest class allows, at most
    ``max_folds``. None when no two folds can be made yet. The feature transform learns no
    labels and is fitted on all ``records`` (as :class:`PoolFeatures` does on the page); the
    classifier is fitted inside each fold.
    """
    records = list(records)
    rows = PoolFeatures().rows(range(len(records)), records) if records else np.empty((0, 0))
    return estimate_from_rows(rows, labels, groups, seed=seed, max_folds=max_folds)


def estimate_from_rows(rows: np.ndarray, labels: Sequence[str],
                       groups: Sequence[str] | None = None, *, seed: int = 0,
                       max_folds: int = 5) -> float | None:
    """:func:`estimate_macro_f1` on scaled feature rows (from :meth:`PoolFeatures.rows`)."""
    y = np.asarray(labels)
    if model_ready(labels) is not None:
        return None
    g = None if groups is None or any(x is None or x == "" for x in groups) else np.asarray(groups)
    per_class = [len(set(g[y == c])) if g is not None else int(np.sum(y == c))
                 for c in np.unique(y)]
    k = min(max_folds, min(per_class))
    if k < 2:
        return None
    try:
        splits = fold_splits(y, g, k, seed)
    except TopoclassError:
        return None
    rows = np.asarray(rows, dtype=np.float64)
    predicted = np.empty(y.shape[0], dtype=object)
    for train, test in splits:
        fitted = _ranking_classifier(seed).fit(rows[train], y[train])
        predicted[test] = fitted.predict(rows[test])
    return float(f1_score(y, predicted.astype(str), average="macro", zero_division=0))


def suggest_from_sheet(images: Sequence[str | Path], sheet: str | Path, *, count: int = 10,
                       seed: int = 0, jobs: int = 1, cache_dir: str | Path | None = None,
                       settings=None, progress: bool = False):
    """The ``topoclass suggest`` use case: which of ``images`` to label next for ``sheet``.

    Returns
    -------
    suggestions : list of (Path, Suggestion)
    failures : list of RecordResult
        Images that could not be measured (left out; each has a one-line message).
    """
    from topoclass.features import measure_patterns
    from topoclass.labels import read_labels

    sheet = Path(sheet)
    labelled_paths, labels = [], []
    if sheet.exists():
        book = read_labels(sheet, partial=True)
        labelled_paths, labels = list(book.images), list(book.labels)
    done = {os.path.normcase(os.path.abspath(p)) for p in labelled_paths}
    pool_paths = [Path(p) for p in images if os.path.normcase(os.path.abspath(p)) not in done]
    results = measure_patterns(labelled_paths + pool_paths, settings, cache_dir=cache_dir,
                               jobs=jobs, progress=progress, description="features")
    known, pool, failures = [], [], []
    for n, r in enumerate(results):
        if not r.ok:
            failures.append(r)
        elif n < len(labelled_paths):
            known.append((r.record, labels[n]))
        else:
            pool.append(r)
    ranked = rank_records([k[0] for k in known], [k[1] for k in known],
                          [r.record for r in pool], count=count, seed=seed)
    return [(pool[s.index].path, s) for s in ranked], failures


def suggestion_json(path: Path, suggestion: Suggestion) -> dict:
    """A JSON-ready dict of one suggestion (what ``suggest --json`` prints per line)."""
    out = {"image": str(path), **asdict(suggestion)}
    out.pop("index")
    return out


def _ranking_classifier(seed: int):
    # The quick model's classifier alone, for rows that are already features.
    return clone(quick_model(seed)[-1])


def _bounded(scaled: np.ndarray) -> np.ndarray:
    # A feature nearly constant over the labelled set has a tiny scale, so an image that differs
    # in it lands thousands of units away and that one column decides every distance; bounding
    # the standardised values at ±_BOUND lets all features count.
    return np.clip(scaled, -_BOUND, _BOUND)


def _distances(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    from scipy.spatial.distance import cdist

    return cdist(a, b) if b.shape[0] else np.full((a.shape[0], 0), np.inf)


def _radius(labelled: np.ndarray, pool: np.ndarray) -> float:
    points = labelled if labelled.shape[0] >= 2 else pool
    if points.shape[0] < 2:
        return 1.0
    d = _distances(points, points)
    np.fill_diagonal(d, np.inf)
    radius = float(np.median(d.min(axis=1)))
    return radius if radius > 0 and np.isfinite(radius) else 1.0
