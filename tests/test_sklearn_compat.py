"""Our transformers under scikit-learn's own rules (sklearn.utils.estimator_checks and friends).

The record transformers take a list of :class:`PatternRecord`, not a 2-D array of numbers, and
say so with the input tag ``two_d_array = False``; scikit-learn's ``check_estimator`` then skips
every check that needs data, so running it as it is would test almost nothing. Here the full
list of checks runs on a copy of each transformer whose tags claim 2-D input: the checks that
do not need data must pass, and the ones that fit on random numbers are listed below as
expected failures, each with its reason. What those checks verify is then checked on records
with the same scikit-learn tools: clone, parameter round trips, pickling, a Pipeline, a grid
search over a vectoriser parameter and ``set_output``.
"""

from __future__ import annotations

import pickle

import numpy as np
import pytest
from sklearn.base import clone
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import GridSearchCV, StratifiedKFold
from sklearn.pipeline import Pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils.estimator_checks import parametrize_with_checks

from topoclass import vectorize
from topoclass.model.pipeline import NonFiniteAsMissing
from topoclass.order import order_measures
from topoclass.persistence import pattern_persistence
from topoclass.records import PatternRecord
from topoclass.sites import SitePattern
from topoclass.synth import hexagonal_lattice

RECORD_TRANSFORMERS = [
    vectorize.PersistenceImageFeatures,
    vectorize.PersistenceLandscapeFeatures,
    vectorize.BettiCurveFeatures,
    vectorize.BarcodeStatistics,
    vectorize.IdealLatticeResiduals,
    vectorize.OrderMeasureFeatures,
    vectorize.AcquisitionContext,
]

_NUMBERS = ("fits on a 2-D array of random numbers; this transformer takes a list of "
            "PatternRecords (the reason its two_d_array tag is False); the same rule is "
            "checked on records in this file or in tests/test_vectorize.py")
_SPARSE = "sparse matrices are 2-D numeric input; records are never sparse"
#: Checks of scikit-learn 1.6+ that cannot apply to an estimator whose input is records.
NEEDS_NUMBERS = {
    name: _SPARSE if "sparse" in name else _NUMBERS
    for name in (
        "check_complex_data", "check_dict_unchanged", "check_dont_overwrite_parameters",
        "check_dtype_object", "check_estimator_sparse_array", "check_estimator_sparse_matrix",
        "check_estimator_sparse_tag", "check_estimators_dtypes",
        "check_estimators_empty_data_messages", "check_estimators_fit_returns_self",
        "check_estimators_nan_inf", "check_estimators_overwrite_params",
        "check_estimators_pickle", "check_f_contiguous_array_estimator",
        "check_fit2d_1feature", "check_fit2d_1sample", "check_fit2d_predict1d",
        "check_fit_check_is_fitted", "check_fit_idempotent", "check_fit_score_takes_y",
        "check_methods_sample_order_invariance", "check_methods_subset_invariance",
        "check_n_features_in", "check_n_features_in_after_fitting",
        "check_pipeline_consistency", "check_positive_only_tag_during_fit",
        "check_readonly_memmap_input", "check_transformer_data_not_an_array",
        "check_transformer_general",
    )
}


def _claiming_2d(cls):
    """``cls`` with tags that let every check run (nothing else changes)."""

    class Claims2D(cls):
        def __sklearn_tags__(self):
            tags = super().__sklearn_tags__()
            tags.input_tags.two_d_array = True
            return tags

    Claims2D.__name__ = Claims2D.__qualname__ = cls.__name__
    return Claims2D


def _expected_failures(estimator) -> dict[str, str]:
    return {} if isinstance(estimator, NonFiniteAsMissing) else NEEDS_NUMBERS


