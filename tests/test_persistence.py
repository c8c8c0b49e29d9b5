"""Tests of topoclass.persistence against geometry, scipy, ripser (dense) and persim."""

from __future__ import annotations

import numpy as np
import persim
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from ripser import ripser
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial.distance import pdist, squareform

from topoclass.errors import PatternError, TopoclassError
from topoclass.persistence import Diagrams, pattern_persistence, rips_persistence
from topoclass.sites import SitePattern
from topoclass.synth import hexagonal_lattice

SQRT3 = np.sqrt(3.0)
# ripser stores distances as float32, so H1 values carry a relative error of about 1e-7.
F32 = 1e-6


def _pattern(xy, shape, spacing, border_width=1.0):
    """A SitePattern whose border flags follow the site finder's rule (within one spacing)."""
    rows, cols = shape
    edge = border_width * spacing
    border = (
        (xy[:, 0] < edge) | (xy[:, 0] > cols - 1 - edge)
        | (xy[:, 1] < edge) | (xy[:, 1] > rows - 1 - edge)
    )
    return SitePattern(xy=xy, spacing=spacing, polarity="dark", border=border, shape=shape)


def _square_grid(a, nx, ny):
    gx, gy = np.meshgrid(np.arange(nx) * a, np.arange(ny) * a)
    return np.column_stack([gx.ravel(), gy.ravel()])


def _sorted_bars(bars):
    bars = np.asarray(bars, dtype=float).reshape(-1, 2)
    return bars[np.lexsort((bars[:, 1], bars[:, 0]))]


# ----------------------------------------------------------------------------- exact lattices


@pytest.mark.parametrize("angle", [0.0, 11.0])
@pytest.mark.parametrize("exclude_border", [True, False])
def test_perfect_triangular_lattice(angle, exclude_border):
    # Common practice: every lattice edge enters at the spacing a, so all finite H0 bars die at
    # a (variance 0); a Rips triangle enters at its longest edge, so on an equilateral lattice
    # every 1-cycle is a boundary when it is born and no H1 bar has positive length.
    a = 12.0
    xy = hexagonal_lattice((300, 360), a, angle=angle)
    d = pattern_persistence(_pattern(xy, (300, 360), a), exclude_border=exclude_border)
    assert d.h0.shape[0] > 100
    np.testing.assert_allclose(d.h0[:, 0], 0.0)
    np.testing.assert_allclose(d.h0[:, 1], 1.0, rtol=1e-12)
    assert np.var(d.lengths(0)) < 1e-20
    assert d.h1.shape == (0, 2)
    assert d.n_sites == len(xy)
    assert d.essential_count(0) == 1 and d.essential_count(1) == 0


@pytest.mark.parametrize("exclude_border", [True, False])
def test_one_vacancy_gives_one_bar_from_a_to_sqrt3_a(exclude_border):
    # Elementary geometry of the hexagon around a vacancy: its six sides (length a) close the
    # loop at a; its short diagonals (sqrt(3) a) fill it; nothing else in the lattice is a loop.
    a = 10.0
    shape = (260, 300)
    xy = hexagonal_lattice(shape, a, angle=5.0)
    centre = np.argmin(np.hypot(xy[:, 0] - 150, xy[:, 1] - 130))
    hole = xy[centre]
    xy = np.delete(xy, centre, axis=0)
    d = pattern_persistence(_pattern(xy, shape, a), exclude_border=exclude_border,
                            birth_edges="all")
    assert d.h1.shape == (1, 2)
    np.testing.assert_allclose(d.h1[0], [1.0, SQRT3], rtol=F32)
    assert not d.h1_truncated[0]
    # The birth edge is a side of the hexagon: both ends one spacing from the vacancy.
    ends = xy[d.h1_edges[0]]
    np.testing.assert_allclose(np.hypot(*(ends - hole).T), a, rtol=1e-9)
    np.testing.assert_allclose(d.in_pixels(1)[0], [a, SQRT3 * a], rtol=F32)
    np.testing.assert_allclose(d.bars_in_pixels(1), d.in_pixels(1))


