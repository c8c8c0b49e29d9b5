"""Tests of topoclass.order against published values, formulas and scipy."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import Delaunay
from scipy.spatial.distance import pdist, squareform

from topoclass.errors import PatternError
from topoclass.order import (
    ORDER_MEASURE_KEYS,
    clark_evans,
    coordination,
    delaunay_neighbours,
    nearest_neighbour_distances,
    order_measures,
    psi6,
)
from topoclass.sites import SitePattern
from topoclass.synth import hexagonal_lattice

REQUIRED = ("psi6_global", "psi6_local_mean", "defect_fraction", "n5_fraction", "n7_fraction",
            "nn_cv", "clark_evans_r")


def _pattern(xy, shape, spacing, border_width=1.0, source=None):
    """A SitePattern whose border flags follow the site finder's rule (within one spacing)."""
    rows, cols = shape
    edge = border_width * spacing
    border = (
        (xy[:, 0] < edge) | (xy[:, 0] > cols - 1 - edge)
        | (xy[:, 1] < edge) | (xy[:, 1] > rows - 1 - edge)
    )
    return SitePattern(xy=xy, spacing=spacing, polarity="dark", border=border, shape=shape,
                       source=source)


def _poisson(n, side, seed):
    return np.random.default_rng(seed).uniform(0, side, (n, 2))


@pytest.mark.parametrize("angle", [0.0, 7.5, 13.7, 30.0, 45.0])
def test_psi6_is_one_on_a_perfect_triangular_lattice(angle):
    # Halperin & Nelson 1978: every bond of a perfect triangular lattice is at 60-degree
    # multiples of the lattice angle, so |psi6| = 1 at every site and for the mean, any rotation.
    xy = hexagonal_lattice((300, 340), 11.0, angle=angle)
    m = order_measures(_pattern(xy, (300, 340), 11.0))
    assert m["psi6_global"] == pytest.approx(1.0, abs=1e-9)
    assert m["psi6_local_mean"] == pytest.approx(1.0, abs=1e-9)
    assert m["defect_fraction"] == 0.0
    assert m["n5_fraction"] == m["n7_fraction"] == 0.0
    assert m["nn_cv"] == pytest.approx(0.0, abs=1e-9)
    # arg(psi6) / 6 is the lattice angle modulo 60 degrees.
    assert (m["lattice_angle_deg"] - angle + 30.0) % 60.0 == pytest.approx(30.0, abs=1e-6)


def test_psi6_matches_the_definition_site_by_site():
    # psi6(j) = (1/N_j) sum_k exp(6 i theta_jk) (Halperin & Nelson 1978), neighbours from the
    # triangles scipy's Delaunay returns, written out plainly here.
    xy = _poisson(150, 10.0, 1)
    tri = Delaunay(xy)
    nbrs = [set() for _ in range(len(xy))]
    for s in tri.simplices:
        for i in s:
            nbrs[i].update(int(k) for k in s if k != i)
    expected = np.array([
        np.mean([np.exp(6j * np.arctan2(*(xy[k] - xy[j])[::-1])) for k in nbrs[j]])
        for j in range(len(xy))
    ])
    np.testing.assert_allclose(psi6(xy), expected, atol=1e-12)
    np.testing.assert_array_equal(coordination(xy), [len(s) for s in nbrs])
    indptr, indices = delaunay_neighbours(xy)
    for j in (0, 17, 99):
        assert set(indices[indptr[j]:indptr[j + 1]].tolist()) == nbrs[j]


def test_poisson_pattern_has_no_orientational_order():
    # Halperin & Nelson 1978: no long-range bond order in a disordered pattern, |<psi6>| -> 0
    # (here about 1/sqrt(n) ~ 0.01 for n = 4000).
    side = 600.0
    xy = _poisson(4000, side, 2)
    m = order_measures(_pattern(xy, (side, side), side / np.sqrt(4000)))
    assert m["psi6_global"] < 0.05
    assert 0.2 < m["psi6_local_mean"] < 0.6


def test_poisson_voronoi_coordination_and_nn_spread():
    # Delaunay coordination = number of sides of the Voronoi cell. Poisson-Voronoi side-number
    # probabilities p5 = 0.2594, p6 = 0.2947, p7 = 0.1986 (Hinde & Miles 1980; values from
    # memory); Euler's formula gives mean 6 (common practice). NN distances of a Poisson
    # pattern are Rayleigh distributed: CV = sqrt(4/pi - 1) = 0.5227 (Clark & Evans 1954).
    side = 1400.0
    n = 25000
    xy = _poisson(n, side, 3)
    m = order_measures(_pattern(xy, (side, side), side / np.sqrt(n)))
    assert m["n5_fraction"] == pytest.approx(0.2594, abs=0.012)
    assert m["n7_fraction"] == pytest.approx(0.1986, abs=0.012)
    assert m["defect_fraction"] == pytest.approx(1 - 0.2947, abs=0.012)
    assert m["mean_coordination"] == pytest.approx(6.0, abs=0.03)
    assert m["nn_cv"] == pytest.approx(np.sqrt(4 / np.pi - 1), rel=0.03)


