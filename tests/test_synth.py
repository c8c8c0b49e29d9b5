"""Tests of the invented anodic-alumina micrographs against facts from outside the generator.

Neighbours come from scipy's Delaunay triangulation, the bond-orientational order from the
Halperin & Nelson (1978) definition written out here, and lattice geometry from textbook facts.
"""

from __future__ import annotations

import csv
import hashlib
import json
from pathlib import Path

import numpy as np
import pytest
import tifffile
from PIL import Image
from scipy.spatial import Delaunay, cKDTree

from topoclass.synth import KINDS, draw_sample, make_micrograph, make_sites, write_dataset

SIZE = 256
SEEDS = (0, 1, 2, 3, 4)


def _interior(xy: np.ndarray, size: int, spacing: float, margin: float = 2.0) -> np.ndarray:
    """Sites far enough from the frame that the Delaunay star is not cut by the border."""
    lo, hi = margin * spacing, size - 1 - margin * spacing
    return np.all((xy > lo) & (xy < hi), axis=1)


def _neighbours(xy: np.ndarray):
    indptr, indices = Delaunay(xy).vertex_neighbor_vertices
    return [indices[indptr[i]:indptr[i + 1]] for i in range(len(xy))]


def _psi6(xy: np.ndarray, neighbours) -> np.ndarray:
    # Halperin & Nelson (1978): psi6_j = (1/N_j) sum_k exp(6 i theta_jk) over the N_j nearest
    # neighbours k of site j (here the Delaunay neighbours), theta_jk the bond angle.
    out = np.empty(len(xy), dtype=complex)
    for j, nb in enumerate(neighbours):
        d = xy[nb] - xy[j]
        out[j] = np.exp(6j * np.arctan2(d[:, 1], d[:, 0])).mean()
    return out


def _sites(truth: dict) -> np.ndarray:
    return np.asarray(truth["sites"], dtype=float)


@pytest.fixture(scope="module")
def made():
    """A few images of each class (made once for the module)."""
    return {kind: [make_micrograph(kind, size=SIZE, seed=s) for s in SEEDS] for kind in KINDS}


def test_images_are_float_unit_range_and_truth_is_json(made):
    for kind, items in made.items():
        for image, truth in items:
            assert image.dtype == np.float32 and image.shape == (SIZE, SIZE)
            assert 0.0 <= image.min() and image.max() <= 1.0
            assert truth["kind"] == kind and truth["invented"] is True
            assert 8.0 <= truth["spacing_px"] <= 20.0
            assert truth["pixel_size_nm"] == pytest.approx(100.0 / truth["spacing_px"])
            assert 0.25 <= truth["radius_fraction"] <= 0.35
            assert truth["n_sites"] == len(truth["sites"])
            json.dumps(truth)  # raises if anything is not JSON-ready


def test_ordered_is_six_coordinated_with_spacing_set_by_jitter(made):
    for _, truth in made["ordered"]:
        xy, spacing, jitter = _sites(truth), truth["spacing_px"], truth["jitter"]
        nbs = _neighbours(xy)
        inner = _interior(xy, SIZE, spacing)
        # A triangular lattice is six-coordinated (common practice); small jitter keeps the
        # Delaunay triangulation that of the ideal lattice.
        assert all(len(nbs[i]) == 6 for i in np.flatnonzero(inner))
        bonds = np.concatenate([np.hypot(*(xy[nbs[i]] - xy[i]).T) for i in np.flatnonzero(inner)])
        assert np.median(bonds) == pytest.approx(spacing, rel=0.01)
        # The bond length changes by the difference of two independent isotropic Gaussian
        # displacements projected on the bond: standard deviation sqrt(2) * sigma (sum of
        # independent normal variables).
        expected = np.sqrt(2.0) * jitter * spacing
        assert 0.8 < bonds.std() / expected < 1.25
        assert np.max(np.abs(bonds - spacing)) < 7 * expected


