"""Tests of topoclass.vectorize against published formulas and reference libraries.

Diagrams are built directly from arrays, or with ripser / scipy on small point clouds, so these
tests do not depend on topoclass.persistence's computation.
"""

from __future__ import annotations

import pickle
import re
from dataclasses import dataclass

import joblib
import numpy as np
import pytest
import ripser
import scipy.stats
from persim import PersistenceImager, PersLandscapeExact
from scipy.sparse.csgraph import connected_components, minimum_spanning_tree
from scipy.spatial.distance import pdist, squareform
from sklearn.base import clone
from sklearn.exceptions import NotFittedError
from sklearn.linear_model import LogisticRegression
from sklearn.model_selection import StratifiedKFold, cross_val_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from sklearn.utils import estimator_checks as ec

from topoclass.errors import TopoclassError
from topoclass.persistence import Diagrams
from topoclass.records import PatternRecord, barcode_summary
from topoclass.vectorize import (
    DEFAULT_ORDER_KEYS,
    FEATURE_SETS,
    BarcodeStatistics,
    BettiCurveFeatures,
    IdealLatticeResiduals,
    OrderMeasureFeatures,
    PersistenceImageFeatures,
    PersistenceLandscapeFeatures,
    make_features,
)

TRANSFORMERS = [
    PersistenceImageFeatures,
    PersistenceLandscapeFeatures,
    BettiCurveFeatures,
    BarcodeStatistics,
    IdealLatticeResiduals,
    OrderMeasureFeatures,
]


# --- builders ---------------------------------------------------------------------------------


def _diagrams(h0_deaths=(), h1=(), max_scale=2.5, truncated=None, spacing=1.0) -> Diagrams:
    deaths = np.asarray(h0_deaths, dtype=float).reshape(-1)
    h0 = np.column_stack([np.zeros_like(deaths), deaths])
    h1 = np.asarray(h1, dtype=float).reshape(-1, 2)
    if truncated is None:
        truncated = h1[:, 1] >= max_scale
    return Diagrams(
        h0=h0, h1=h1, h1_truncated=np.asarray(truncated, dtype=bool),
        h0_edges=np.zeros((h0.shape[0], 2), dtype=int),
        h1_edges=np.zeros((h1.shape[0], 2), dtype=int),
        spacing=spacing, max_scale=max_scale,
    )


def _random_diagrams(rng, n0=40, n1=25, max_scale=2.5) -> Diagrams:
    deaths = rng.uniform(0.6, 1.4, n0)
    births = rng.uniform(0.9, 1.8, n1)
    ends = np.minimum(births + rng.exponential(0.25, n1), max_scale)
    return _diagrams(deaths, np.column_stack([births, ends]), max_scale=max_scale)


def _order(rng) -> dict[str, float]:
    return {key: float(rng.random()) for key in DEFAULT_ORDER_KEYS}


def _records(n=6, seed=0, **kwargs) -> list[PatternRecord]:
    rng = np.random.default_rng(seed)
    return [PatternRecord(_random_diagrams(rng, **kwargs), _order(rng), source=f"membrane_{i}.tif")
            for i in range(n)]


def _column(transformer, name: str) -> int:
    return list(transformer.get_feature_names_out()).index(name)


def _hex_lattice(n=9) -> np.ndarray:
    i, j = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    # Primitive vectors (1, 0) and (1/2, sqrt(3)/2) of the triangular lattice, spacing 1.
    return np.column_stack([(i + 0.5 * j).ravel(), (np.sqrt(3) / 2 * j).ravel()])


def _rips_diagrams(xy: np.ndarray, max_scale: float) -> Diagrams:
    dgms = ripser.ripser(xy, maxdim=1)["dgms"]
    h0 = dgms[0][np.isfinite(dgms[0][:, 1])]
    return _diagrams(h0[:, 1], dgms[1], max_scale=max_scale)


# --- persistence images -----------------------------------------------------------------------