def test_clark_evans_is_one_for_poisson_with_donnelly_correction():
    # Clark & Evans 1954: R = 1 for a Poisson pattern; the window edge biases the plain index
    # upwards by about 0.41/sqrt(n) and Donnelly's (1978) correction removes it (coefficients
    # value from memory). Mean of 100 realisations of 500 points: standard error ~0.23 %
    # (Clark & Evans: SE = 0.26136 / sqrt(n * density) per realisation); tolerance 1 %.
    side = 1.0
    rs, plain = [], []
    for seed in range(100):
        xy = _poisson(500, side, 100 + seed)
        rs.append(clark_evans(xy, side * side, perimeter=4 * side))
        plain.append(clark_evans(xy, side * side))
    assert np.mean(rs) == pytest.approx(1.0, abs=0.01)
    assert np.mean(plain) > 1.01  # the bias the correction exists for


def test_clark_evans_is_one_for_poisson_with_border_method():
    # Border (guard-area) method, as order_measures uses it; 20 realisations of 3000 points,
    # standard error ~0.25 %; tolerance 1.5 %.
    side = 500.0
    spacing = side / np.sqrt(3000)
    rs = [order_measures(_pattern(_poisson(3000, side, 300 + s), (side, side), spacing,
                                  border_width=2.0))["clark_evans_r"] for s in range(20)]
    assert np.mean(rs) == pytest.approx(1.0, abs=0.015)


def test_clark_evans_hexagonal_packing():
    # Clark & Evans 1954: R = 2.1491 for hexagonal packing. Exact density 2 / (sqrt(3) a^2):
    a = 7.0
    xy = hexagonal_lattice((420, 420), a, angle=9.0)
    inner = np.all((xy > 2 * a) & (xy < 419 - 2 * a), axis=1)
    area = xy.shape[0] * np.sqrt(3.0) / 2.0 * a * a
    assert clark_evans(xy, area, focal=inner) == pytest.approx(2.1491, abs=5e-4)
    # Written out: every NN distance is a and the Poisson expectation 0.5 / sqrt(density) is
    # 0.5 a sqrt(sqrt(3) / 2), so R = 2 / sqrt(sqrt(3) / 2) = 2.14914, the paper's value.
    assert 2.0 / np.sqrt(np.sqrt(3.0) / 2.0) == pytest.approx(2.1491, abs=5e-5)


@pytest.mark.parametrize("size", [64, 96, 128, 200])
def test_clark_evans_of_a_perfect_lattice_on_small_frames(size):
    # Clark & Evans 1954: 2.1491 for hexagonal packing, whatever frame the lattice is cut to.
    # The density n / frame area scatters by several per cent here (a row of sites more or
    # less); the interior sites' own cells do not.
    rng = np.random.default_rng(size)
    a = 15.0
    for _ in range(5):
        xy = hexagonal_lattice((size, size), a, angle=rng.uniform(0, 60),
                               offset=tuple(rng.uniform(-a, a, 2)))
        m = order_measures(_pattern(xy, (size, size), a))
        assert m["clark_evans_r"] == pytest.approx(2.1491, abs=2e-4)


def test_clark_evans_of_poisson_patterns_on_small_frames():
    # Clark & Evans 1954: R = 1 for a Poisson pattern; SE = 0.26136 / sqrt(n) per realisation
    # (n interior sites, about 150 here: 2.1 %), 200 realisations: 0.15 %; tolerance 0.6 %.
    side = 160.0
    spacing = side / np.sqrt(300)
    cells, donnelly = [], []
    for s in range(200):
        p = _pattern(_poisson(300, side, 900 + s), (side, side), spacing, border_width=2.0)
        cells.append(order_measures(p)["clark_evans_r"])
        donnelly.append(order_measures(p, clark_evans_edge="donnelly")["clark_evans_r"])
    assert np.mean(cells) == pytest.approx(1.0, abs=0.006)
    # Donnelly 1978, all 300 sites (coefficients from memory): same target, smaller SE.
    assert np.mean(donnelly) == pytest.approx(1.0, abs=0.006)


def test_cell_areas_equal_scipy_voronoi():
    # scipy.spatial.Voronoi (qhull) is the reference; ConvexHull gives each bounded cell's area.
    from scipy.spatial import ConvexHull, Voronoi

    from topoclass.sites import triangulate

    xy = _poisson(800, 50.0, 5)
    ours = triangulate(xy).cell_area
    vor = Voronoi(xy)
    ref = np.full(len(xy), np.nan)
    for i, r in enumerate(vor.point_region):
        region = vor.regions[r]
        if region and -1 not in region:
            ref[i] = ConvexHull(vor.vertices[region]).volume
    np.testing.assert_array_equal(np.isnan(ours), np.isnan(ref))
    ok = ~np.isnan(ref)
    np.testing.assert_allclose(ours[ok], ref[ok], rtol=1e-10)


