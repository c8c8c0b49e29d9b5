"""Probabilities that shrink with doubt: fade toward the class prior near the training edge.

A classifier trained and calibrated on separable images gives every image the evidence
ceiling, whether it sits in the middle of a training class or at the far edge of what was
labelled. Only the novelty checks see the difference, so the rule here lets them speak in the
probabilities too:

``p' = w(d) p + (1 - w(d)) / K``, with ``w(d) = clip((1 - d) / (1 - d0), w_min, 1)``

where ``d`` is the image's unfamiliarity (the largest novelty score; 1 is the threshold at
which it is called unfamiliar), ``K`` the number of classes and ``d0`` the ``start`` quantile
of the training images' out-of-fold unfamiliarity. An image as typical as most training
images keeps its probabilities; between ``d0`` and the threshold they fade linearly toward
equal odds; at the threshold and beyond only ``w_min`` (default 0.02) of them is left, so the
model says it knows next to nothing about the image. The target is equal odds rather than the
class shares of the labelled set, because those shares are the lab's choice of what to label,
and because mixing with a constant vector keeps the ranking of the classes: the top class never
changes, only how sure the numbers are (the same uniform mixing as the evidence limit,
:func:`topoclass.model.limit_by_evidence`).

The fade is a rule, not a fit: with separable training data there are no errors to fit how
fast confidence should fall, and a fit would choose "never". Its effect on images harder than
the training set is measured in ``benchmarks/RESULTS_confidence.md``.
"""

from __future__ import annotations

import numpy as np


class DoubtFade:
    """Fade class probabilities toward the prior as unfamiliarity approaches its threshold.

    Parameters
    ----------
    start : float
        Quantile of the training images' out-of-fold unfamiliarity where the fade begins.
    floor : float
        Weight left to the classifier's own probabilities at and beyond the threshold (> 0, so
        that the top class stays the top class).

    Attributes
    ----------
    n_classes_ : int
    start_ : float
        Unfamiliarity at which the fade begins (below 1).
    """

    def __init__(self, start: float = 0.9, floor: float = 0.02):
        self.start = start
        self.floor = floor

    def fit(self, classes, oof_unfamiliarity) -> DoubtFade:
        """The fade's start from the training images' out-of-fold unfamiliarity."""
        if not 0.0 <= float(self.start) <= 1.0:
            raise ValueError(f"start must be a quantile in [0, 1], not {self.start!r}")
        if not 0.0 < float(self.floor) <= 1.0:
            raise ValueError(f"floor must be in (0, 1], not {self.floor!r}")
        self.n_classes_ = int(np.asarray(classes).shape[0])
        d = np.asarray(oof_unfamiliarity, dtype=np.float64)
        # Never start at or beyond the threshold: the fade must reach the prior there.
        self.start_ = float(min(np.quantile(d, float(self.start)), 0.95))
        return self

    def weight(self, unfamiliarity) -> np.ndarray:
        """Weight of the classifier's own probabilities, 1 (keep) to 0 (prior only)."""
        d = np.asarray(unfamiliarity, dtype=np.float64)
        return np.clip((1.0 - d) / (1.0 - self.start_), float(self.floor), 1.0)

    def apply(self, proba, unfamiliarity) -> np.ndarray:
        """The faded probabilities ``w p + (1 - w) / K`` (rows still sum to 1)."""
        proba = np.asarray(proba, dtype=np.float64)
        w = self.weight(unfamiliarity)[:, None]
        return w * proba + (1.0 - w) / proba.shape[1]

    def describe(self) -> dict:
        return {"rule": "p' = w p + (1 - w) / K, w = clip((1 - d) / (1 - d0), floor, 1), d the "
                        "unfamiliarity (1 = threshold)",
                "start_quantile": float(self.start), "d0": self.start_,
                "floor": float(self.floor)}