# The full check list on three record transformers (a learned grid, fixed statistics, a
# mapping lookup; all share one base class whose data-free checks tests/test_vectorize.py runs
# on every transformer) keeps this file to tens of seconds.
@parametrize_with_checks(
    [_claiming_2d(cls)() for cls in (vectorize.PersistenceImageFeatures,
                                      vectorize.BarcodeStatistics,
                                      vectorize.OrderMeasureFeatures)]
    + [NonFiniteAsMissing()],
    expected_failed_checks=_expected_failures,
)
def test_scikit_learn_estimator_checks(estimator, check):
    check(estimator)


# --------------------------------------------------------------------------------------------
# the same rules on records


def _records(n: int, seed: int) -> tuple[list[PatternRecord], np.ndarray]:
    """Real records of small jittered lattices: half nearly ideal, half disordered."""
    rng = np.random.default_rng(seed)
    records, y = [], []
    shape, a = (120, 120), 10.0
    for i in range(n):
        disordered = i % 2 == 1
        xy = hexagonal_lattice(shape, a, angle=rng.uniform(0, 60),
                               jitter=0.15 if disordered else 0.02, seed=int(rng.integers(1e6)))
        if disordered:
            xy = np.delete(xy, rng.choice(len(xy), 8, replace=False), axis=0)
        border = ((xy < a) | (xy > 119 - a)).any(axis=1)
        pattern = SitePattern(xy=xy, spacing=a, polarity="dark", border=border, shape=shape)
        records.append(PatternRecord(pattern_persistence(pattern), order_measures(pattern)))
        y.append("disordered" if disordered else "ordered")
    return records, np.array(y)


@pytest.fixture(scope="module")
def data():
    return _records(16, seed=1)


@pytest.mark.parametrize("cls", RECORD_TRANSFORMERS, ids=lambda c: c.__name__)
def test_params_clone_and_pickle_on_records(cls, data):
    records, _ = data
    est = cls()
    params = est.get_params()
    assert est.set_params(**params) is est and est.get_params() == params
    out = est.fit(records).transform(records)
    copy = clone(est)
    assert copy.get_params() == params and not hasattr(copy, "feature_names_out_")
    np.testing.assert_array_equal(copy.fit(records).transform(records), out)
    np.testing.assert_array_equal(pickle.loads(pickle.dumps(est)).transform(records), out)


def test_changed_parameter_survives_clone_and_changes_the_output(data):
    records, _ = data
    est = vectorize.PersistenceImageFeatures(pixels=(4, 4))
    est.set_params(sigma=0.3)
    copy = clone(est)
    assert copy.get_params()["sigma"] == 0.3
    narrow = vectorize.PersistenceImageFeatures(pixels=(4, 4), sigma=0.05)
    assert not np.allclose(copy.fit_transform(records), narrow.fit_transform(records))


def test_grid_search_over_a_vectoriser_parameter_in_a_pipeline(data):
    records, y = data
    pipe = Pipeline([
        ("features", vectorize.make_features("topology", pimage__pixels=(4, 4))),
        ("scale", StandardScaler()),
        ("classify", LogisticRegression(max_iter=500)),
    ])
    grid = GridSearchCV(pipe, {"features__pimage__sigma": [0.05, 0.2]},
                        cv=StratifiedKFold(2, shuffle=True, random_state=0))
    grid.fit(records, y)
    assert set(grid.cv_results_["param_features__pimage__sigma"]) == {0.05, 0.2}
    assert grid.best_estimator_.named_steps["features"].get_params()["pimage__sigma"] in (0.05, 0.2)
    # The refitted best pipeline is an ordinary fitted pipeline over records.
    assert list(grid.predict(records[:4])) == list(grid.best_estimator_.predict(records[:4]))


@pytest.mark.parametrize("cls", RECORD_TRANSFORMERS, ids=lambda c: c.__name__)
def test_set_output_pandas_names_the_columns(cls, data):
    pd = pytest.importorskip("pandas")
    records, _ = data
    est = cls().set_output(transform="pandas")
    frame = est.fit(records).transform(records)
    assert isinstance(frame, pd.DataFrame)
    assert list(frame.columns) == list(est.get_feature_names_out())
    np.testing.assert_array_equal(frame.to_numpy(), cls().fit(records).transform(records))