def test_keys_and_interior_only():
    xy = hexagonal_lattice((200, 220), 10.0, jitter=0.05, seed=4)
    p = _pattern(xy, (200, 220), 10.0)
    m = order_measures(p)
    assert set(REQUIRED) <= set(m) and tuple(m) == ORDER_MEASURE_KEYS
    assert all(isinstance(v, float) and np.isfinite(v) for v in m.values())
    # Border sites have spurious hull neighbours; only interior sites are counted. Reference:
    # coordination from scipy's Delaunay triangles and NN distances from a dense distance
    # matrix (scipy.spatial.distance), not this module's helpers.
    tri = Delaunay(xy)
    pairs = {tuple(sorted((int(i), int(j)))) for t in tri.simplices for i in t for j in t if i != j}
    c = np.bincount(np.array(sorted(pairs)).ravel(), minlength=len(xy))
    inner = ~p.border
    assert m["defect_fraction"] == pytest.approx(np.mean(c[inner] != 6), abs=1e-12)
    assert np.mean(c[p.border] != 6) > m["defect_fraction"]
    d = squareform(pdist(xy))
    np.fill_diagonal(d, np.inf)
    nn = d[inner].min(axis=1)
    np.testing.assert_allclose(nearest_neighbour_distances(xy, focal=inner), nn, rtol=1e-12)
    assert m["nn_cv"] == pytest.approx(nn.std() / nn.mean(), rel=1e-12)
    assert m["nn_mean_per_spacing"] == pytest.approx(nn.mean() / 10.0, rel=1e-12)


def test_bad_patterns_get_a_pattern_error_naming_the_file():
    line = np.column_stack([np.arange(10.0) * 5 + 20, np.full(10, 30.0)])
    with pytest.raises(PatternError, match="pores_3.tif.*one line"):
        order_measures(_pattern(line, (60, 100), 5.0, source="pores_3.tif"))
    edge = np.array([[0.0, 0.0], [5.0, 0.0], [0.0, 5.0], [5.0, 5.0]])
    with pytest.raises(PatternError, match="pores_4.tif.*interior"):
        order_measures(_pattern(edge, (6, 6), 5.0, source="pores_4.tif"))
    with pytest.raises(PatternError, match="too few"):
        delaunay_neighbours(np.zeros((2, 2)))
    # The only interior site is a corner of the convex hull: its Voronoi cell is unbounded.
    hull = np.array([[5.0, 5.0], [95.0, 5.0], [50.0, 50.0], [30.0, 6.0], [70.0, 7.0]])
    with pytest.raises(PatternError, match="pores_5.tif.*bounded Voronoi cell"):
        order_measures(_pattern(hull, (100, 100), 10.0, source="pores_5.tif"))


@pytest.mark.parametrize("angle", [0.0, 17.0, 45.0])
def test_psi4_tells_a_square_lattice_from_a_triangular_one(angle):
    # Fourfold bond order over the 4 nearest neighbours (common practice for square order):
    # every bond of a perfect square lattice is at a multiple of 90 degrees from the lattice
    # angle, so |psi4| = 1 at every interior site, any rotation. On a perfect triangular lattice
    # the 6 neighbours are tied, so exact values depend on which 4 are taken; with a small
    # jitter they are far below 1 (|1 + e^{4i 60} + e^{4i 120} + 1| / 4 = 0.25 for one choice).
    from topoclass.order import psi4
    from topoclass.synth import square_lattice

    shape = (300, 320)
    sq = square_lattice(shape, 12.0, angle=angle)
    m = order_measures(_pattern(sq, shape, 12.0))
    assert m["psi4_local_mean"] == pytest.approx(1.0, abs=1e-9)
    assert m["psi4_global"] == pytest.approx(1.0, abs=1e-9)
    hexagonal = hexagonal_lattice(shape, 12.0, angle=angle, jitter=0.03, seed=1)
    m_hex = order_measures(_pattern(hexagonal, shape, 12.0))
    assert m_hex["psi4_local_mean"] < 0.6 and m_hex["psi6_local_mean"] > 0.8
    # The definition written out for one site: the four nearest bonds, exp(4 i theta).
    j = int(np.argmin(np.hypot(*(sq - sq.mean(axis=0)).T)))
    d = np.hypot(*(sq - sq[j]).T)
    nearest = np.argsort(d)[1:5]
    theta = np.arctan2(*(sq[nearest] - sq[j])[:, ::-1].T)
    assert psi4(sq)[j] == pytest.approx(np.exp(4j * theta).mean(), abs=1e-9)
