"""Build, cross-validate, calibrate, save and load a classifier of micrograph features.

The model stage of the pipeline, one concept per module:

========================  ===============================================================
``choices``               the classifiers to choose from, and the default
``pipeline``              the unfitted pipeline
``folds``                 stratified folds grouped by sample
``calibration``           which calibration, fitted on grouped folds; the evidence limit
``evaluation``            metrics, reliability tables, grouped cross-validation
``novelty``               is an image like the training images (Mahalanobis, ranges)
``conformal``             the review band: conformal prediction sets and verdicts
``doubt``                 probabilities that fade toward the prior near the training edge
``trained``               the trained model; train, select, validate
``storage``               model folder: skops archive, JSON card, trusted types only
========================  ===============================================================

The feature transformer is an argument (any scikit-learn transformer, for example
``topoclass.vectorize.make_features(name)``), so everything here works on whatever ``X`` that
transformer accepts: a list of per-image records, or a plain numeric array.

The model that is shipped is ``features → non-finite values as missing → median imputation →
standardisation → classifier``, wrapped in :class:`~sklearn.calibration.CalibratedClassifierCV`
whose calibration folds are grouped like the validation folds. Beside it sit novelty checks
(:class:`MahalanobisNovelty`, :class:`RangeNovelty`) that say when an image lies outside the
training set.
"""

# The names below are loaded on first use (PEP 562), as scikit-image loads its
# subpackages: `import topoclass.model.choices` (the command line's defaults) must not pull
# in scikit-learn, and each name still comes from the module that owns it.
_HOME = {
    "CALIBRATION_METHODS": "calibration",
    "ISOTONIC_MIN_PER_CLASS": "calibration",
    "ISOTONIC_MIN_SAMPLES": "calibration",
    "choose_calibration": "calibration",
    "fit_calibrated": "calibration",
    "limit_by_evidence": "calibration",
    "DEFAULT_ALPHA": "conformal",
    "REVIEW": "conformal",
    "UNFAMILIAR": "conformal",
    "ReviewBand": "conformal",
    "conformal_quantile": "conformal",
    "DoubtFade": "doubt",
    "CVReport": "evaluation",
    "cross_validate_model": "evaluation",
    "metrics_from_probabilities": "evaluation",
    "metrics_markdown": "evaluation",
    "reliability_table": "evaluation",
    "fold_splits": "folds",
    "LabelledDiagrams": "neighbours",
    "labelled_diagrams": "neighbours",
    "sliced_distance": "neighbours",
    "MahalanobisNovelty": "novelty",
    "NeighbourDensityNovelty": "novelty",
    "RangeNovelty": "novelty",
    "CLASSIFIERS": "choices",
    "DEFAULT_CLASSIFIER": "choices",
    "NonFiniteAsMissing": "pipeline",
    "build_pipeline": "pipeline",
    "CARD_FILE": "storage",
    "CARD_FORMAT": "storage",
    "MODEL_FILE": "storage",
    "REPORT_FILE": "storage",
    "ModelVersionWarning": "storage",
    "load_model": "storage",
    "package_versions": "storage",
    "save_model": "storage",
    "TrainedModel": "trained",
    "select_model": "trained",
    "train_model": "trained",
    "validate_model": "trained",
}

__all__ = [
    "CALIBRATION_METHODS", "CARD_FILE", "CARD_FORMAT", "CLASSIFIERS", "CVReport",
    "DEFAULT_ALPHA", "DEFAULT_CLASSIFIER", "DoubtFade", "NeighbourDensityNovelty", "REVIEW",
    "ReviewBand", "UNFAMILIAR",
    "conformal_quantile", "ISOTONIC_MIN_PER_CLASS", "ISOTONIC_MIN_SAMPLES", "MODEL_FILE",
    "MahalanobisNovelty", "ModelVersionWarning", "NonFiniteAsMissing", "REPORT_FILE",
    "RangeNovelty", "TrainedModel", "build_pipeline", "choose_calibration",
    "cross_validate_model", "fit_calibrated", "fold_splits", "limit_by_evidence", "load_model",
    "metrics_from_probabilities", "metrics_markdown", "package_versions", "reliability_table",
    "save_model", "select_model", "train_model", "validate_model",
    "LabelledDiagrams", "labelled_diagrams", "sliced_distance",
]


def __getattr__(name: str):
    if name in _HOME:
        import importlib

        value = getattr(importlib.import_module(f"{__name__}.{_HOME[name]}"), name)
        globals()[name] = value  # later look-ups skip this function
        return value
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(_HOME))