def test_pimage_of_one_point_is_the_pixel_integrated_gaussian():
    # Adams et al., "Persistence Images", JMLR 18 (2017), Def. 1: a point (b, p) contributes
    # w(b, p) * phi_(b,p), phi a 2-D Gaussian, integrated over each pixel. Reference: scipy's
    # multivariate normal CDF at the pixel corners (inclusion-exclusion).
    sigma, b, p = 0.05, 1.2, 0.3
    train = [PatternRecord(_diagrams([1.0], [[0.5, 0.6], [2.0, 3.0]], max_scale=3.0))]
    pim = PersistenceImageFeatures(pixels=(12, 8), sigma=sigma, dims=(1,), per_site=False)
    image = pim.fit(train).transform([PatternRecord(_diagrams([1.0], [[b, b + p]]))])[0]
    image = image.reshape(12, 8)

    mvn = scipy.stats.multivariate_normal(mean=[b, p], cov=sigma**2 * np.eye(2))
    eb, ep = pim.birth_edges_, pim.persistence_edges_[1]
    corners = mvn.cdf(np.stack(np.meshgrid(eb, ep, indexing="ij"), axis=-1))
    expected = p * (corners[1:, 1:] - corners[:-1, 1:] - corners[1:, :-1] + corners[:-1, :-1])
    np.testing.assert_allclose(image, expected, atol=1e-6)
    # The grid covers the point by many sigma, so the total mass is the weight p (linear weight).
    assert image.sum() == pytest.approx(p, rel=1e-6)
    # Its heaviest pixel is the one holding (b, p).
    ib, ip = np.unravel_index(np.argmax(image), image.shape)
    assert eb[ib] <= b < eb[ib + 1] and ep[ip] <= p < ep[ip + 1]


def test_pimage_h0_is_a_one_dimensional_gaussian_profile():
    # H0 births are all 0, so the image collapses to a 1-D Gaussian over persistence (Adams et
    # al. 2017); reference: scipy.stats.norm CDF differences over the pixels.
    sigma, death = 0.08, 1.1
    train = [PatternRecord(_diagrams([0.4, 2.0]))]
    pim = PersistenceImageFeatures(pixels=(4, 15), sigma=sigma, dims=(0,),
                                   weight_exponent=2.0, per_site=False).fit(train)
    profile = pim.transform([PatternRecord(_diagrams([death]))])[0]
    edges = pim.persistence_edges_[0]
    expected = death**2 * np.diff(scipy.stats.norm(death, sigma).cdf(edges))
    np.testing.assert_allclose(profile, expected, atol=1e-12)
    assert profile.sum() == pytest.approx(death**2, rel=1e-9)


def test_pimage_agrees_with_persim():
    # Reference library: persim.PersistenceImager with the same square pixels, Gaussian kernel
    # (persim takes the variance) and linear persistence weight.
    sigma = 0.125
    # Births span [1.0, 1.5] and persistence reaches 0.625, so the learned grid is
    # [0.875, 1.625] x [0, 0.75] in 6 x 6 pixels of 0.125 (exact in binary).
    train = [PatternRecord(_diagrams([1.0], [[1.0, 1.25], [1.5, 2.125], [1.25, 1.5]]))]
    pim = PersistenceImageFeatures(pixels=(6, 6), sigma=sigma, dims=(1,), per_site=False)
    pim.fit(train)
    np.testing.assert_allclose(pim.birth_edges_, np.arange(0.875, 1.626, 0.125))
    np.testing.assert_allclose(pim.persistence_edges_[1], np.arange(0.0, 0.751, 0.125))

    ref = PersistenceImager(birth_range=(0.875, 1.625), pers_range=(0.0, 0.75), pixel_size=0.125,
                            weight="persistence", weight_params={"n": 1.0},
                            kernel="gaussian", kernel_params={"sigma": sigma**2})
    rng = np.random.default_rng(3)
    births = rng.uniform(0.7, 1.9, 30)  # some outside the learned range on purpose
    bars = np.column_stack([births, births + rng.uniform(0.0, 0.9, 30)])
    ours = pim.transform([PatternRecord(_diagrams([1.0], bars))])[0].reshape(6, 6)
    np.testing.assert_allclose(ours, ref.transform(bars, skew=True), rtol=1e-9, atol=1e-12)