@pytest.mark.parametrize(
    ("offsets", "death"),
    [
        # di-vacancy: two adjacent sites missing; the widest triangle over the hole still has
        # sides a, sqrt(3) a, sqrt(3) a, so the loop dies at sqrt(3) a, like a single vacancy.
        ([(0.0, 0.0), (1.0, 0.0)], SQRT3),
        # tri-vacancy (three mutually adjacent) and three in a row: the loop around them is
        # filled only when edges of length 2 a appear.
        ([(0.0, 0.0), (1.0, 0.0), (0.5, SQRT3 / 2)], 2.0),
        ([(0.0, 0.0), (1.0, 0.0), (2.0, 0.0)], 2.0),
    ],
)
def test_multi_vacancy_death_scales_match_dense_ripser(offsets, death):
    # Elementary geometry (above), checked against dense ripser on the same cloud.
    a = 1.0
    xy = hexagonal_lattice((14, 14), a) - 7.0
    centre = xy[np.argmin(np.hypot(*xy.T))]
    gone = np.zeros(len(xy), dtype=bool)
    for dx, dy in offsets:
        gone |= np.hypot(*(xy - centre - (dx, dy)).T) < 1e-6
    assert gone.sum() == len(offsets)
    xy = xy[~gone]
    dense = ripser(xy, maxdim=1)["dgms"][1]
    dense = dense[dense[:, 1] - dense[:, 0] > F32]
    ours = rips_persistence(xy, max_scale=2.5)["h1"]
    ours = ours[ours[:, 1] - ours[:, 0] > F32]
    np.testing.assert_allclose(dense, [[1.0, death]], rtol=F32)
    np.testing.assert_allclose(ours, dense, rtol=F32)


def test_square_lattice_bars_from_a_to_sqrt2_a():
    # Elementary geometry of the square: a 4-cycle of sides a is born at a and filled when the
    # diagonals (sqrt(2) a) appear; each unit square is one independent loop.
    a, nx, ny = 3.0, 17, 12
    xy = _square_grid(a, nx, ny)
    raw = rips_persistence(xy, max_scale=2.5 * a)
    assert raw["h1"].shape == ((nx - 1) * (ny - 1), 2)
    np.testing.assert_allclose(raw["h1"][:, 0], a, rtol=F32)
    np.testing.assert_allclose(raw["h1"][:, 1], np.sqrt(2.0) * a, rtol=F32)
    np.testing.assert_allclose(raw["h0"][:, 1], a, rtol=1e-12)


def test_tied_death_edges_are_shared_out_one_diagonal_per_square():
    # Elementary geometry: every loop of the square lattice dies at sqrt(2) a, so all 176 bars
    # tie with each other and with all 2 * 176 diagonals. The k-th bar gets the k-th diagonal;
    # each must be a different diagonal of length sqrt(2) a, and no two may cross the same
    # square (the two diagonals of a square share its centre).
    a, nx, ny = 3.0, 17, 12
    xy = _square_grid(a, nx, ny)
    raw = rips_persistence(xy, max_scale=2.5 * a)
    edges = raw["h1_death_edges"]
    assert edges.shape == ((nx - 1) * (ny - 1), 2) and np.all(edges >= 0)
    lengths = np.hypot(*(xy[edges[:, 0]] - xy[edges[:, 1]]).T)
    np.testing.assert_allclose(lengths, np.sqrt(2.0) * a, rtol=F32)
    assert np.unique(np.sort(edges, axis=1), axis=0).shape[0] == edges.shape[0]
    centres = 0.5 * (xy[edges[:, 0]] + xy[edges[:, 1]])
    assert np.unique(np.round(centres / a, 6), axis=0).shape[0] == edges.shape[0]


