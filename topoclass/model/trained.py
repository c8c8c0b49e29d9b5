"""The trained model, and training, selecting and validating one."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from sklearn.base import clone
from sklearn.pipeline import Pipeline

from topoclass._progress import step_progress
from topoclass.errors import TopoclassError
from topoclass.model.calibration import choose_calibration, fit_calibrated, limit_by_evidence
from topoclass.model.conformal import DEFAULT_ALPHA, UNFAMILIAR, ReviewBand
from topoclass.model.doubt import DoubtFade
from topoclass.model.evaluation import CVReport, cross_validate_model, metrics_from_probabilities
from topoclass.model.neighbours import LabelledDiagrams
from topoclass.model.novelty import MahalanobisNovelty, NeighbourDensityNovelty, RangeNovelty
from topoclass.model.pipeline import DEFAULT_CLASSIFIER, build_pipeline


@dataclass
class TrainedModel:
    """A calibrated classifier, its novelty detector and the record of how it was made.

    Attributes
    ----------
    estimator : CalibratedClassifierCV
        The fitted calibrated pipeline.
    classes : ndarray
        Class labels, the column order of :meth:`predict_proba`.
    novelty : MahalanobisNovelty
        The fitted novelty detector.
    cv_report : CVReport
        Cross-validation of the same procedure.
    feature_set_name, classifier : str
        What the features and the classifier are called.
    calibration, calibration_reason : str
        Calibration method and why it was chosen.
    class_counts : dict
        Training images per class (string keys).
    settings : dict
        Everything needed to repeat the training (cv, seed, n_samples, n_groups, …).
    range_check : RangeNovelty or None
        Range check of the acquisition measures.
    review_band : ReviewBand or None
        Conformal prediction sets from the out-of-fold probabilities (None in models written
        before the band existed: their verdict is the top class unless unfamiliar).
    density_check : NeighbourDensityNovelty or None
        Local-outlier check of the order measures with psi4.
    doubt : DoubtFade or None
        The fade of the probabilities toward equal odds with unfamiliarity.
    neighbours : LabelledDiagrams or None
        H1 diagrams, labels and thumbnails of the training images, to show the labelled images
        nearest to a scored one (:mod:`topoclass.model.neighbours`); None in older models.
    """

    estimator: Any
    classes: np.ndarray
    novelty: MahalanobisNovelty
    cv_report: CVReport
    feature_set_name: str
    classifier: str
    calibration: str
    calibration_reason: str
    class_counts: dict
    settings: dict
    range_check: RangeNovelty | None = None
    review_band: ReviewBand | None = None
    density_check: NeighbourDensityNovelty | None = None
    doubt: DoubtFade | None = None
    neighbours: LabelledDiagrams | None = None

    def predict_proba(self, X) -> np.ndarray:
        """Calibrated probability of each class, columns in the order of ``classes``.

        Limited by the size of the training set (:func:`limit_by_evidence`), as in the
        cross-validation that measured them, then faded toward equal odds as the image
        nears the edge of the training set (:class:`DoubtFade`), when the model has the fade.
        The top class is the same either way.
        """
        return self.assess(X)[0]

    def predict(self, X) -> np.ndarray:
        """The most probable class of each image."""
        return self.classes[np.argmax(self.predict_proba(X), axis=1)]

    def unfamiliarity(self, X) -> np.ndarray:
        """Novelty score per image; above 1 means farther from the training set than allowed.

        The largest of the Mahalanobis score over the model's features and, when the model has
        them, the range check of the acquisition measures (:class:`RangeNovelty`) and the
        local-outlier check of the order measures (:class:`NeighbourDensityNovelty`).
        """
        return self.assess(X)[1]

    def unfamiliar_reasons(self, X) -> list[list[str]]:
        """Per image, why it is unfamiliar, in words (empty for familiar images)."""
        return self.assess(X)[2]

    def assess(self, X) -> tuple[np.ndarray, np.ndarray, list[list[str]]]:
        """Probabilities, unfamiliarity and its reasons in one pass over the features.

        The same as :meth:`predict_proba`, :meth:`unfamiliarity` and
        :meth:`unfamiliar_reasons`, computing each novelty check once (scoring calls this).
        """
        proba = limit_by_evidence(self.estimator.predict_proba(X), self.settings["n_samples"])
        mahalanobis = self.novelty.score(X)
        reasons: list[list[str]] = [[] for _ in range(len(mahalanobis))]
        # The distance-like checks, measured out-of-fold in training: they set the fade.
        graded = mahalanobis
        density = getattr(self, "density_check", None)
        if density is not None:
            graded = np.maximum(graded, density.score(X))
            for words, more in zip(reasons, density.reasons(X), strict=True):
                words.extend(more)
        score = graded
        if self.range_check is not None:
            # A pass/fail check: every value inside the range scores 1 / (1 + tolerance), so
            # it flags an image but says nothing about how typical a familiar one is.
            score = np.maximum(score, self.range_check.score(X))
            for words, more in zip(reasons, self.range_check.reasons(X), strict=True):
                words[:0] = more
        for words, m in zip(reasons, mahalanobis, strict=True):
            if m > 1.0:
                words.append(f"features far from every training image ({m:.3g} times the "
                             "allowed distance)")
        doubt = getattr(self, "doubt", None)
        if doubt is not None:
            proba = doubt.apply(proba, np.where(score > 1.0, score, graded))
        return proba, score, reasons

    def is_unfamiliar(self, X) -> np.ndarray:
        return self.unfamiliarity(X) > 1.0

    def verdicts(self, proba, unfamiliarity, *, alpha: float | None = None) -> list[str]:
        """Per image: its class, ``review`` or ``unfamiliar``, from :meth:`assess` output.

        The review band (:class:`ReviewBand`) at the model's error rate, or at ``alpha``
        when given; an image the novelty checks flag is ``unfamiliar`` whatever its set.
        """
        flagged = np.asarray(unfamiliarity, dtype=float) > 1.0
        band = self.review_band
        if band is None:
            top = self.classes[np.argmax(np.asarray(proba), axis=1)]
            return [UNFAMILIAR if odd else str(c) for c, odd in zip(top, flagged, strict=True)]
        if alpha is not None and alpha != band.alpha_:
            band = band.with_alpha(alpha)
        return band.verdicts(proba, flagged)


def train_model(X, y, groups=None, *, features, feature_set_name: str,
                classifier: str = DEFAULT_CLASSIFIER, cv: int = 5, calibration: str = "auto",
                seed: int = 0, progress=None, context=None,
                alpha: float = DEFAULT_ALPHA, density=None) -> TrainedModel:
    """Cross-validate, then fit the calibrated model and its novelty detector on all data.

    Parameters
    ----------
    X : array-like or list
        Training inputs, whatever ``features`` accepts.
    y : array-like of shape (n_samples,)
        Class labels.
    groups : array-like or None
        Sample of each image; keeps a sample's images on one side of every split, in the
        validation and in the calibration folds alike.
    features : scikit-learn transformer or None
        Feature step (for example ``make_features("all")``); None when ``X`` is numeric.
    feature_set_name : str
        Name recorded in the card.
    classifier : str
        A key of :data:`CLASSIFIERS`.
    cv : int
        Folds of the validation and of the calibration.
    calibration : {"auto", "sigmoid", "temperature", "isotonic"}
        See :func:`choose_calibration`.
    seed : int
        Seed of the folds and of every random step.
    progress : None, bool or callable
        True shows a rich progress bar; a callable is called as ``progress(step, done, total)``.
    context : scikit-learn transformer or None
        Acquisition measures for the range check of :class:`RangeNovelty` (for example
        :class:`topoclass.vectorize.AcquisitionContext`); None for none.
    alpha : float
        Error rate of the review band (:class:`ReviewBand`), fitted on the out-of-fold
        probabilities of the cross-validation.
    density : scikit-learn transformer or None
        Measures for the local-outlier check of :class:`NeighbourDensityNovelty` (for example
        ``OrderMeasureFeatures(SYMMETRY_KEYS)``); None for none.

    Returns
    -------
    TrainedModel
    """
    pipeline = build_pipeline(features, classifier, seed=seed)
    method, reason = choose_calibration(y, calibration)
    with step_progress(progress, total=2 * cv + 1) as bar:
        bar.step("cross-validating")
        report = cross_validate_model(pipeline, X, y, groups, cv=cv, seed=seed,
                                      calibration=method)
        bar.advance(cv)
        return _fit_final(pipeline, X, y, groups, report, feature_set_name=feature_set_name,
                          classifier=classifier, method=method, reason=reason,
                          calibration_requested=calibration, cv=cv, seed=seed, bar=bar,
                          context=context, alpha=alpha, density=density)


def select_model(X, y, groups=None, *, candidates: Sequence[tuple[str, Any, str]],
                 cv: int = 5, seed: int = 0, calibration: str = "auto",
                 progress=None, context=None, alpha: float = DEFAULT_ALPHA,
                 density=None) -> tuple[TrainedModel, list[dict]]:
    """Compare (feature set, transformer, classifier) candidates and train the best.

    Every candidate is cross-validated on the same folds exactly as :func:`train_model` would
    (calibration inside the folds); the best has the highest macro-F1, ties broken by the lower
    log-loss. Only the winner is then fitted on all data.

    Note that the winner's cross-validated score is slightly optimistic, since it was chosen
    on those same folds; validate it on a held-out set before relying on the number.

    Returns
    -------
    (best TrainedModel, comparison table: one dict per candidate, in the given order, with
    ``feature_set, classifier, macro_f1, accuracy, log_loss, brier, ece, rank, selected``)
    """
    if not candidates:
        raise TopoclassError("select_model needs at least one candidate")
    method, reason = choose_calibration(y, calibration)
    rows, reports = [], []
    with step_progress(progress, total=len(candidates) * cv + cv + 1) as bar:
        for name, features, clf in candidates:
            bar.step(f"cross-validating {name} + {clf}")
            pipeline = build_pipeline(features, clf, seed=seed)
            report = cross_validate_model(pipeline, X, y, groups, cv=cv, seed=seed,
                                          calibration=method)
            bar.advance(cv)
            reports.append((pipeline, report))
            rows.append({"feature_set": name, "classifier": clf, "macro_f1": report.macro_f1,
                         "accuracy": report.accuracy, "log_loss": report.log_loss,
                         "brier": report.brier, "ece": report.ece})
        order = sorted(range(len(rows)),
                       key=lambda i: (-round(rows[i]["macro_f1"], 12), rows[i]["log_loss"]))
        for rank, i in enumerate(order, start=1):
            rows[i]["rank"] = rank
            rows[i]["selected"] = rank == 1
        best = order[0]
        pipeline, report = reports[best]
        model = _fit_final(pipeline, X, y, groups, report,
                           feature_set_name=rows[best]["feature_set"],
                           classifier=rows[best]["classifier"], method=method, reason=reason,
                           calibration_requested=calibration, cv=cv, seed=seed, bar=bar,
                           context=context, alpha=alpha, density=density)
    model.settings["selected_from"] = [dict(r) for r in rows]
    return model, rows


def validate_model(model: TrainedModel, X, y) -> dict:
    """Metrics of a trained model on a labelled held-out set.

    Returns :func:`metrics_from_probabilities` plus ``unfamiliar_fraction``.

    Raises
    ------
    TopoclassError
        When the held-out labels include classes the model does not know.
    """
    y = np.asarray(y)
    unknown = sorted(set(y.tolist()) - set(model.classes.tolist()))
    if unknown:
        raise TopoclassError(f"labels {unknown} are not classes of this model "
                             f"({', '.join(map(str, model.classes))}); relabel or retrain")
    metrics = metrics_from_probabilities(y, model.predict_proba(X), model.classes)
    metrics["unfamiliar_fraction"] = float(np.mean(model.is_unfamiliar(X)))
    return metrics


def _fit_final(pipeline, X, y, groups, report, *, feature_set_name, classifier, method, reason,
               calibration_requested, cv, seed, bar, context=None,
               alpha=DEFAULT_ALPHA, density=None) -> TrainedModel:
    y = np.asarray(y)
    groups_arr = None if groups is None else np.asarray(groups)
    bar.step("fitting the novelty detector")
    preprocess = Pipeline(clone(pipeline).steps[:-1])
    novelty = MahalanobisNovelty(preprocess).fit(X, y, folds=report.fold)
    range_check = None if context is None else RangeNovelty(context).fit(X, y)
    density_check = (None if density is None
                     else NeighbourDensityNovelty(density).fit(X, y, folds=report.fold))
    # Out-of-fold unfamiliarity of each training image: what the fade starts from, and what
    # the review band must see, so that it is fitted on the probabilities scoring reports.
    oof_doubt = novelty.oof_distances_ / novelty.threshold_
    if density_check is not None:
        oof_doubt = np.maximum(oof_doubt, density_check.oof_factors_ / density_check.threshold_)
    doubt = DoubtFade().fit(report.classes, oof_doubt)
    band = ReviewBand(alpha).fit(doubt.apply(report.oof_proba, oof_doubt), report.y_true,
                                 report.classes)
    bar.advance(cv)
    bar.step("fitting the calibrated model")
    estimator = fit_calibrated(pipeline, X, y, groups_arr, method, cv, seed)
    bar.advance(1)
    classes, counts = np.unique(y, return_counts=True)
    settings = {
        "feature_set": feature_set_name,
        "classifier": classifier,
        "calibration_requested": calibration_requested,
        "calibration": method,
        "cv": int(cv),
        "seed": int(seed),
        "n_samples": int(y.shape[0]),
        "n_groups": None if groups_arr is None else int(np.unique(groups_arr).shape[0]),
        "grouped": groups_arr is not None,
        "pipeline_steps": [name for name, _ in pipeline.steps],
    }
    return TrainedModel(
        estimator=estimator, classes=estimator.classes_, novelty=novelty, cv_report=report,
        feature_set_name=feature_set_name, classifier=classifier, calibration=method,
        calibration_reason=reason,
        class_counts={str(c): int(n) for c, n in zip(classes, counts, strict=True)},
        settings=settings, range_check=range_check, review_band=band,
        density_check=density_check, doubt=doubt,
    )
