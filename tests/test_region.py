"""Analysed region: data bars found and left out; patterns without a preferred spacing."""

from __future__ import annotations

import numpy as np
import pytest
import skimage.data
from scipy.spatial import cKDTree

from topoclass.errors import PatternError, TopoclassError
from topoclass.order import order_measures
from topoclass.region import analysed_region, find_data_bar, parse_region
from topoclass.sites import find_sites
from topoclass.synth import add_data_bar, make_micrograph, render_micrograph


def _to_bits(image: np.ndarray, bits: int) -> np.ndarray:
    # What the reader does with an 8- or 16-bit file: integers scaled back to [0, 1].
    top = 2**bits - 1
    return (np.round(np.clip(image, 0, 1) * top) / top).astype(np.float32)


# --------------------------------------------------------------------------------------------
# data bars on invented exports (our own generator: synth.add_data_bar, text drawn by Pillow)


@pytest.mark.parametrize("bits", [8, 16])
@pytest.mark.parametrize("polarity", ["dark", "bright"])
@pytest.mark.parametrize("edge", ["bottom", "top"])
def test_data_bar_found_and_holds_no_site(bits, polarity, edge):
    micrograph, _ = make_micrograph("vacancies", size=256, seed=3)
    exported, boundary = add_data_bar(micrograph, polarity=polarity, edge=edge, seed=4)
    image = _to_bits(exported, bits)
    bar = find_data_bar(image)
    assert bar is not None and bar.edge == edge
    assert abs(bar.boundary - boundary) <= 2  # the tolerance on the band's true edge
    assert bar.n_marks >= 10  # the text glyphs and the scale bar
    region = analysed_region(image)
    pattern = find_sites(image, region=region.box)
    band = pattern.xy[:, 1] >= boundary if edge == "bottom" else pattern.xy[:, 1] < boundary
    assert not band.any()
    assert "data bar" in region.left_out()


def test_data_bar_leaves_the_sites_of_the_micrograph_as_they_were():
    micrograph, _ = make_micrograph("ordered", size=256, seed=8)
    plain = find_sites(micrograph)
    exported, _ = add_data_bar(micrograph, polarity="dark", seed=9)
    region = analysed_region(exported)
    with_bar = find_sites(exported, region=region.box)
    # Sites away from the band edge (one spacing) agree; the band holds none.
    keep = plain.xy[:, 1] < region.box[3] - plain.spacing
    dist, _ = cKDTree(with_bar.xy).query(plain.xy[keep])
    assert np.quantile(dist, 0.99) < 0.5
    assert abs(with_bar.spacing - plain.spacing) < 0.01 * plain.spacing


def test_without_region_the_data_bar_yields_spurious_sites():
    # What the issue measured: the glyphs become sites when nothing is left out.
    micrograph, _ = make_micrograph("ordered", size=256, seed=8)
    exported, boundary = add_data_bar(micrograph, polarity="dark", seed=9)
    pattern = find_sites(exported)
    assert np.count_nonzero(pattern.xy[:, 1] >= boundary) > 0


@pytest.mark.parametrize("name", ["camera", "coins", "moon", "page"])
def test_data_bar_pasted_on_scikit_image_pictures(name):
    # scikit-image's shipped pictures (skimage.data) with our own bar pasted below them: the
    # band is found at its true edge; the pictures alone have none.
    picture = getattr(skimage.data, name)().astype(np.float32) / 255.0
    assert find_data_bar(picture) is None
    for polarity in ("dark", "bright"):
        exported, boundary = add_data_bar(picture, polarity=polarity, seed=1)
        bar = find_data_bar(exported)
        assert bar is not None and bar.edge == "bottom"
        assert abs(bar.boundary - boundary) <= 2


@pytest.mark.parametrize("kind", ["ordered", "vacancies", "grains", "disordered"])
def test_no_data_bar_on_plain_micrographs(kind):
    for seed in range(3):
        image, _ = make_micrograph(kind, size=256, seed=seed)
        assert find_data_bar(image) is None
        assert analysed_region(image).whole


