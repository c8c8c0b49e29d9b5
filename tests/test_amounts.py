"""Physical amounts: density, vacancies, grains, correlation length, disorder index.

Outside references: the geometry of the triangular lattice (density ``2 / (sqrt(3) a²)``, common
practice), the ψ6 phase of a rotated lattice (six times its angle, Halperin & Nelson 1978), and
a Poisson pattern as the random anchor. Invented micrographs (topoclass.synth, demo data) give
the known truth for vacancy and grain counts.
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy.spatial import cKDTree

from topoclass import synth
from topoclass.amounts import AMOUNT_KEYS, pattern_amounts, random_pattern_anchors
from topoclass.persistence import pattern_persistence
from topoclass.sites import SitePattern, find_sites

SHAPE = (384, 384)


def _pattern(xy, spacing, shape=SHAPE, pixel_size_nm=None) -> SitePattern:
    """Sites in the frame, border flagged as find_sites does (one spacing from the edge)."""
    xy = np.asarray(xy, dtype=float)
    rows, cols = shape
    xy = xy[(xy[:, 0] >= 0) & (xy[:, 0] <= cols - 1) & (xy[:, 1] >= 0) & (xy[:, 1] <= rows - 1)]
    border = ((xy[:, 0] < spacing) | (xy[:, 0] > cols - 1 - spacing)
              | (xy[:, 1] < spacing) | (xy[:, 1] > rows - 1 - spacing))
    return SitePattern(xy, spacing, "dark", border, shape, pixel_size_nm=pixel_size_nm)


def _amounts(pattern):
    return pattern_amounts(pattern, pattern_persistence(pattern))


def test_perfect_lattice_density_and_zero_amounts():
    # Triangular lattice of bond length a: 2 / (sqrt(3) a²) sites per area (common practice).
    a_px, px_nm = 12.0, 8.0
    pattern = _pattern(synth.hexagonal_lattice(SHAPE, a_px, angle=7.0), a_px, pixel_size_nm=px_nm)
    out = _amounts(pattern)
    v = out.values
    assert set(v) == set(AMOUNT_KEYS)
    a_um = a_px * px_nm * 1e-3
    assert v["pore_density_um2"] == pytest.approx(2.0 / (np.sqrt(3.0) * a_um**2), rel=0.02)
    assert v["spacing_nm"] == pytest.approx(a_px * px_nm, rel=1e-6)
    assert v["vacancies"] == 0 and v["vacancy_clusters"] == 0 and v["vacancies_per_1000"] == 0
    assert v["grains"] == 1
    assert v["disorder_index"] == pytest.approx(0.0, abs=1e-6)
    # The order reaches across the frame: the length is the cap, half the shorter side.
    assert v["orientation_length"] == pytest.approx(0.5 * SHAPE[0] / a_px)


@pytest.mark.parametrize("angle", [0.0, 12.5, 29.0, 41.0, 58.0])
def test_grain_orientation_of_a_rotated_lattice(angle):
    # psi6 of a lattice turned by theta has phase 6 theta (Halperin & Nelson 1978), so the
    # grain's orientation is theta modulo 60 degrees, in (-30, 30].
    pattern = _pattern(synth.hexagonal_lattice(SHAPE, 14.0, angle=angle, jitter=0.03, seed=1),
                       14.0)
    out = _amounts(pattern)
    expected = (angle + 30.0) % 60.0 - 30.0
    assert out.values["grains"] == 1
    diff = (out.grain_angles_deg[0] - expected + 30.0) % 60.0 - 30.0
    assert abs(diff) < 0.5


def test_without_pixel_size_physical_units_are_nan():
    pattern = _pattern(synth.hexagonal_lattice(SHAPE, 12.0), 12.0)
    v = _amounts(pattern).values
    for key in ("pixel_size_nm", "spacing_nm", "pore_density_um2", "vacancies_per_um2",
                "grain_area_um2", "orientation_length_nm"):
        assert np.isnan(v[key]), key
    assert np.isfinite(v["vacancies_per_1000"]) and np.isfinite(v["grain_area_sites"])


@pytest.mark.parametrize(("fraction", "spacing", "seed"),
                         [(0.005, 10.0, 1), (0.02, 13.0, 2), (0.05, 11.0, 3), (0.08, 15.0, 4)])
def test_vacancy_count_on_invented_micrographs(fraction, spacing, seed):
    # Invented images (demo data) with known missing sites; the check of issue 15: within 10 %
    # or 2 vacancies, whichever is larger, of the truth in the counted zone.
    rng = np.random.default_rng(seed)
    xy, info = synth.make_sites("vacancies", SHAPE, spacing, rng=rng,
                                params={"vacancy_fraction": fraction, "merge_fraction": 0.0})
    image = synth.render_micrograph(xy, SHAPE, 0.3 * spacing, blur=0.8, noise=0.1, seed=seed)
    pattern = find_sites(image, pixel_size_nm=100.0 / spacing)
    out = _amounts(pattern)
    truth_xy = np.asarray(info["vacancy_sites"]).reshape(-1, 2)
    d = 3.0 * pattern.spacing  # the counted zone (amounts._ZONE_DEPTH spacings inside)
    inside = ((truth_xy >= d) & (truth_xy <= np.array(SHAPE[::-1]) - 1 - d)).all(axis=1)
    truth = int(inside.sum())
    counted = out.values["vacancies"]
    assert abs(counted - truth) <= max(0.1 * truth, 2), (counted, truth)
    assert out.values["vacancies_err"] == pytest.approx(np.sqrt(counted))  # counting statistics
    assert out.values["vacancy_clusters"] <= counted


def test_jittered_lattice_without_vacancies_counts_none():
    rng = np.random.default_rng(5)
    xy, _ = synth.make_sites("ordered", SHAPE, 12.0, rng=rng, params={"jitter": 0.045})
    assert _amounts(_pattern(xy, 12.0)).values["vacancies"] == 0


@pytest.mark.parametrize("seed", [100, 102, 105, 109])
def test_grains_of_invented_polycrystals(seed):
    # Voronoi grains with known seeds (demo data): count within +-1 for grains of >= 100 sites,
    # mean grain area within 15 % (issue 15).
    shape = (512, 512)
    rng = np.random.default_rng(seed)
    spacing = float(rng.uniform(9, 14))
    n_grains = int(rng.integers(2, 7))
    xy, info = synth.make_sites("grains", shape, spacing, rng=rng, params={"n_grains": n_grains})
    pattern = _pattern(xy, spacing, shape=shape)
    out = _amounts(pattern)
    owner = cKDTree(np.asarray(info["grain_centres"])).query(pattern.xy)[1]
    sizes = np.bincount(owner, minlength=n_grains)
    assert abs(out.values["grains"] - np.count_nonzero(sizes >= 100)) <= 1
    assert out.values["grain_area_sites"] == pytest.approx(sizes[sizes > 0].mean(), rel=0.15)
    # Grains shorten the orientation correlation below the frame-wide cap.
    if n_grains > 2:
        assert out.values["orientation_length"] < 0.5 * shape[0] / spacing


def test_disorder_index_runs_from_lattice_to_random():
    spacing = 12.0
    values = []
    for jitter in (0.0, 0.05, 0.1, 0.2):
        lattice = synth.hexagonal_lattice(SHAPE, spacing, jitter=jitter, seed=3)
        values.append(_amounts(_pattern(lattice, spacing)).values["disorder_index"])
    assert values[0] == pytest.approx(0.0, abs=1e-6)
    assert all(b > a for a, b in zip(values, values[1:], strict=False))
    # A Poisson pattern of the lattice's density (another seed than the anchors'): near 1.
    rng = np.random.default_rng(11)
    n = int(2.0 / (np.sqrt(3.0) * spacing**2) * SHAPE[0] * SHAPE[1])
    poisson = _amounts(_pattern(rng.uniform(0, SHAPE[0] - 1, size=(n, 2)), spacing)).values
    assert 0.85 <= poisson["disorder_index"] <= 1.0
    assert 0 < poisson["disorder_index_err"] < 0.1
    psi, cv = random_pattern_anchors()
    assert 0.2 < psi < 0.6 and 0.2 < cv < 0.6  # loose bounds: mean |psi6| and MST-edge CV