def test_pimage_per_site_divides_by_number_of_sites():
    # Per-site normalisation (our convention): n_sites = len(h0) + 1 when Diagrams lacks it.
    records = _records(3)
    raw = PersistenceImageFeatures(per_site=False).fit(records).transform(records)
    norm = PersistenceImageFeatures(per_site=True).fit(records).transform(records)
    n_sites = np.array([r.diagrams.h0.shape[0] + 1 for r in records])
    np.testing.assert_allclose(norm, raw / n_sites[:, None])


def test_per_site_features_do_not_change_with_the_field_of_view():
    # Our per-site convention: the same record seen over twice the area (every H1 bar twice,
    # twice the sites: two copies of the H0 bars plus the one bar that joins the copies) gives
    # the same H1 persistence image, H1 Betti curve and H1 barcode statistics.
    rng = np.random.default_rng(8)
    one = _random_diagrams(rng, n0=59, n1=30)
    two = _diagrams(np.r_[one.h0[:, 1], one.h0[:, 1], 1.0], np.vstack([one.h1, one.h1]))
    records = [PatternRecord(one), PatternRecord(two)]  # n_sites 59 + 1 = 60 and 119 + 1 = 120
    for est in (PersistenceImageFeatures(), BettiCurveFeatures(), BarcodeStatistics()):
        out = est.fit(records).transform(records)
        keep = [i for i, n in enumerate(est.get_feature_names_out())
                if n.startswith(("h1_", "betti1_")) and "entropy" not in n]
        assert len(keep) > 5
        np.testing.assert_allclose(out[0, keep], out[1, keep], rtol=1e-12, atol=1e-15)


# --- landscapes -------------------------------------------------------------------------------


def test_landscape_of_one_bar_is_the_tent():
    # Bubenik, "Statistical topological data analysis using persistence landscapes", JMLR 16
    # (2015): one bar (b, d) gives lambda_1(t) = max(0, min(t - b, d - t)), peak (d - b) / 2
    # at (b + d) / 2, and lambda_k = 0 for k >= 2.
    b, d = 0.8, 1.6
    plf = PersistenceLandscapeFeatures(n_landscapes=3, n_points=21)
    values = plf.fit([PatternRecord(_diagrams([1.0], [[b, d]]))]).transform(
        [PatternRecord(_diagrams([1.0], [[b, d]]))])[0].reshape(3, 21)
    t = plf.grids_[1]
    np.testing.assert_allclose(values[0], np.maximum(0, np.minimum(t - b, d - t)), atol=1e-12)
    assert values[0].max() == pytest.approx((d - b) / 2)
    assert t[np.argmax(values[0])] == pytest.approx((b + d) / 2)
    assert np.all(values[1:] == 0)


def test_landscapes_agree_with_persim_and_decrease_in_k():
    # Reference library: persim.PersLandscapeExact (exact piecewise-linear landscapes from the
    # critical points); lambda_k >= lambda_{k+1} everywhere (Bubenik 2015).
    rng = np.random.default_rng(7)
    births = rng.uniform(0.9, 1.8, 40)
    bars = np.column_stack([births, births + rng.exponential(0.3, 40)])
    record = PatternRecord(_diagrams([1.0], bars))
    k = 5
    plf = PersistenceLandscapeFeatures(n_landscapes=k, n_points=50).fit([record])
    ours = plf.transform([record])[0].reshape(k, 50)
    t = plf.grids_[1]
    ref = PersLandscapeExact(dgms=[bars], hom_deg=0)
    for depth in range(k):
        if depth < len(ref.critical_pairs):
            pairs = np.asarray(ref.critical_pairs[depth])
            expected = np.interp(t, pairs[:, 0], pairs[:, 1], left=0.0, right=0.0)
        else:
            expected = np.zeros_like(t)
        np.testing.assert_allclose(ours[depth], expected, atol=1e-9)
    assert np.all(np.diff(ours, axis=0) <= 1e-12)
    assert ours[0].max() > 0