def test_given_triangulation_gives_the_same_result_as_computing_it():
    # The pattern's shared triangulation (SitePattern.delaunay) must not change any output,
    # duplicates included (they fold into their first copy).
    xy = hexagonal_lattice((120, 120), 10.0, jitter=0.0, seed=0)
    xy = np.vstack([np.delete(xy, [40, 41, 77], axis=0), xy[:4]])
    pattern = _pattern(xy, (120, 120), 10.0)
    given_tri = rips_persistence(xy / 10.0, max_scale=2.5, border=pattern.border, guard=1.0,
                                 delaunay=pattern.delaunay)
    own = rips_persistence(xy / 10.0, max_scale=2.5, border=pattern.border, guard=1.0)
    for key, value in own.items():
        np.testing.assert_array_equal(given_tri[key], value, err_msg=key)


# ----------------------------------------------------------------- reference libraries


def test_h0_deaths_equal_mst_of_dense_distance_matrix():
    # Reference: scipy.sparse.csgraph.minimum_spanning_tree on the dense distance matrix
    # (single linkage = Rips H0, common practice).
    rng = np.random.default_rng(7)
    for xy in (rng.uniform(0, 20, (500, 2)), hexagonal_lattice((200, 200), 9.0, jitter=0.1)):
        reference = np.sort(minimum_spanning_tree(squareform(pdist(xy))).data)
        # H0 does not depend on the radius limit: a disconnected radius graph (limit 1 px) goes
        # through the Delaunay graph, a connected one (limit 50 px) through its own MST.
        np.testing.assert_allclose(
            rips_persistence(xy, max_scale=50.0)["h0"][:, 1], reference, rtol=1e-12
        )
        raw = rips_persistence(xy, max_scale=1.0)
        np.testing.assert_allclose(raw["h0"][:, 1], reference, rtol=1e-12)
        ends = xy[raw["h0_edges"]]
        np.testing.assert_allclose(np.hypot(*(ends[:, 0] - ends[:, 1]).T), reference, rtol=1e-12)


@pytest.mark.parametrize("kind", ["poisson", "jittered"])
def test_radius_limited_equals_dense_ripser_below_max_scale(kind):
    # Reference: ripser on the point cloud with no threshold (the full filtration).
    rng = np.random.default_rng(3)
    if kind == "poisson":
        xy, max_scale = rng.uniform(0, 12, (600, 2)), 0.8
    else:
        xy, max_scale = hexagonal_lattice((240, 240), 10.0, jitter=0.12, seed=4) / 10.0, 1.3
    raw = rips_persistence(xy, max_scale=max_scale)
    dense = ripser(xy, maxdim=1)["dgms"]
    d0 = np.sort(dense[0][np.isfinite(dense[0][:, 1]), 1])
    np.testing.assert_allclose(raw["h0"][:, 1], d0, rtol=F32)
    d1 = dense[1]
    below = d1[d1[:, 1] < max_scale]
    mine = raw["h1"][~raw["h1_truncated"]]
    assert below.shape[0] > 5
    np.testing.assert_allclose(_sorted_bars(mine), _sorted_bars(below), rtol=F32)
    # Classes born below the limit and dying above it are the truncated bars, same births.
    alive = d1[(d1[:, 0] < max_scale) & (d1[:, 1] >= max_scale)]
    trunc = raw["h1"][raw["h1_truncated"]]
    assert trunc.shape[0] == alive.shape[0]
    np.testing.assert_allclose(np.sort(trunc[:, 0]), np.sort(alive[:, 0]), rtol=F32)
    np.testing.assert_allclose(trunc[:, 1], max_scale)


def test_birth_edges_have_the_birth_length():
    rng = np.random.default_rng(11)
    xy = rng.uniform(0, 15, (800, 2))
    raw = rips_persistence(xy, max_scale=1.2)
    ends = xy[raw["h1_edges"]]
    length = np.hypot(*(ends[:, 0] - ends[:, 1]).T)
    np.testing.assert_allclose(length, raw["h1"][:, 0], rtol=F32)