def test_region_option_in_pixels_and_fractions():
    image, _ = make_micrograph("ordered", size=200, seed=1)
    assert analysed_region(image, (10, 20, 150, 180), auto=False).box == (10, 20, 150, 180)
    assert analysed_region(image, (0, 0, 1, 0.5), auto=False).box == (0, 0, 200, 100)
    assert parse_region("0,0,1,0.9") == (0.0, 0.0, 1.0, 0.9)
    assert parse_region(None) is None
    for bad in ("1,2,3", "a,b,c,d", "5,5,2,8", "-1,0,4,4"):
        with pytest.raises(TopoclassError, match="--region"):
            parse_region(bad)
    with pytest.raises(TopoclassError, match="x.tif.*does not fit"):
        analysed_region(image, (0, 0, 500, 100), source="x.tif")
    with pytest.raises(TopoclassError, match="x.tif.*smaller than"):
        analysed_region(image, (0, 0, 10, 100), source="x.tif")
    pattern = find_sites(image, region=(50, 40, 150, 160))
    assert pattern.frame == (50, 40, 150, 160)
    assert (pattern.xy[:, 0] >= 50).all() and (pattern.xy[:, 0] < 150).all()
    assert (pattern.xy[:, 1] >= 40).all() and (pattern.xy[:, 1] < 160).all()


# --------------------------------------------------------------------------------------------
# patterns without a preferred spacing


def _poisson_spots(seed: int, *, size=640, nn_mean=24.0, polarity="dark"):
    rng = np.random.default_rng(seed)
    density = (0.5 / nn_mean) ** 2  # Poisson: mean NN distance 0.5 / sqrt(density)
    pad = 20
    n = rng.poisson(density * (size + 2 * pad) ** 2)
    xy = rng.uniform(-pad, size + pad, (n, 2))
    image = render_micrograph(xy, (size, size), 1.5, polarity=polarity, blur=0.5, noise=0.05,
                              seed=seed)
    return image, xy


@pytest.mark.parametrize(("seed", "polarity"), [(0, "dark"), (1, "bright"), (2, "dark")])
def test_poisson_spots_are_measured_with_clark_evans_near_one(seed, polarity):
    # Clark & Evans, Ecology 35, 445 (1954): for a Poisson pattern R = 1, and the mean
    # nearest-neighbour distance has standard error 0.26136 / sqrt(N density), that is
    # 0.26136 / sqrt(N density) / (0.5 / sqrt(density)) = 0.52272 / sqrt(N) on R.
    image, truth = _poisson_spots(seed, polarity=polarity)
    pattern = find_sites(image)
    assert not pattern.preferred_spacing
    assert pattern.polarity == polarity
    inside = ((truth >= 0) & (truth <= image.shape[0] - 1)).all(axis=1)
    dist, _ = cKDTree(pattern.xy).query(truth[inside])
    assert np.mean(dist < 1.5) >= 0.97  # what a 1.5 px spot allows to resolve
    measures = order_measures(pattern)
    standard_error = 0.26136 / np.sqrt(pattern.n_sites * pattern.n_sites / pattern.area)
    standard_error /= 0.5 / np.sqrt(pattern.n_sites / pattern.area)
    assert abs(measures["clark_evans_r"] - 1.0) <= 3 * standard_error
    # Bond-orientational order of a random pattern: |mean psi6| of N random unit phases is
    # about 1 / sqrt(N) (Halperin & Nelson 1978 define psi6; the 1/sqrt(N) is elementary).
    assert measures["psi6_global"] < 0.15


def test_blank_image_still_fails_clearly():
    image = np.random.default_rng(5).normal(0.5, 0.05, (256, 256)).astype(np.float32)
    with pytest.raises(PatternError, match="blank.tif"):
        find_sites(image, source="blank.tif")