def test_landscape_h0_option_and_names():
    records = _records(3)
    plf = PersistenceLandscapeFeatures(n_landscapes=2, n_points=4, dims=(0, 1)).fit(records)
    names = list(plf.get_feature_names_out())
    assert len(names) == 2 * 2 * 4 and names[0].startswith("h0_landscape_k1_t")
    assert all(re.fullmatch(r"h[01]_landscape_k[12]_t\d+\.\d{2,}", n) for n in names)
    # H0 bars (0, d): lambda_1 at t is the largest min(t, d - t) (Bubenik 2015).
    d = records[0].diagrams.h0[:, 1]
    t = plf.grids_[0]
    lam1 = np.max(np.maximum(0, np.minimum(t[None, :], d[:, None] - t[None, :])), axis=0)
    np.testing.assert_allclose(plf.transform(records[:1])[0, :4], lam1)


# --- Betti curves -----------------------------------------------------------------------------


def test_betti_curves_count_components_and_ripser_loops():
    # beta_0(t) is the number of connected components of the graph joining points closer than
    # t (scipy.sparse.csgraph.connected_components); the H0 diagram comes from scipy's minimum
    # spanning tree (a finite H0 bar dies at each MST edge, common practice). beta_1(t) is
    # checked against ripser's H1 bars counted directly.
    rng = np.random.default_rng(11)
    xy = rng.uniform(0, 1, size=(60, 2))
    dist = squareform(pdist(xy))
    mst = minimum_spanning_tree(dist).toarray()
    h0_deaths = mst[mst > 0]
    h1 = ripser.ripser(xy, maxdim=1)["dgms"][1]
    # ripser's finite H0 deaths are the same MST edge lengths (ripser stores float32).
    rips_h0 = ripser.ripser(xy, maxdim=0)["dgms"][0][:-1, 1]
    np.testing.assert_allclose(np.sort(rips_h0), np.sort(h0_deaths), rtol=1e-6)

    record = PatternRecord(_diagrams(h0_deaths, h1, max_scale=0.4))
    betti = BettiCurveFeatures(n_points=40, per_site=False).fit([record])
    values = betti.transform([record])[0]
    grid = betti.grid_
    for i, t in enumerate(grid):
        n_comp, _ = connected_components(dist <= t, directed=False)
        assert values[i] == n_comp
        assert values[40 + i] == np.count_nonzero((h1[:, 0] <= t) & (t < h1[:, 1]))
    assert values[40:].max() > 0  # the cloud has loops at these scales
    per_site = BettiCurveFeatures(n_points=40).fit([record]).transform([record])[0]
    np.testing.assert_allclose(per_site, values / 60)


def test_betti_grid_from_max_scale_or_fixed():
    records = _records(2, max_scale=2.0)
    fitted = BettiCurveFeatures(n_points=4).fit(records)
    np.testing.assert_allclose(fitted.grid_, [0.25, 0.75, 1.25, 1.75])
    assert list(fitted.get_feature_names_out()[:2]) == ["betti0_t0.25", "betti0_t0.75"]
    fixed = BettiCurveFeatures(n_points=2, t_max=1.0, dims=(1,)).fit(records)
    assert list(fixed.get_feature_names_out()) == ["betti1_t0.25", "betti1_t0.75"]


# --- barcode statistics -----------------------------------------------------------------------