@settings(max_examples=25, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    eps=st.floats(1e-3, 0.2),
    n=st.integers(20, 90),
)
def test_stability_under_bounded_perturbation(seed, eps, n):
    # Stability theorem (Cohen-Steiner, Edelsbrunner & Harer 2007; for Rips filtrations Chazal,
    # de Silva & Oudot 2014): moving each site by at most eps changes each pairwise distance by
    # at most 2 eps, so with ripser's convention (filtration value = distance, not radius) the
    # filtrations are 2 eps apart in sup norm and the bottleneck distance is at most 2 eps.
    # Truncation at max_scale is the filtration min(f, max_scale), 1-Lipschitz in f: same bound.
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 5, (n, 2))
    angle = rng.uniform(0, 2 * np.pi, n)
    radius = eps * np.sqrt(rng.uniform(0, 1, n))
    moved = xy + radius[:, None] * np.column_stack([np.cos(angle), np.sin(angle)])
    a = rips_persistence(xy, max_scale=1.5)
    b = rips_persistence(moved, max_scale=1.5)
    for key in ("h0", "h1"):
        assert persim.bottleneck(a[key], b[key]) <= 2 * eps + 1e-5


# ------------------------------------------------------------------------------- robustness


def test_duplicate_sites_are_merged():
    # A sparse matrix cannot hold a zero distance; duplicates must not split the cloud.
    rng = np.random.default_rng(5)
    xy = rng.uniform(0, 10, (300, 2))
    doubled = np.vstack([xy, xy[:40]])
    a = rips_persistence(xy, max_scale=1.0)
    b = rips_persistence(doubled, max_scale=1.0)
    assert b["n_sites"] == 300
    np.testing.assert_allclose(b["h0"], a["h0"])
    np.testing.assert_allclose(b["h1"], a["h1"])
    assert b["h1_edges"].max() < 300


def test_collinear_and_tiny_clouds():
    xy = np.column_stack([np.array([0.0, 1.0, 3.0, 6.0]), np.zeros(4)])
    raw = rips_persistence(xy, max_scale=5.0)
    np.testing.assert_allclose(raw["h0"][:, 1], [1.0, 2.0, 3.0])
    assert raw["h1"].shape == (0, 2)
    for n in (0, 1, 2):
        raw = rips_persistence(np.ones((n, 2)) * np.arange(n)[:, None], max_scale=1.0)
        assert raw["h0"].shape == (max(n - 1, 0), 2)


def test_bad_input_gets_a_topoclass_error():
    with pytest.raises(PatternError, match="NaN"):
        rips_persistence(np.array([[0.0, np.nan], [1.0, 1.0]]), max_scale=1.0)
    with pytest.raises(TopoclassError, match="shape"):
        rips_persistence(np.zeros((4, 3)), max_scale=1.0)
    with pytest.raises(ValueError, match="max_scale"):
        rips_persistence(np.zeros((4, 2)), max_scale=0.0)
    bad = SitePattern(xy=np.zeros((3, 2)), spacing=0.0, polarity="dark",
                      border=np.zeros(3, bool), shape=(10, 10), source="pores_07.tif")
    with pytest.raises(PatternError, match="pores_07.tif"):
        pattern_persistence(bad)


def test_diagrams_round_trip_through_npz(tmp_path):
    xy = hexagonal_lattice((200, 200), 10.0, jitter=0.1, seed=2)
    d = pattern_persistence(_pattern(xy, (200, 200), 10.0))
    path = tmp_path / "d.npz"
    np.savez(path, **d.to_dict())
    with np.load(path) as data:
        back = Diagrams.from_dict(data)
    for name in ("h0", "h1", "h1_truncated", "h0_edges", "h1_edges"):
        np.testing.assert_array_equal(getattr(back, name), getattr(d, name))
    assert (back.spacing, back.max_scale, back.pixel_size_nm) == (10.0, 2.5, None)
    assert (back.n_sites, back.n_interior, back.border_excluded) == (d.n_sites, d.n_interior, True)


# ----------------------------------------------------------------------------- border effects


