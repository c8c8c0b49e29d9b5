"""Feature cache and parallel extraction."""

from __future__ import annotations

import dataclasses

import numpy as np
import pytest

import topoclass.features as features
from topoclass.features import FeatureSettings, measure_pattern, measure_patterns


@pytest.fixture()
def images(small_dataset):
    return sorted((small_dataset.parent / "images").iterdir())[:4]


def _count_extractions(monkeypatch) -> list:
    calls = []
    real = features.measure_image

    def counting(path, settings=None, **options):
        calls.append(path)
        return real(path, settings, **options)

    monkeypatch.setattr(features, "measure_image", counting)
    return calls


def test_cache_hit_never_recomputes_and_a_changed_setting_does(images, tmp_path, monkeypatch):
    calls = _count_extractions(monkeypatch)
    first = measure_patterns(images, cache_dir=tmp_path)
    assert len(calls) == len(images)
    again = measure_patterns(images, cache_dir=tmp_path)
    assert len(calls) == len(images)  # all from the cache
    for a, b in zip(first, again, strict=True):
        assert a.sha256 == b.sha256
        for f in dataclasses.fields(a.record.diagrams):
            np.testing.assert_array_equal(
                getattr(a.record.diagrams, f.name), getattr(b.record.diagrams, f.name)
            )
        assert dict(a.record.order) == dict(b.record.order)
    measure_patterns(images, FeatureSettings(max_scale=2.0), cache_dir=tmp_path)
    assert len(calls) == 2 * len(images)  # another setting, another key


def test_settings_key_depends_on_every_setting_and_the_version(monkeypatch):
    base = FeatureSettings()
    keys = {base.key()}
    for change in ({"polarity": "dark"}, {"max_scale": 3.0}, {"pixel_size_nm": 5.0}):
        keys.add(dataclasses.replace(base, **change).key())
    assert len(keys) == 4
    # The pixel limit decides whether an image is read, not what comes out of it.
    assert dataclasses.replace(base, max_pixels=10).key() == base.key()
    before = base.key()
    monkeypatch.setattr(features, "__version__", "99.0")
    assert FeatureSettings().key() != before


def test_damaged_cache_entry_is_recomputed(images, tmp_path, monkeypatch):
    measure_patterns(images[:1], cache_dir=tmp_path)
    (entry,) = list(tmp_path.rglob("*.npz"))
    entry.write_bytes(b"garbage")
    calls = _count_extractions(monkeypatch)
    (result,) = measure_patterns(images[:1], cache_dir=tmp_path)
    assert result.ok and len(calls) == 1


def test_parallel_results_equal_serial_and_keep_order(images, tmp_path):
    serial = measure_patterns(images, cache_dir="", jobs=1)
    parallel = measure_patterns(images, cache_dir="", jobs=2)
    assert [r.path for r in parallel] == [r.path for r in serial]
    for a, b in zip(serial, parallel, strict=True):
        np.testing.assert_array_equal(a.record.diagrams.h1, b.record.diagrams.h1)
        assert dict(a.record.order) == dict(b.record.order)


def test_one_bad_image_is_reported_and_the_rest_go_on(images, tmp_path):
    bad = tmp_path / "broken.png"
    bad.write_bytes(b"\x89PNG\r\n\x1a\n" + b"\x00" * 40)
    missing = tmp_path / "missing.tif"
    results = measure_patterns([images[0], bad, missing, images[1]], cache_dir="", jobs=2)
    assert [r.ok for r in results] == [True, False, False, True]
    for r in results[1:3]:
        assert str(r.path) in r.error and "\n" not in r.error


def test_measure_pattern_carries_the_source(images):
    record = measure_pattern(images[0])
    assert record.source == str(images[0])
    assert record.diagrams.spacing > 0


def test_cache_keeps_the_site_pattern_for_the_report(images, tmp_path, monkeypatch):
    from topoclass.features import cached_measurement, measure_image

    first = measure_patterns(images[:1], cache_dir=tmp_path)[0]
    calls = _count_extractions(monkeypatch)
    hit = cached_measurement(images[0], first.sha256, cache_dir=tmp_path)
    assert calls == [] and hit is not None
    pattern, record = hit
    direct = measure_image(images[0])
    d = direct.pattern
    np.testing.assert_array_equal(pattern.xy, d.xy)
    np.testing.assert_array_equal(pattern.border, d.border)
    assert (pattern.spacing, pattern.polarity, pattern.shape, pattern.pixel_size_nm) == (
        d.spacing, d.polarity, d.shape, d.pixel_size_nm)
    np.testing.assert_array_equal(record.diagrams.h1, direct.record.diagrams.h1)
    assert cached_measurement(images[0], "0" * 64, cache_dir=tmp_path) is None
    assert cached_measurement(images[0], first.sha256, cache_dir="") is None