def test_barcode_summary_against_numpy_and_scipy():
    rng = np.random.default_rng(5)
    d = _random_diagrams(rng, n0=50, n1=30, max_scale=2.0)
    s = barcode_summary(d, quantiles=(0.25, 0.5, 0.9))
    for dim, bars in ((0, d.h0), (1, d.h1)):
        lengths = bars[:, 1] - bars[:, 0]
        p = f"h{dim}_"
        # H1 bars are counted above the noise floor (0.2 spacings) or when cut at the limit.
        counted = len(lengths) if dim == 0 else np.sum((lengths > 0.2) | (bars[:, 1] >= 2.0))
        assert s[p + "count"] == counted
        assert s[p + "length_sum"] == pytest.approx(lengths.sum())
        assert s[p + "length_mean"] == pytest.approx(np.mean(lengths))
        assert s[p + "length_variance"] == pytest.approx(np.var(lengths))  # population variance
        assert s[p + "length_max"] == pytest.approx(np.max(lengths))
        # Hyndman & Fan type 7 quantiles, as scipy.stats.mstats.mquantiles(alphap=1, betap=1).
        ref_q = scipy.stats.mstats.mquantiles(lengths, [0.25, 0.5, 0.9], alphap=1, betap=1)
        for q, value in zip(("0.25", "0.5", "0.9"), ref_q, strict=True):
            assert s[f"{p}length_q{q}"] == pytest.approx(value)
        # Persistent entropy (Chintakunta et al. 2015; Rucco et al. 2016): Shannon entropy of
        # p_i = l_i / sum(l), which scipy.stats.entropy computes after normalising.
        assert s[p + "entropy"] == pytest.approx(scipy.stats.entropy(lengths))
        # Pielou's evenness J = E / log(n) (Pielou, J. Theor. Biol. 13, 1966).
        assert s[p + "entropy_normalised"] == pytest.approx(
            scipy.stats.entropy(lengths) / np.log(len(lengths)))
        n_sites = len(d.h0) + 1
        assert s[p + "count_per_site"] == pytest.approx(counted / n_sites)
        assert s[p + "length_sum_per_site"] == pytest.approx(lengths.sum() / n_sites)
    assert s["h1_truncated_count"] == np.count_nonzero(d.h1[:, 1] >= 2.0) > 0
    assert s["h1_count_raw"] == len(d.h1) > s["h1_count"]
    assert s["n_sites_counted"] == s["n_sites"] == len(d.h0) + 1


def test_h1_count_ignores_site_noise_and_counts_vacancies():
    # Elementary geometry: a perfect triangular lattice has no H1 bar of positive length and an
    # isolated vacancy one bar of length sqrt(3) - 1 = 0.73 spacings. Site finding on a rendered
    # image adds position noise, which opens hundreds of tiny loops; the count must see only
    # the vacancies (here 6, placed at least 3 spacings apart).
    from topoclass.persistence import pattern_persistence
    from topoclass.sites import find_sites
    from topoclass.synth import hexagonal_lattice, render_micrograph

    a, shape = 16.0, (400, 400)
    xy = hexagonal_lattice(shape, a, angle=7.0)
    targets = np.array([[120, 120], [200, 120], [280, 120], [120, 260], [200, 260], [280, 260]])
    centre = np.array([np.argmin(np.hypot(*(xy - t).T)) for t in targets])
    assert np.min(pdist(xy[centre])) > 3 * a
    for sites, expected in ((xy, 0), (np.delete(xy, centre, axis=0), 6)):
        image = render_micrograph(sites, shape, 5.0, noise=0.15, blur=1.0, seed=1)
        s = barcode_summary(pattern_persistence(find_sites(image)))
        assert s["h1_count"] == expected
        assert s["h1_count_raw"] > 100  # the noise loops are there, just not counted


def test_persistent_entropy_of_equal_bars_is_log_n():
    # Equal bars maximise persistent entropy at log(n) (Chintakunta et al. 2015).
    s = barcode_summary(_diagrams(np.full(8, 1.0), [[1.0, 1.5]] * 5))
    assert s["h0_entropy"] == pytest.approx(np.log(8))
    assert s["h1_entropy"] == pytest.approx(np.log(5))
    assert s["h0_entropy_normalised"] == pytest.approx(1.0)  # Pielou's J of an even sample
    assert s["h0_length_variance"] == 0.0


def test_per_site_values_use_the_site_counts_the_record_carries():
    # Divide by n_interior (sites the kept bars are charged to), else n_sites, else len(h0) + 1.
    @dataclass(frozen=True)
    class DiagramsWithSites(Diagrams):
        n_sites: int = 0
        n_interior: int = 0

    base = _diagrams([1.0, 1.2, 0.9], [[1.0, 1.5]])
    fields = {k: getattr(base, k) for k in ("h0", "h1", "h1_truncated", "h0_edges", "h1_edges",
                                            "spacing", "max_scale")}
    for n_sites, n_interior, divisor in ((12, 10, 10), (12, 0, 12), (0, 0, 4)):
        d = DiagramsWithSites(**fields, n_sites=n_sites, n_interior=n_interior)
        bs = BarcodeStatistics().fit([d])
        row = bs.transform([d])[0]
        assert row[_column(bs, "h1_length_sum_per_site")] == pytest.approx(0.5 / divisor)
        assert row[_column(bs, "h0_count_per_site")] == pytest.approx(3 / divisor)
        assert barcode_summary(d)["n_sites_counted"] == divisor
        assert barcode_summary(d)["n_sites"] == (n_sites or 4)


