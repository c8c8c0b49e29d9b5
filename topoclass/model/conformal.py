"""A review band with a coverage guarantee: conformal prediction sets from out-of-fold scores.

For a chosen error rate ``alpha``, each image gets the set of classes that its probabilities
cannot rule out. The rule is split-conformal prediction (Vovk, Gammerman & Shafer 2005,
"Algorithmic learning in a random world"; Angelopoulos & Bates 2021, "A gentle introduction
to conformal prediction and distribution-free uncertainty quantification"):

1. each labelled image ``i`` gets a nonconformity score ``s_i`` from probabilities of a model
   that did not see it (the out-of-fold probabilities of the grouped cross-validation);
2. the threshold ``q`` is the ``ceil((n + 1)(1 - alpha))``-th smallest of the ``n`` scores
   (infinite when that rank exceeds ``n``: too few images to rule anything out);
3. a new image's set holds every class ``c`` whose score ``s(x, c) <= q``.

For a new image exchangeable with the labelled ones, the set then holds the true class with
probability at least ``1 - alpha`` (and at most ``1 - alpha + 1 / (n + 1)`` without ties).

Two scores are offered:

``"least-ambiguous"``
    ``s(x, c) = 1 - p_c(x)``: the smallest sets on average (Sadinle, Lei & Wasserman 2019,
    JASA, "Least ambiguous set-valued classifiers with bounded error levels").
``"adaptive"``
    the total probability of the classes at least as probable as ``c`` (the adaptive sets of
    Romano, Sesia & Candès 2020, in the non-randomised form of Angelopoulos & Bates 2021,
    section 2.1): sets grow where the model is unsure.

``per_class=True`` (the class-conditional, "Mondrian" variant; Vovk et al. 2005, ch. 4) takes
one threshold per class from that class's images, so a small class is covered as well as a
large one; it needs ``n_c >= 1 / alpha - 1`` images in every class for finite thresholds, and
``"auto"`` uses it only then.

How topoclass uses it (``verdict``): one class in the set is an answer; two or more is
``review`` (the model cannot tell those classes apart at this error rate); none is
``unfamiliar`` (no class is plausible). The guarantee holds only for images like the labelled
set; images from another process, instrument or magnification are not covered by it.

Note on the scores used: the out-of-fold models are the cross-validation's, while the shipped
model is refitted on every image. This is cross-conformal prediction (Vovk 2015; Barber,
Candès, Ramdas & Tibshirani 2021, whose bound for it is ``1 - 2 alpha`` in the worst case);
the measured coverage (``benchmarks/RESULTS_confidence.md``) is what to rely on.
"""

from __future__ import annotations

import math

import numpy as np

from topoclass.errors import TopoclassError

#: Nonconformity scores of :class:`ReviewBand`.
BAND_SCORES = ("least-ambiguous", "adaptive")

#: Default error rate of the review band.
DEFAULT_ALPHA = 0.05

#: Verdict of an image whose set holds two or more classes.
REVIEW = "review"

#: Verdict of an image whose set is empty, or that the novelty checks flag.
UNFAMILIAR = "unfamiliar"


def conformal_quantile(scores, alpha: float) -> float:
    """The split-conformal threshold: the ``ceil((n + 1)(1 - alpha))``-th smallest score.

    Returns ``inf`` when that rank exceeds ``n`` (too few scores for this ``alpha``).
    """
    alpha = check_alpha(alpha)
    scores = np.sort(np.asarray(scores, dtype=np.float64).ravel())
    n = scores.shape[0]
    # The small tolerance keeps e.g. (9 + 1) * 0.9 = 9.000000000000002 at rank 9.
    rank = math.ceil((n + 1) * (1.0 - alpha) - 1e-9)
    if rank > n:
        return math.inf
    return float(scores[max(rank, 1) - 1])


def class_scores(proba, score: str = "least-ambiguous") -> np.ndarray:
    """Nonconformity score of every class for every image, shape ``(n_images, n_classes)``."""
    proba = np.asarray(proba, dtype=np.float64)
    if proba.ndim != 2:
        raise ValueError(f"proba must be 2-D (images, classes), not shape {proba.shape}")
    if score == "least-ambiguous":
        return 1.0 - proba
    if score == "adaptive":
        # s(x, c) = sum of p_k(x) over the classes k with p_k(x) >= p_c(x).
        order = np.argsort(-proba, axis=1, kind="stable")
        cumulative = np.cumsum(np.take_along_axis(proba, order, axis=1), axis=1)
        out = np.empty_like(proba)
        np.put_along_axis(out, order, cumulative, axis=1)
        return out
    raise TopoclassError(f"unknown review-band score {score!r}; choose one of "
                         f"{', '.join(BAND_SCORES)}")


def check_alpha(alpha) -> float:
    """``alpha`` as a float in (0, 1), or a one-line error saying what to give."""
    try:
        value = float(alpha)
    except (TypeError, ValueError):
        value = math.nan
    if not 0.0 < value < 1.0:
        raise TopoclassError(f"the review band's error rate alpha must be between 0 and 1 "
                             f"(for example 0.05), not {alpha!r}")
    return value