def test_rimmed_pores_count_once():
    # Secondary-electron edge effect: dark pores with bright rims. Truth: the drawn centres.
    from topoclass.synth import hexagonal_lattice

    shape = (256, 256)
    xy = hexagonal_lattice(shape, 14.0, angle=11.0, jitter=0.02, margin=-14, seed=2)
    image = render_micrograph(xy, shape, 4.2, rim=0.8, blur=0.8, noise=0.05, seed=3)
    pattern = find_sites(image)
    inside = ((xy >= 14) & (xy <= 256 - 15)).all(axis=1)
    dist, _ = cKDTree(pattern.xy).query(xy[inside])
    assert np.mean(dist < 3.0) >= 0.98
    back, _ = cKDTree(xy).query(pattern.xy[~pattern.border])
    assert np.mean(back < 3.0) >= 0.98  # no ring of bright candidates
    assert abs(pattern.spacing - 14.0) < 0.3


# --------------------------------------------------------------------------------------------
# the region through the pipeline: records, scores.csv, inspect, the command line


@pytest.fixture(scope="module")
def exported_file(tmp_path_factory):
    """An invented micrograph exported with a data bar, as an 8-bit PNG."""
    from topoclass.synth import write_grey_png

    micrograph, _ = make_micrograph("vacancies", size=256, seed=21)
    exported, boundary = add_data_bar(micrograph, polarity="dark", seed=22)
    path = tmp_path_factory.mktemp("export") / "line_A_0001.png"
    write_grey_png(path, exported)
    return path, boundary


def test_record_says_what_was_left_out(exported_file):
    from topoclass.features import FeatureSettings, measure_image

    path, boundary = exported_file
    measured = measure_image(path)
    x0, y0, x1, y1 = measured.record.region
    assert (x0, y0, x1) == (0, 0, 256) and abs(y1 - boundary) <= 3
    assert (measured.pattern.xy[:, 1] < boundary).all()
    assert any("data bar" in r for r in measured.record.remarks)
    whole = measure_image(path, FeatureSettings(auto_region=False))
    assert whole.record.region == (0, 0, 256, whole.micrograph.image.shape[0])
    assert whole.record.remarks == ()
    given = measure_image(path, FeatureSettings(region=(0, 0, 1, 0.5), auto_region=False))
    assert given.record.region == (0, 0, 256, int(np.ceil(0.5 * _image_rows(path))))


def _image_rows(path) -> int:
    from topoclass.images import read_micrograph

    return read_micrograph(path).image.shape[0]


def test_inspect_json_and_overlay_show_the_region(exported_file, tmp_path, monkeypatch, capsys):
    import json
    import sys

    from topoclass.cli import main

    path, boundary = exported_file
    monkeypatch.setattr(sys, "argv", ["topoclass", "inspect", str(path), "--json",
                                      "--out", str(tmp_path / "inspect")])
    main()
    summary = json.loads(capsys.readouterr().out)
    assert abs(summary["analysed_region"][3] - boundary) <= 3
    assert "data bar" in summary["left_out"]
    assert summary["preferred_spacing"] is True
    saved = json.loads((tmp_path / "inspect" / "summary.json").read_text())
    assert saved["analysed_region"] == summary["analysed_region"]
    # The overlay darkens the band that was left out.
    from PIL import Image

    overlay = np.asarray(Image.open(tmp_path / "inspect" / "overlay.png").convert("L"))
    assert overlay.shape[0] > overlay.shape[1]  # the band is drawn, below the micrograph


def test_bad_region_option_is_one_line(exported_file, monkeypatch, capsys):
    import sys

    from topoclass.cli import main

    path, _ = exported_file
    monkeypatch.setattr(sys, "argv", ["topoclass", "inspect", str(path), "--region", "1,2,3"])
    with pytest.raises(SystemExit) as info:
        main()
    assert info.value.code == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--region" in err[0]


def test_scores_csv_records_the_analysed_region(exported_file, small_model, tmp_path):
    from topoclass.scoring import read_scores, score_images

    path, boundary = exported_file
    out = tmp_path / "scores.csv"
    score_images(small_model.model, [path], out, cache_dir=False)
    (row,) = read_scores(out)
    assert row["status"] == "ok"
    x0, y0, x1, y1 = (int(v) for v in row["analysed_region"].split(","))
    assert abs(y1 - boundary) <= 3
    assert "left out: data bar" in row["message"]