def test_barcode_statistics_names_and_raw_option():
    records = _records(3)
    per_site = BarcodeStatistics().fit(records)
    names = list(per_site.get_feature_names_out())
    assert {"h0_length_variance", "h1_length_sum_per_site", "h1_entropy_normalised",
            "h1_length_q0.9", "h1_truncated_per_site"} <= set(names)
    raw = BarcodeStatistics(per_site=False).fit(records)
    assert {"h1_length_sum", "h1_count", "h1_truncated_count", "h1_entropy"} <= set(
        raw.get_feature_names_out())
    for record, row in zip(records, raw.transform(records), strict=True):
        assert row[_column(raw, "h1_length_sum")] == pytest.approx(record.diagrams.lengths(1).sum())


# --- ideal lattice ----------------------------------------------------------------------------


def test_ideal_lattice_residuals_vanish_on_an_ideal_lattice_only():
    # An ideal triangular lattice: every finite H0 bar dies at the spacing, and a Rips triangle
    # enters at its longest edge, so every 1-cycle is a boundary when it is born and no H1 bar
    # has positive length; both measures are 0 (common practice); diagrams from ripser.
    xy = _hex_lattice()
    perfect = PatternRecord(_rips_diagrams(xy, 2.5))
    rng = np.random.default_rng(2)
    jittered = PatternRecord(_rips_diagrams(xy + rng.normal(scale=0.08, size=xy.shape), 2.5))
    pgr = IdealLatticeResiduals().fit([perfect, jittered])
    assert list(pgr.get_feature_names_out()) == ["h0_length_variance", "h1_length_sum_per_site"]
    values = pgr.transform([perfect, jittered])
    assert np.all(np.abs(values[0]) < 1e-6)  # ripser works in float32
    assert np.all(values[1] > 1e-4)
    raw = IdealLatticeResiduals(per_site=False).fit([jittered])
    assert list(raw.get_feature_names_out()) == ["h0_length_variance", "h1_length_sum"]
    s = barcode_summary(jittered.diagrams)
    np.testing.assert_allclose(raw.transform([jittered])[0],
                               [s["h0_length_variance"], s["h1_length_sum"]])


# --- order measures ---------------------------------------------------------------------------


def test_order_measures_selected_in_order_and_missing_keys_reported():
    records = _records(3)
    om = OrderMeasureFeatures().fit(records)
    assert list(om.get_feature_names_out()) == list(DEFAULT_ORDER_KEYS)
    expected = [[r.order[k] for k in DEFAULT_ORDER_KEYS] for r in records]
    np.testing.assert_array_equal(om.transform(records), expected)
    two = OrderMeasureFeatures(keys=("nn_cv", "psi6_global")).fit(records)
    np.testing.assert_array_equal(two.transform(records)[:, 0], [r.order["nn_cv"] for r in records])

    broken = PatternRecord(records[0].diagrams, {"psi6_global": 0.9}, source="pore_017.tif")
    with pytest.raises(TopoclassError, match=r"pore_017\.tif.*psi6_local_mean"):
        OrderMeasureFeatures().fit(records + [broken])
    with pytest.raises(TopoclassError, match="pore_017"):
        om.transform([broken])
    with pytest.raises(TopoclassError, match="not a PatternRecord"):
        om.fit([records[0].diagrams])


# --- scikit-learn estimator rules -------------------------------------------------------------

