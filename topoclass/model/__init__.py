"""Build, cross-validate, calibrate, save and load a classifier of micrograph features.

The model stage of the pipeline, one concept per module:

========================  ===============================================================
``pipeline``              the unfitted pipeline and the classifiers to choose from
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

from topoclass.model.calibration import (
    CALIBRATION_METHODS,
    ISOTONIC_MIN_PER_CLASS,
    ISOTONIC_MIN_SAMPLES,
    choose_calibration,
    fit_calibrated,
    limit_by_evidence,
)
from topoclass.model.conformal import (
    DEFAULT_ALPHA,
    REVIEW,
    UNFAMILIAR,
    ReviewBand,
    conformal_quantile,
)
from topoclass.model.doubt import DoubtFade
from topoclass.model.evaluation import (
    CVReport,
    cross_validate_model,
    metrics_from_probabilities,
    metrics_markdown,
    reliability_table,
)
from topoclass.model.folds import fold_splits
from topoclass.model.neighbours import LabelledDiagrams, labelled_diagrams, sliced_distance
from topoclass.model.novelty import MahalanobisNovelty, NeighbourDensityNovelty, RangeNovelty
from topoclass.model.pipeline import (
    CLASSIFIERS,
    DEFAULT_CLASSIFIER,
    NonFiniteAsMissing,
    build_pipeline,
)
from topoclass.model.storage import (
    CARD_FILE,
    CARD_FORMAT,
    MODEL_FILE,
    REPORT_FILE,
    ModelVersionWarning,
    load_model,
    package_versions,
    save_model,
)
from topoclass.model.trained import TrainedModel, select_model, train_model, validate_model

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