def test_statistics_agree_across_crop_sizes():
    # One jittered lattice (180 x 180 spacings) cut into windows of 30, 45 and 60 spacings; the
    # same material is measured at each size, so what differs is the frame. Per-site values
    # divide by the sites the bars are charged to. The agreement (5 %) is the brief's goal.
    a = 8.0
    side = 180
    cloud = hexagonal_lattice((side * a, side * a), a, jitter=0.1, seed=21)
    stats = {}
    for w in (30, 45, 60):
        l0, count, total, sites = [], 0, 0.0, 0
        for ox in range(0, side, w):
            for oy in range(0, side, w):
                x0, y0 = ox * a, oy * a
                inside = (
                    (cloud[:, 0] >= x0) & (cloud[:, 0] < x0 + w * a)
                    & (cloud[:, 1] >= y0) & (cloud[:, 1] < y0 + w * a)
                )
                xy = cloud[inside] - [x0, y0]
                d = pattern_persistence(_pattern(xy, (w * a, w * a), a))
                l0.append(d.lengths(0))
                count += d.h1.shape[0]
                total += d.lengths(1).sum()
                sites += d.n_interior
        l0 = np.concatenate(l0)
        stats[w] = np.array([l0.mean(), l0.var(), count / sites, total / sites])
    for w in (30, 45):
        np.testing.assert_allclose(stats[w], stats[60], rtol=0.05)


def test_vacancy_loop_in_a_jittered_lattice_is_kept_and_located_by_its_death_edge():
    # Elementary geometry: the vacancy's hexagon is filled by its short diagonals (about
    # sqrt(3) a), so that loop is the longest H1 bar (about sqrt(3) - 1 long) and the triangle
    # that fills it, with its longest (death) edge, lies inside the hexagon. With jitter the
    # birth edge of that class can sit many spacings away, near the frame; charging the bar by
    # its birth edge would drop it as a border bar.
    a = 10.0
    shape = (200, 200)
    xy = hexagonal_lattice(shape, a, jitter=0.02, seed=4)
    centre = np.argmin(np.hypot(xy[:, 0] - 100, xy[:, 1] - 100))
    hole = xy[centre]
    xy = np.delete(xy, centre, axis=0)
    d = pattern_persistence(_pattern(xy, shape, a))
    longest = int(np.argmax(d.lengths(1)))
    assert d.lengths(1)[longest] == pytest.approx(SQRT3 - 1, abs=0.1)
    i, j = d.h1_death_edges[longest]
    assert np.hypot(*(0.5 * (xy[i] + xy[j]) - hole)) < a
    assert np.hypot(*(xy[i] - xy[j])) / a == pytest.approx(d.h1[longest, 1], rel=1e-6)


@pytest.mark.parametrize("perfect", [False, True])
def test_cut_birth_edges_match_the_cocycle_ones(perfect):
    # Reference: ripser's representative cocycles (birth_edges="all"). Without them, the
    # truncated bars' birth edges must be the same edges, every bar the same, and the finite
    # bars' birth edges not kept. The perfect lattice has tied lengths (the cocycle re-run);
    # the jittered cloud with holes wider than the limit has unique ones.
    rng = np.random.default_rng(4)
    if perfect:
        xy = hexagonal_lattice((200, 200), 10.0, angle=0.0) / 10.0
        centre = np.array([10.0, 10.0])
        xy = xy[np.hypot(*(xy - centre).T) > 2.2]  # a hole wider than the limit
    else:
        xy = rng.uniform(0, 20, (900, 2))
        xy = xy[np.hypot(*(xy - 10.0).T) > 3.0]
    every = rips_persistence(xy, max_scale=1.6, birth_edges="all")
    cut = rips_persistence(xy, max_scale=1.6, birth_edges="cut")
    assert every["h1_truncated"].any()
    for key in ("h0", "h0_edges", "h1", "h1_truncated", "h1_death_edges"):
        np.testing.assert_array_equal(cut[key], every[key])
    t = every["h1_truncated"]
    np.testing.assert_array_equal(cut["h1_edges"][t], every["h1_edges"][t])
    assert np.all(cut["h1_edges"][~t] == -1)