def test_lattice_density_and_bragg_spacing(made):
    for kind in ("ordered", "disordered"):
        for _, truth in made[kind]:
            xy, spacing = _sites(truth), truth["spacing_px"]
            # Number density of a triangular lattice is 2 / (sqrt(3) a^2) (geometry of the unit
            # cell); the disordered class is made at the same density.
            density = len(xy) / (SIZE * SIZE)
            assert density == pytest.approx(2.0 / (np.sqrt(3.0) * spacing**2), rel=0.06)
    for image, truth in made["ordered"][:3]:
        # The first reciprocal-lattice shell of a triangular lattice of spacing a lies at
        # |k| = 2 / (sqrt(3) a) cycles per pixel (textbook crystallography, value from memory).
        f = np.abs(np.fft.fftshift(np.fft.fft2(image - image.mean())))
        k = np.hypot(*np.meshgrid(np.fft.fftshift(np.fft.fftfreq(SIZE)),
                                  np.fft.fftshift(np.fft.fftfreq(SIZE))))
        f[k < 0.02] = 0
        peak = k.ravel()[np.argmax(f)]
        assert peak == pytest.approx(2.0 / (np.sqrt(3.0) * truth["spacing_px"]), rel=0.05)


def test_vacancies_match_the_missing_lattice_sites(made):
    for image, truth in made["vacancies"]:
        xy, spacing = _sites(truth), truth["spacing_px"]
        assert truth["n_lattice_sites"] - len(xy) == truth["n_vacancies"] + truth["n_merged"]
        assert 0.02 <= truth["n_vacancies"] / truth["n_lattice_sites"] <= 0.105
        assert truth["n_merged"] >= 1
        # Rebuild the ideal lattice here from its origin, spacing and angle and look for its
        # nodes among the sites: a node with no site within 0.3 spacing is missing.
        theta = np.deg2rad(truth["angle_deg"])
        a1 = spacing * np.array([np.cos(theta), np.sin(theta)])
        a2 = spacing * np.array([np.cos(theta + np.pi / 3), np.sin(theta + np.pi / 3)])
        n = int(SIZE / spacing) + 4
        i, j = np.meshgrid(np.arange(-2 * n, 2 * n + 1), np.arange(-2 * n, 2 * n + 1))
        nodes = np.asarray(truth["lattice_origin"]) + np.outer(i.ravel(), a1) + np.outer(
            j.ravel(), a2)
        nodes = nodes[_interior(nodes, SIZE, spacing)]
        dist, _ = cKDTree(xy).query(nodes)
        missing = nodes[dist > 0.3 * spacing]
        recorded = np.vstack([np.reshape(truth["vacancy_sites"], (-1, 2)),
                              np.reshape(truth["merged_pairs"], (-1, 2))])
        # Each missing node is a recorded vacancy or one of a merged pair, and vice versa.
        d_rec, _ = cKDTree(recorded).query(missing)
        assert np.all(d_rec < 0.3 * spacing)
        near_nodes = cKDTree(nodes).query(recorded)[0] < 0.3 * spacing
        assert near_nodes.sum() == len(missing)
        # A merged pore sits at the midpoint of a bond, half a spacing from both nodes.
        pairs = np.reshape(truth["merged_pairs"], (-1, 2, 2))
        mids = np.reshape(truth["merged_sites"], (-1, 2))
        assert np.allclose(pairs.mean(axis=1), mids, atol=1e-2)
        assert np.all(cKDTree(xy).query(mids)[0] < 1e-2)
        # The picture agrees: dark at pores, bright (oxide) where a pore is missing.
        vac = np.reshape(truth["vacancy_sites"], (-1, 2))
        vac = vac[_interior(vac, SIZE, spacing, margin=0.5)]
        pores = xy[_interior(xy, SIZE, spacing, margin=0.5)]
        assert np.median(_pixels(image, vac)) > np.median(_pixels(image, pores)) + 0.1


def test_grain_boundaries_carry_five_and_seven_fold_sites_without_gaps(made):
    for _, truth in made["grains"]:
        xy, spacing = _sites(truth), truth["spacing_px"]
        assert 3 <= truth["n_grains"] <= 8 and len(truth["angles_deg"]) == truth["n_grains"]
        nbs = _neighbours(xy)
        inner = _interior(xy, SIZE, spacing)
        z = np.array([len(nb) for nb in nbs])[inner]
        n5, n7 = int(np.sum(z == 5)), int(np.sum(z == 7))
        # Grain boundaries in a 2-D hexagonal crystal are rows of 5-7 pairs (dislocations):
        # common practice.
        assert n5 > 0 and n7 > 0
        assert 0.5 < n5 / n7 < 2.0
        # Grains are ordered inside: the local bond order stays high.
        assert np.abs(_psi6(xy, nbs)[inner]).mean() > 0.75
        # No big gaps: the largest empty circle of the triangulation stays near that of the
        # lattice (circumradius a / sqrt(3) of the equilateral triangle, geometry).
        tri = Delaunay(xy)
        radius = _circumradius(xy[tri.simplices])
        centre = xy[tri.simplices].mean(axis=1)
        assert radius[_interior(centre, SIZE, spacing)].max() < 1.0 * spacing


