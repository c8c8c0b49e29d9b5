"""Probabilities that shrink with doubt: fade toward equal odds near the training edge.

A classifier trained and calibrated on separable images gives every image the evidence
ceiling, whether it sits in the middle of a training class or at the far edge of what was
labelled. Only the novelty checks see the difference, so the rule here lets them speak in the
probabilities too:

``p' = w(d) p + (1 - w(d)) / K``, with

* ``w = 1`` for ``d <= d0``,
* ``w = 1 - (1 - a) (d - d0) / (1 - d0)`` for ``d0 < d <= 1``,
* ``w = max(a / d^2, floor)`` beyond,

where ``d`` is the image's unfamiliarity (its largest graded novelty score, see
:meth:`topoclass.model.TrainedModel.assess`; 1 is the threshold at which it is called
unfamiliar), ``K`` the number of classes, ``d0`` the ``start`` quantile of the training
images' out-of-fold unfamiliarity and ``a`` (``at_threshold``, default 0.95) the weight left at
the threshold. An image as typical as most training images keeps its probabilities; toward the
edge of the training set they fade linearly toward equal odds, to ``a`` at the threshold;
beyond it they keep fading with the square of the distance, down to ``floor`` (0.02), so a
photograph of something else gets next to equal odds. The target is equal odds rather than the
class shares of the labelled set, because those shares are the lab's choice of what to label,
and because mixing with a constant vector keeps the ranking of the classes: the top class never
changes, only how sure the numbers are (the same uniform mixing as the evidence limit,
:func:`topoclass.model.limit_by_evidence`).

The fade is gentle on purpose: it is the review band (:mod:`topoclass.model.conformal`),
fitted on the faded out-of-fold probabilities, that turns a faded answer into ``review`` or
``unfamiliar``; the fade itself only keeps the reported confidence from claiming the ceiling
for an image at the edge of what was labelled.

The fade is a rule, not a fit: with separable training data there are no errors to fit how
fast confidence should fall, and a fit would choose "never". Its effect on images harder than
the training set is measured in ``benchmarks/RESULTS_confidence.md``, which also compares other
weights at the threshold: fading harder below the threshold caught no more wrong answers there
and cost calibration on the shifted images, hence the gentle default.
"""

from __future__ import annotations

import numpy as np


class DoubtFade:
    """Fade class probabilities toward the prior as unfamiliarity approaches its threshold.

    Parameters
    ----------
    start : float
        Quantile of the training images' out-of-fold unfamiliarity where the fade begins.
    at_threshold : float
        Weight left to the classifier's own probabilities at the threshold.
    floor : float
        Least weight left far beyond the threshold (> 0, so that the top class stays the top
        class).

    Attributes
    ----------
    n_classes_ : int
    start_ : float
        Unfamiliarity at which the fade begins (below 1).
    """

    def __init__(self, start: float = 0.9, at_threshold: float = 0.95, floor: float = 0.02):
        self.start = start
        self.at_threshold = at_threshold
        self.floor = floor

    def fit(self, classes, oof_unfamiliarity) -> DoubtFade:
        """The fade's start from the training images' out-of-fold unfamiliarity."""
        if not 0.0 <= float(self.start) <= 1.0:
            raise ValueError(f"start must be a quantile in [0, 1], not {self.start!r}")
        if not 0.0 < float(self.floor) <= float(self.at_threshold) <= 1.0:
            raise ValueError(f"need 0 < floor <= at_threshold <= 1, not {self.floor!r} and "
                             f"{self.at_threshold!r}")
        self.n_classes_ = int(np.asarray(classes).shape[0])
        d = np.asarray(oof_unfamiliarity, dtype=np.float64)
        # Never start at or beyond the threshold: the fade must reach the prior there.
        self.start_ = float(min(np.quantile(d, float(self.start)), 0.95))
        return self

    def weight(self, unfamiliarity) -> np.ndarray:
        """Weight of the classifier's own probabilities, 1 (keep) to 0 (prior only)."""
        d = np.asarray(unfamiliarity, dtype=np.float64)
        a = float(self.at_threshold)
        inside = 1.0 - (1.0 - a) * np.clip((d - self.start_) / (1.0 - self.start_), 0.0, 1.0)
        with np.errstate(divide="ignore"):
            beyond = np.maximum(a / np.maximum(d, 1.0) ** 2, float(self.floor))
        return np.where(d > 1.0, beyond, inside)

    def apply(self, proba, unfamiliarity) -> np.ndarray:
        """The faded probabilities ``w p + (1 - w) / K`` (rows still sum to 1)."""
        proba = np.asarray(proba, dtype=np.float64)
        w = self.weight(unfamiliarity)[:, None]
        return w * proba + (1.0 - w) / proba.shape[1]

    def describe(self) -> dict:
        return {"rule": "p' = w p + (1 - w) / K; w = 1 up to d0, linear to at_threshold at "
                        "d = 1 (the unfamiliarity threshold), at_threshold / d^2 beyond, never "
                        "below floor",
                "start_quantile": float(self.start), "d0": self.start_,
                "at_threshold": float(self.at_threshold), "floor": float(self.floor)}
