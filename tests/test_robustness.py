"""What a production line feeds in: nothing but a clean error for bad input, at every stage."""

from __future__ import annotations

import numpy as np
import pytest
import skimage.io
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra.numpy import arrays

from topoclass.errors import TopoclassError
from topoclass.features import measure_patterns
from topoclass.persistence import pattern_persistence
from topoclass.sites import SitePattern, find_sites
from topoclass.synth import hexagonal_lattice, render_micrograph


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(arrays(np.float32, st.tuples(st.integers(32, 72), st.integers(32, 72)),
              elements=st.floats(0, 1, width=32)))
def test_site_finder_on_arbitrary_images_gives_a_pattern_or_a_clean_error(image):
    try:
        pattern = find_sites(image, source="fuzz.png")
    except TopoclassError as exc:
        assert "fuzz.png" in str(exc) and "\n" not in str(exc)
        return
    assert isinstance(pattern, SitePattern)
    assert np.all(np.isfinite(pattern.xy)) and pattern.spacing > 0
    # Whatever the finder returns, the next stage accepts or refuses it cleanly.
    try:
        pattern_persistence(pattern)
    except TopoclassError:
        pass


@settings(max_examples=25, deadline=None)
@given(st.integers(0, 2**32 - 1), st.floats(6, 30))
def test_site_finder_on_sparse_blobs_never_crashes(seed, spacing):
    rng = np.random.default_rng(seed)
    xy = rng.uniform(0, 96, size=(int(rng.integers(0, 12)), 2))
    image = render_micrograph(xy, (96, 96), spacing * 0.3, noise=0.1, seed=seed)
    try:
        find_sites(image, source="blobs.png")
    except TopoclassError as exc:
        assert "blobs.png" in str(exc)


@pytest.mark.parametrize(
    "make",
    [
        pytest.param(lambda: np.zeros((1, 1), np.uint8), id="1x1"),
        pytest.param(lambda: np.full((64, 64), 128, np.uint8), id="constant"),
        pytest.param(lambda: render_micrograph(np.array([[30.0, 30.0], [60.0, 40.0]]),
                                               (96, 96), 4.0), id="two-pores"),
    ],
)
def test_bad_images_become_error_results_in_a_batch(make, tmp_path):
    good = tmp_path / "good.png"
    xy = hexagonal_lattice((160, 160), 12, jitter=0.02, seed=1)
    skimage.io.imsave(good, (render_micrograph(xy, (160, 160), 3.6, blur=0.8) * 255).astype(
        np.uint8))
    bad = tmp_path / "bad.png"
    image = make()
    if image.dtype != np.uint8:
        image = (image * 255).astype(np.uint8)
    skimage.io.imsave(bad, image, check_contrast=False)
    results = measure_patterns([bad, good], cache_dir="")
    assert [r.ok for r in results] == [False, True]
    assert str(bad) in results[0].error and "\n" not in results[0].error


def test_nan_only_float_tiff_is_an_error_row(tmp_path):
    import tifffile

    path = tmp_path / "nan.tif"
    tifffile.imwrite(path, np.full((64, 64), np.nan, np.float32))
    (result,) = measure_patterns([path], cache_dir="")
    assert not result.ok and str(path) in result.error