def test_global_bond_order_separates_disordered_from_ordered(made):
    for kind, low, high in (("ordered", 0.9, 1.0), ("disordered", 0.0, 0.2)):
        for _, truth in made[kind]:
            xy, spacing = _sites(truth), truth["spacing_px"]
            nbs = _neighbours(xy)
            inner = _interior(xy, SIZE, spacing)
            # Global order |<psi6>| (Halperin & Nelson 1978) over the interior sites.
            glob = abs(_psi6(xy, nbs)[inner].mean())
            assert low <= glob <= high, (kind, glob)


def test_make_sites_respects_fixed_parameters():
    rng = np.random.default_rng(5)
    xy, info = make_sites("vacancies", (200, 200), 12.0, rng=rng,
                          params={"jitter": 0.03, "vacancy_fraction": 0.05, "merge_fraction": 0.01})
    assert info["jitter"] == 0.03 and info["vacancy_fraction"] == 0.05
    assert info["n_vacancies"] == round(0.05 * info["n_lattice_sites"])
    assert xy.ndim == 2 and xy.shape[1] == 2
    _, info = make_sites("grains", (200, 200), 12.0, rng=rng, params={"n_grains": 5})
    assert info["n_grains"] == 5
    with pytest.raises(ValueError, match="kind must be one of"):
        make_sites("amorphous", (200, 200), 12.0, rng=rng)
    with pytest.raises(ValueError, match="kind must be one of"):
        make_micrograph("amorphous", seed=0)


def test_same_seed_same_image_other_seed_other_image():
    a, ta = make_micrograph("grains", size=128, seed=9)
    b, tb = make_micrograph("grains", size=128, seed=9)
    c, _ = make_micrograph("grains", size=128, seed=10)
    assert np.array_equal(a, b) and ta == tb
    assert not np.array_equal(a, c)
    sample = draw_sample("ordered", seed=3)
    assert sample == draw_sample("ordered", seed=3)
    image, truth = make_micrograph("ordered", size=128, seed=1, sample=sample)
    lo, hi = sample["spacing_range_px"]
    assert lo <= truth["spacing_px"] <= hi and truth["sample"] == sample


def _digest(folder: Path) -> dict[str, str]:
    return {p.relative_to(folder).as_posix(): hashlib.sha256(p.read_bytes()).hexdigest()
            for p in sorted(folder.rglob("*")) if p.is_file()}


def test_write_dataset_is_byte_identical_for_one_seed(tmp_path):
    first = write_dataset(tmp_path / "a", per_class=2, size=96, seed=4)
    second = write_dataset(tmp_path / "b", per_class=2, size=96, seed=4)
    other = write_dataset(tmp_path / "c", per_class=2, size=96, seed=5)
    da, db, dc = _digest(first.parent), _digest(second.parent), _digest(other.parent)
    assert da == db and len(da) == 2 * 4 * 2 + 1
    images = [k for k in da if k.startswith("images/")]
    assert all(da[k] != dc.get(k) for k in images)
    # No time stamps: PNG files carry no tIME chunk (PNG specification), TIFF files no
    # DateTime tag (306, TIFF 6.0).
    for name in images:
        path = first.parent / name
        if name.endswith(".png"):
            assert b"tIME" not in path.read_bytes()
        else:
            with tifffile.TiffFile(path) as tif:
                assert "DateTime" not in tif.pages[0].tags