# Checks from sklearn.utils.estimator_checks that need no data, run as they are. All others fit
# on random 2-D float arrays, which these transformers do not take (their input is a list of
# PatternRecords; the tag input_tags.two_d_array is False, so check_estimator skips them all).
# Skipped for that reason: check_estimators_overwrite_params, check_dont_overwrite_parameters,
# check_estimators_fit_returns_self, check_fit_idempotent, check_estimators_pickle,
# check_dict_unchanged, check_methods_subset_invariance, check_methods_sample_order_invariance,
# check_transformer_general, check_n_features_in*, check_fit2d_*, check_fit1d, dtype/NaN/sparse
# checks. The first eight are re-done below on PatternRecord records, following the same logic.
DATA_FREE_CHECKS = [
    ec.check_estimator_cloneable,
    ec.check_estimator_repr,
    ec.check_estimator_tags_renamed,
    ec.check_valid_tag_types,
    ec.check_no_attributes_set_in_init,
    ec.check_parameters_default_constructible,
    ec.check_get_params_invariance,
    ec.check_set_params,
    ec.check_do_not_raise_errors_in_init_or_set_params,
    ec.check_mixin_order,
    ec.check_get_feature_names_out_error,
]


@pytest.mark.parametrize("check", DATA_FREE_CHECKS, ids=lambda c: c.__name__)
@pytest.mark.parametrize("cls", TRANSFORMERS, ids=lambda c: c.__name__)
def test_sklearn_data_free_checks(cls, check):
    check(cls.__name__, cls())


@pytest.mark.parametrize("cls", TRANSFORMERS, ids=lambda c: c.__name__)
def test_sklearn_rules_on_records(cls):
    # The logic of sklearn's check_estimators_overwrite_params, check_dont_overwrite_parameters,
    # check_estimators_fit_returns_self, check_fit_idempotent, check_estimators_pickle,
    # check_dict_unchanged, check_methods_subset_invariance and
    # check_methods_sample_order_invariance, on PatternRecord records.
    train, test = _records(5, seed=1), _records(4, seed=2)
    est = cls()
    params = joblib.hash(est.get_params())
    attrs_before = set(vars(est))
    assert est.fit(train) is est
    assert joblib.hash(est.get_params()) == params
    new = set(vars(est)) - attrs_before
    assert new and all(a.endswith("_") and not a.startswith("_") for a in new)

    out = est.transform(test)
    names = est.get_feature_names_out()
    assert out.shape == (len(test), len(names)) and out.dtype == np.float64
    assert len(set(names)) == len(names) and all(isinstance(n, str) for n in names)
    assert np.all(np.isfinite(out))

    state = joblib.hash(vars(est))
    np.testing.assert_array_equal(est.transform(test), out)  # deterministic
    assert joblib.hash(vars(est)) == state  # transform does not change the estimator
    np.testing.assert_array_equal(est.transform(np.array(test, dtype=object)), out)
    np.testing.assert_array_equal(est.transform(test[::-1]), out[::-1])
    np.testing.assert_array_equal(np.vstack([est.transform([r]) for r in test]), out)
    np.testing.assert_array_equal(est.fit(train).transform(test), out)  # fit is idempotent
    np.testing.assert_array_equal(pickle.loads(pickle.dumps(est)).transform(test), out)
    np.testing.assert_array_equal(est.fit_transform(train), est.transform(train))

    cloned = clone(est)
    assert cloned.get_params() == est.get_params()
    with pytest.raises(NotFittedError):
        cloned.transform(test)
    assert not hasattr(est, "n_features_in_")  # input is records, not columns (documented)


@pytest.mark.parametrize("cls", TRANSFORMERS[:-1], ids=lambda c: c.__name__)
def test_unseen_ranges_and_empty_h1(cls):
    # Bars beyond the learned grid are clipped by the grid, not an error; an empty H1 diagram
    # gives zeros where H1 has nothing to count.
    train = _records(4, seed=3, max_scale=2.0)
    est = cls().fit(train)
    names = est.get_feature_names_out()
    far = PatternRecord(_diagrams([0.1, 3.0, 7.0], [[0.1, 0.2], [4.0, 9.0], [1.0, 6.0]],
                                  max_scale=9.0))
    empty = PatternRecord(_diagrams([1.0, 1.0, 1.1], []))
    nothing = PatternRecord(_diagrams([], []))
    out = est.transform([far, empty, nothing])
    assert out.shape == (3, len(names)) and np.all(np.isfinite(out))
    h1_columns = [i for i, n in enumerate(names)
                  if n.startswith(("h1_", "betti1_")) and "truncated" not in n]
    assert h1_columns and np.all(out[1:, h1_columns] == 0)