class ReviewBand:
    """Conformal prediction sets over a classifier's probabilities.

    Parameters
    ----------
    alpha : float
        Error rate: the set misses the true class of at most this share of images like the
        labelled ones.
    score : {"least-ambiguous", "adaptive"}
        Nonconformity score, see the module notes.
    per_class : {"auto", True, False}
        One threshold per class (class-conditional) or one for all; ``"auto"`` is per class
        when every class has at least ``1 / alpha - 1`` labelled images.

    Attributes
    ----------
    classes_ : ndarray
        Column order of the probabilities.
    calibration_scores_ : ndarray of shape (n,)
        Each labelled image's score of its true class (kept so that :meth:`with_alpha` can
        move the band without refitting).
    labels_ : ndarray of shape (n,)
        The labelled images' classes.
    thresholds_ : ndarray of shape (n_classes,)
        The threshold used for each class (all equal when not per class).
    per_class_ : bool
        Whether the thresholds are class-conditional.
    """

    def __init__(self, alpha: float = DEFAULT_ALPHA, *, score: str = "least-ambiguous",
                 per_class="auto"):
        self.alpha = alpha
        self.score = score
        self.per_class = per_class

    def fit(self, proba, y, classes) -> ReviewBand:
        """Learn the thresholds from out-of-fold probabilities ``proba`` and true labels ``y``."""
        alpha = check_alpha(self.alpha)
        classes = np.asarray(classes)
        y = np.asarray(y)
        proba = np.asarray(proba, dtype=np.float64)
        if proba.shape != (y.shape[0], classes.shape[0]):
            raise ValueError(f"proba must have shape ({y.shape[0]}, {classes.shape[0]}), "
                             f"not {proba.shape}")
        if self.per_class not in ("auto", True, False):
            raise TopoclassError(f"per_class must be 'auto', True or False, not "
                                 f"{self.per_class!r}")
        column = np.searchsorted(classes, y)
        if np.any(column >= classes.shape[0]) or np.any(classes[column] != y):
            raise TopoclassError("the review band's labels include classes the model lacks")
        all_scores = class_scores(proba, self.score)
        self.classes_ = classes
        self.labels_ = y
        self.calibration_scores_ = all_scores[np.arange(y.shape[0]), column]
        self._set_thresholds(alpha)
        return self

    def with_alpha(self, alpha: float) -> ReviewBand:
        """The same band at another error rate (thresholds re-derived from the kept scores)."""
        band = ReviewBand(alpha, score=self.score, per_class=self.per_class)
        band.classes_ = self.classes_
        band.labels_ = self.labels_
        band.calibration_scores_ = self.calibration_scores_
        band._set_thresholds(check_alpha(alpha))
        return band

    def _set_thresholds(self, alpha: float) -> None:
        counts = np.array([int(np.sum(self.labels_ == c)) for c in self.classes_])
        enough = bool(np.all(counts >= math.ceil(1.0 / alpha - 1.0 - 1e-9)))
        self.per_class_ = enough if self.per_class == "auto" else bool(self.per_class)
        if self.per_class_:
            self.thresholds_ = np.array([
                conformal_quantile(self.calibration_scores_[self.labels_ == c], alpha)
                for c in self.classes_])
        else:
            self.thresholds_ = np.full(self.classes_.shape[0],
                                       conformal_quantile(self.calibration_scores_, alpha))
        self.alpha_ = alpha

    def prediction_sets(self, proba) -> np.ndarray:
        """Boolean ``(n_images, n_classes)``: True where the class cannot be ruled out."""
        scores = class_scores(proba, self.score)
        if scores.shape[1] != self.classes_.shape[0]:
            raise ValueError(f"proba has {scores.shape[1]} columns, the band "
                             f"{self.classes_.shape[0]} classes")
        # A tiny tolerance so that a score equal to the threshold (the hand-worked case, or a
        # tie after float rounding) is inside the set, as the rule says.
        return scores <= self.thresholds_[None, :] + 1e-12

    def verdicts(self, proba, unfamiliar=None) -> list[str]:
        """One class, ``review`` (two or more) or ``unfamiliar`` (none, or flagged) per image."""
        sets = self.prediction_sets(proba)
        flagged = (np.zeros(sets.shape[0], dtype=bool) if unfamiliar is None
                   else np.asarray(unfamiliar, dtype=bool))
        out = []
        for row, odd in zip(sets, flagged, strict=True):
            size = int(row.sum())
            if odd or size == 0:
                out.append(UNFAMILIAR)
            elif size == 1:
                out.append(str(self.classes_[np.argmax(row)]))
            else:
                out.append(REVIEW)
        return out

    def describe(self) -> dict:
        """JSON-ready summary for the model card."""
        return {
            "alpha": self.alpha_,
            "score": self.score,
            "per_class": self.per_class_,
            "n_calibration": int(self.calibration_scores_.shape[0]),
            "thresholds": {str(c): (None if not math.isfinite(t) else float(t))
                           for c, t in zip(self.classes_, self.thresholds_, strict=True)},
            "scores_from": "out-of-fold probabilities of the grouped cross-validation",
            "guarantee": ("the set holds the true class for at least 1 - alpha of images like "
                          "the labelled set; not for other processes, instruments or "
                          "magnifications"),
        }