def test_write_dataset_layout_groups_and_pixel_size(tmp_path):
    sheet = write_dataset(tmp_path / "set", per_class=5, size=128, seed=1, groups_per_class=2)
    root = sheet.parent
    with open(sheet, newline="", encoding="utf-8") as fh:
        reader = csv.DictReader(fh)
        assert reader.fieldnames == ["image", "label", "group"]
        rows = list(reader)
    assert len(rows) == 5 * len(KINDS)
    assert sorted({r["label"] for r in rows}) == sorted(KINDS)
    by_group: dict[str, list[str]] = {}
    for r in rows:
        by_group.setdefault(r["group"], []).append(r["label"])
        stem = Path(r["image"]).stem
        assert stem.startswith(r["label"] + "_")
        truth = json.loads((root / "truth" / f"{stem}.json").read_text(encoding="utf-8"))
        assert truth["label"] == r["label"] and truth["group"] == r["group"]
    assert len(by_group) == 2 * len(KINDS)
    assert all(len(v) >= 2 and len(set(v)) == 1 for v in by_group.values())
    # Images of one sample share its magnification range and pore radius.
    for group in by_group:
        truths = [json.loads((root / "truth" / f"{Path(r['image']).stem}.json").read_text())
                  for r in rows if r["group"] == group]
        assert all(t["sample"] == truths[0]["sample"] for t in truths)

    tiffs = [r for r in rows if r["image"].endswith(".tif")]
    pngs = [r for r in rows if r["image"].endswith(".png")]
    assert 0.15 <= len(tiffs) / len(rows) <= 0.35 and len(tiffs) + len(pngs) == len(rows)
    for r in tiffs:
        truth = json.loads((root / "truth" / f"{Path(r['image']).stem}.json").read_text())
        with tifffile.TiffFile(root / r["image"]) as tif:
            page = tif.pages[0]
            assert page.dtype == np.uint16 and page.shape == (128, 128)
            # TIFF 6.0: XResolution is pixels per ResolutionUnit, unit 3 = centimetre.
            assert int(page.tags["ResolutionUnit"].value) == 3
            num, den = page.tags["XResolution"].value
            nm = 1e7 / (num / den)
            assert nm == pytest.approx(truth["pixel_size_nm"], rel=1e-6)
            assert page.tags["YResolution"].value == (num, den)
    for r in pngs[:3]:
        with Image.open(root / r["image"]) as im:
            assert im.mode == "L" and im.size == (128, 128)


def test_write_dataset_rejects_bad_counts(tmp_path):
    with pytest.raises(ValueError, match="per_class"):
        write_dataset(tmp_path, per_class=0)
    with pytest.raises(ValueError, match="groups_per_class"):
        write_dataset(tmp_path, per_class=3, groups_per_class=4)


def _pixels(image: np.ndarray, p: np.ndarray) -> np.ndarray:
    return image[np.round(p[:, 1]).astype(int), np.round(p[:, 0]).astype(int)]


def _circumradius(p: np.ndarray) -> np.ndarray:
    # R = abc / (4 * area) for a triangle with sides a, b, c (Heron / elementary geometry).
    a = np.hypot(*(p[:, 1] - p[:, 2]).T)
    b = np.hypot(*(p[:, 0] - p[:, 2]).T)
    c = np.hypot(*(p[:, 0] - p[:, 1]).T)
    cross = (p[:, 1, 0] - p[:, 0, 0]) * (p[:, 2, 1] - p[:, 0, 1]) - (
        p[:, 1, 1] - p[:, 0, 1]) * (p[:, 2, 0] - p[:, 0, 0])
    return a * b * c / (2.0 * np.abs(cross) + 1e-12)


def test_amounts_replace_the_drawn_disorder():
    # The hard variant of the labelling benchmark: few vacancies, two grains 4 degrees apart.
    _, truth = make_micrograph("vacancies", size=192, seed=3,
                               amounts={"vacancy_fraction": 0.005, "merge_fraction": 0.0})
    assert truth["n_merged"] == 0
    assert 0 < truth["n_vacancies"] <= 0.01 * truth["n_sites"]
    _, truth = make_micrograph("grains", size=192, seed=3,
                               amounts={"n_grains": 2, "angles_deg": [10.0, 14.0]})
    assert truth["angles_deg"] == [10.0, 14.0] and truth["min_misorientation_deg"] == 4.0


@pytest.mark.parametrize("angle", [0.0, 17.0, 37.0, 53.0])
def test_a_large_turned_lattice_covers_the_whole_frame(angle):
    # Elementary geometry: every point of a plane covered by a triangular lattice of spacing a
    # lies within a / sqrt(3) (the circumradius of its triangles) of a site; a frame of
    # 2400 px once had an empty corner at some angles.
    from topoclass.synth import hexagonal_lattice

    spacing = 13.0
    xy = hexagonal_lattice((2400, 2400), spacing, angle=angle, margin=-spacing)
    grid = np.stack(np.meshgrid(np.arange(0, 2400, 10.0), np.arange(0, 2400, 10.0)),
                    axis=-1).reshape(-1, 2)
    gap = cKDTree(xy).query(grid)[0].max()
    assert gap <= spacing / np.sqrt(3.0) + 1e-6
