"""Probabilities that shrink with doubt, and novelty that sees the lattice's symmetry."""

from __future__ import annotations

import numpy as np
import pytest

from topoclass.model import DoubtFade, NeighbourDensityNovelty


def test_fade_hand_worked():
    # p' = w p + (1 - w) / K; w = 1 up to d0, linear to a at d = 1, a / d^2 beyond, never
    # below the floor; worked by hand with d0 = 0.5, a = 0.5, floor = 0.02, K = 4.
    fade = DoubtFade(start=0.5, at_threshold=0.5).fit(["a", "b", "c", "d"], [0.0, 0.5, 0.5, 1.0])
    assert fade.start_ == pytest.approx(0.5)
    assert fade.weight([0.2, 0.75, 1.0, 2.0, 10.0]) == pytest.approx([1, 0.75, 0.5, 0.125,
                                                                      0.02])
    p = np.array([[0.85, 0.05, 0.05, 0.05]] * 4)
    out = fade.apply(p, [0.2, 0.75, 1.0, 10.0])
    assert out[0] == pytest.approx([0.85, 0.05, 0.05, 0.05])  # typical: unchanged
    assert out[1] == pytest.approx([0.7, 0.1, 0.1, 0.1])  # w = 0.75
    assert out[2] == pytest.approx([0.55, 0.15, 0.15, 0.15])  # w = 0.5 at the threshold
    assert out[3] == pytest.approx([0.262, 0.246, 0.246, 0.246])  # floor: 0.017 + 0.245
    assert out.sum(axis=1) == pytest.approx(np.ones(4))
    assert np.all(np.argmax(out, axis=1) == 0)  # the top class never changes


def test_density_check_flags_points_between_the_clumps():
    # Two tight clumps of training points (two classes of order measures): the midpoint between
    # them is inside the Mahalanobis ellipsoid of the pooled cloud but has no training
    # neighbour; the local outlier factor (Breunig et al. 2000; scikit-learn's
    # LocalOutlierFactor) flags it, and a point in a clump stays familiar.
    from sklearn.covariance import EmpiricalCovariance
    from sklearn.preprocessing import FunctionTransformer

    rng = np.random.default_rng(0)
    X = np.vstack([rng.normal(-3, 0.3, (40, 2)), rng.normal(3, 0.3, (40, 2))])
    check = NeighbourDensityNovelty(FunctionTransformer(feature_names_out="one-to-one"))
    check.fit(X, folds=np.arange(80) % 5)
    probe = np.array([[0.0, 0.0], [3.0, 3.1]])
    assert check.score(probe)[0] > 1.0 and check.score(probe)[1] < 1.0
    maha = EmpiricalCovariance().fit(X).mahalanobis(probe)
    assert maha[0] < maha[1]  # the ellipsoid calls the empty middle the more familiar one
    assert check.reasons(probe)[1] == [] and "local outlier factor" in check.reasons(probe)[0][0]


def test_square_lattice_is_unfamiliar(small_model, tmp_path):
    # A square lattice has psi4 = 1 and low psi6 (test_order); the training images are all
    # hexagonal (or disordered), so the model must not give it a class.
    import skimage.io
    from skimage.util import img_as_ubyte

    from topoclass.features import FeatureSettings, measure_patterns
    from topoclass.synth import square_micrograph

    model = small_model.model
    paths = []
    for seed in (1, 2):
        path = tmp_path / f"square_{seed}.png"
        skimage.io.imsave(path, img_as_ubyte(square_micrograph(size=256, seed=seed)),
                          check_contrast=False)
        paths.append(path)
    results = measure_patterns(paths, FeatureSettings.from_model(model))
    records = [r.record for r in results if r.ok]
    assert records  # the site finder does find the square lattice's sites
    proba, score, reasons = model.assess(records)
    assert np.all(score > 1.0), (score, reasons)
    assert all(reasons)
    assert model.verdicts(proba, score) == ["unfamiliar"] * len(records)
    # Beyond the threshold the fade keeps less than the weight left at the threshold.
    a = model.doubt.at_threshold
    assert np.all(proba.max(axis=1) < a + (1 - a) / proba.shape[1])


def test_harder_sample_is_harder():
    from topoclass.synth import draw_sample, harder_sample

    for seed in range(5):
        usual, hard = draw_sample("vacancies", seed=seed), harder_sample("vacancies", seed=seed)
        assert hard["jitter"] >= 0.045 >= usual["jitter"]
        assert hard["vacancy_fraction"] <= 0.03 <= usual["vacancy_fraction"]
        assert hard["noise"] > 0.2 >= usual["noise"]
        assert 5.0 <= harder_sample("grains", seed=seed)["misorientation_deg"] <= 10.0