def test_bad_input_gives_clear_errors():
    records = _records(2)
    with pytest.raises(TopoclassError, match="list"):
        BarcodeStatistics().fit(np.zeros((3, 4)))
    with pytest.raises(TopoclassError, match="wrap it in a list"):
        BarcodeStatistics().fit(records[0])
    with pytest.raises(TopoclassError, match="item 1"):
        BarcodeStatistics().fit([records[0], "membrane.tif"])
    with pytest.raises(TopoclassError, match="no records"):
        BettiCurveFeatures().fit([])
    with pytest.raises(TopoclassError, match="pixels"):
        PersistenceImageFeatures(pixels=(0, 3)).fit(records)
    with pytest.raises(TopoclassError, match="sigma"):
        PersistenceImageFeatures(sigma=-1).fit(records)
    with pytest.raises(TopoclassError, match="dims"):
        PersistenceLandscapeFeatures(dims=(2,)).fit(records)
    with pytest.raises(TopoclassError, match="quantiles"):
        BarcodeStatistics(quantiles=(1.5,)).fit(records)


# --- feature sets -----------------------------------------------------------------------------


def test_feature_sets_names_shapes_and_params():
    assert set(FEATURE_SETS) == {"two-bar", "order", "topology", "all"}
    train, test = _records(6, seed=4), _records(3, seed=5)
    widths = {}
    for name in FEATURE_SETS:
        union = make_features(name).fit(train)
        names = list(union.get_feature_names_out())
        out = union.transform(test)
        assert out.shape == (3, len(names)) and len(set(names)) == len(names)
        widths[name] = len(names)
        if name == "two-bar":
            assert names == ["h0_length_variance", "h1_length_sum_per_site"]
        if name == "order":
            assert names == list(DEFAULT_ORDER_KEYS)
        if name == "all":
            assert names[-len(DEFAULT_ORDER_KEYS):] == list(DEFAULT_ORDER_KEYS)
            assert any(n.startswith("h1_pimage_b") for n in names)
            assert any(n.startswith("h1_landscape_k3_t") for n in names)
            assert "betti1_t1.15" in names and "h0_length_variance" in names
    assert widths["all"] == widths["topology"] + widths["order"]

    small = make_features("topology", pimage__pixels=(3, 2), betti__n_points=5)
    small.fit(train)
    assert sum(n.startswith("h1_pimage") for n in small.get_feature_names_out()) == 6
    assert sum(n.startswith("betti") for n in small.get_feature_names_out()) == 10
    with pytest.raises(TopoclassError, match="topology.*all"):
        make_features("everything")
    with pytest.raises(TopoclassError, match="pimage__sigma"):
        make_features("topology", pimage__sigmaa=0.2)


def test_feature_union_in_a_cross_validated_pipeline():
    # scikit-learn's cross_val_score indexes the list of records; the union must survive that.
    records = _records(12, seed=6)
    y = np.array([0, 1] * 6)
    model = make_pipeline(make_features("all"), StandardScaler(), LogisticRegression())
    scores = cross_val_score(model, records, y, cv=3)
    # Reference: the same folds (scikit-learn's StratifiedKFold, what cv=3 means for a
    # classifier) run by hand on plain Python lists of records.
    manual = []
    for train, test in StratifiedKFold(3).split(np.zeros(len(y)), y):
        fitted = clone(model).fit([records[i] for i in train], y[train])
        manual.append(np.mean(fitted.predict([records[i] for i in test]) == y[test]))
    np.testing.assert_allclose(scores, manual, rtol=0, atol=1e-12)


def test_acquisition_context_gives_spacing_in_pixels_and_site_density():
    from topoclass.vectorize import AcquisitionContext

    records = [PatternRecord(_diagrams(spacing=12.5), {"density_per_spacing2": 1.15}),
               PatternRecord(_diagrams(spacing=30.0), {})]
    values = AcquisitionContext().fit(records).transform(records)
    np.testing.assert_array_equal(values[0], [12.5, 1.15])
    assert values[1, 0] == 30.0 and np.isnan(values[1, 1])
    assert list(AcquisitionContext().fit(records).get_feature_names_out()) == [
        "spacing_px", "site_density"]