# --------------------------------------------------------------------------------------------
# rescaled copies (augment)


def test_zoomed_copy_scales_the_spacing():
    # Rescaling an image by f multiplies every length in it by f (elementary geometry).
    from topoclass.augment import parse_zoom_range, zoom_factors, zoom_image

    image, truth = make_micrograph("ordered", size=256, seed=4)
    base = find_sites(image).spacing
    for factor in (0.7, 1.6):
        copy = zoom_image(image, factor)
        assert copy.shape == (round(256 * factor),) * 2
        assert abs(find_sites(copy).spacing / base - factor) < 0.02 * factor
    np.testing.assert_allclose(zoom_factors((0.5, 2.0), 3), [0.5, 2.0])  # 1.0 is the original
    assert parse_zoom_range("1,2") == (1.0, 2.0)
    for bad in ("2,1", "0.01,2", "x"):
        with pytest.raises(TopoclassError, match="--zoom-range"):
            parse_zoom_range(bad)


def test_training_with_zoom_range_records_it_and_widens_the_spacing_range(
        small_dataset, feature_cache, small_model, tmp_path):
    from topoclass.workflow import train_from_labels

    run = train_from_labels(small_dataset, tmp_path / "zoomed", cv=3, seed=3,
                            cache_dir=feature_cache, figures=False, zoom_range=(1.0, 1.6),
                            zoom_copies=2)
    settings = run.model.settings
    assert settings["augmentation"]["zoom_factors"] == [1.6]
    assert settings["augmentation"]["copies_measured"] == 24
    plain = small_model.model.settings["spacing_px_range"]
    lo, hi = settings["spacing_px_range"]
    assert lo == pytest.approx(plain[0]) and hi > 1.5 * plain[1]
    import json

    card = json.loads((run.directory / "card.json").read_text())
    assert card["settings"]["augmentation"]["zoom_range"] == [1.0, 1.6]


def test_synth_exports_with_data_bars_and_rims(tmp_path):
    # Our own generator: the styling leaves the pattern images as they were without it.
    import json

    from topoclass.images import read_micrograph
    from topoclass.synth import write_dataset

    plain = write_dataset(tmp_path / "plain", per_class=2, size=96, seed=4)
    styled = write_dataset(tmp_path / "styled", per_class=2, size=96, seed=4, data_bars=1.0,
                           rims=True)
    for truth_file in sorted((styled.parent / "truth").glob("*.json")):
        truth = json.loads(truth_file.read_text())
        image = read_micrograph(styled.parent / truth["image"]).image
        bar = find_data_bar(image)
        assert bar is not None and abs(bar.boundary - truth["data_bar_row"]) <= 2
        assert truth["sample"]["rim"] > 0
    again = write_dataset(tmp_path / "again", per_class=2, size=96, seed=4)
    assert (plain.parent / "images" / "ordered_000.png").read_bytes() == (
        again.parent / "images" / "ordered_000.png").read_bytes()


def test_accuracy_with_and_without_data_bars_agrees(small_model, feature_cache, tmp_path):
    # The check: one model, the same invented images exported with and without data
    # bars (our own generator), macro-F1 within 0.02 (scikit-learn's f1_score, macro average).
    from sklearn.metrics import f1_score

    from topoclass.features import FeatureSettings
    from topoclass.labels import read_labels
    from topoclass.synth import write_dataset
    from topoclass.workflow import labelled_records

    scores = []
    for bars in (0.0, 1.0):
        sheet = write_dataset(tmp_path / f"bars{bars:g}", per_class=4, size=256, seed=31,
                              data_bars=bars)
        records, y, _, failures = labelled_records(
            read_labels(sheet), FeatureSettings.from_model(small_model.model),
            cache_dir=feature_cache)
        assert not failures
        assert all(any("data bar" in r for r in rec.remarks) == (bars > 0) for rec in records)
        scores.append(f1_score(y, small_model.model.predict(records), average="macro"))
    assert abs(scores[0] - scores[1]) <= 0.02
