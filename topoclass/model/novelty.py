"""Novelty checks: is a scored image like the training images at all?"""

from __future__ import annotations

import numpy as np
from sklearn.base import clone
from sklearn.covariance import LedoitWolf
from sklearn.utils import _safe_indexing


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
        widen = 1.0 + self.tolerance
        out = []
        for row, ratio in zip(v, self.ratios(X), strict=True):
            # Say the range actually applied: the training range widened by the tolerance.
            out.append([f"{name} {x:.3g} outside the accepted range {lo / widen:.3g}-"
                        f"{hi * widen:.3g} (training range {lo:.3g}-{hi:.3g} widened by "
                        f"{self.tolerance:.0%})"
                        for name, x, r, lo, hi in zip(self.names_, row, ratio, self.low_,
                                                      self.high_, strict=True)
                        if r > widen])
        return out


class NeighbourDensityNovelty:
    """Flags images whose order measures sit where no training image is: a local-outlier check.

    The Mahalanobis distance treats the training cloud as one ellipsoid; the training classes
    sit in separate clumps of the order measures, with empty space between them that the
    ellipsoid counts as familiar. A square lattice (psi4 high, psi6 low), a shaken lattice or
    an odd mixture of measures lands in such space. The local outlier factor (Breunig, Kriegel,
    Ng & Sander 2000, "LOF: identifying density-based local outliers"; scikit-learn's
    :class:`~sklearn.neighbors.LocalOutlierFactor` with ``novelty=True``) compares the density
    of an image's neighbourhood with that of its nearest training images: about 1 inside the
    cloud, larger outside it.

    ``measures`` is a transformer giving a few named columns (for example the order measures
    with psi4, :func:`topoclass.vectorize.symmetry_measures`); they are standardised first.
    The threshold follows the rule of :class:`MahalanobisNovelty`: ``margin`` times the
    ``quantile`` of the out-of-fold factors of the training images.

    ``score(X) = factor / threshold``; above 1 means unfamiliar.
    """

    def __init__(self, measures, *, n_neighbors: int = 10, quantile: float = 0.99,
                 margin: float = 1.1):
        self.measures = measures
        self.n_neighbors = n_neighbors
        self.quantile = quantile
        self.margin = margin

    def _fit_one(self, X, y):
        from sklearn.neighbors import LocalOutlierFactor
        from sklearn.pipeline import make_pipeline
        from sklearn.preprocessing import StandardScaler

        n = len(X) if not hasattr(X, "shape") else X.shape[0]
        k = max(1, min(int(self.n_neighbors), n - 1))
        return make_pipeline(clone(self.measures), StandardScaler(),
                             LocalOutlierFactor(n_neighbors=k, novelty=True)).fit(X, y)

    def fit(self, X, y=None, *, folds: np.ndarray | None = None) -> NeighbourDensityNovelty:
        """Fit on all training images; ``folds`` (one fold id per image) sets the threshold."""
        n = len(X) if not hasattr(X, "shape") else X.shape[0]
        folds = np.arange(n) % 5 if folds is None else np.asarray(folds)
        y_arr = None if y is None else np.asarray(y)
        oof = np.empty(n, dtype=np.float64)
        for k in np.unique(folds):
            test, train = np.flatnonzero(folds == k), np.flatnonzero(folds != k)
            part = self._fit_one(_safe_indexing(X, train),
                                 None if y_arr is None else y_arr[train])
            oof[test] = -part.score_samples(_safe_indexing(X, test))
        self.model_ = self._fit_one(X, y)
        self.names_ = [str(c) for c in self.model_[0].get_feature_names_out()]
        values = np.asarray(self.model_[0].transform(X), dtype=np.float64)
        self.low_, self.high_ = np.nanmin(values, axis=0), np.nanmax(values, axis=0)
        self.oof_factors_ = oof
        self.threshold_ = max(float(np.quantile(oof, self.quantile)) * self.margin, 1e-12)
        return self

    def factor(self, X) -> np.ndarray:
        """Local outlier factor of each image among the training images."""
        return -self.model_.score_samples(X)

    def score(self, X) -> np.ndarray:
        return self.factor(X) / self.threshold_

    def reasons(self, X) -> list[list[str]]:
        """Per unfamiliar image: the factor, and the measures beyond the training range."""
        score = self.score(X)
        values = np.asarray(self.model_[0].transform(X), dtype=np.float64)
        out = []
        for s, row in zip(score, values, strict=True):
            if s <= 1.0:
                out.append([])
                continue
            beyond = [f"{name} {v:.3g} (training {lo:.3g}-{hi:.3g})"
                      for name, v, lo, hi in zip(self.names_, row, self.low_, self.high_,
                                                 strict=True) if not lo <= v <= hi]
            words = f"order measures where no training image is ({s:.3g} times the allowed " \
                    "local outlier factor"
            words += f"; {', '.join(beyond)})" if beyond else ")"
            out.append([words])
        return out
