"""Maps of large micrographs: reading in pieces, tile geometry, and the map of a known mosaic."""

from __future__ import annotations

import csv
import html
import itertools

import numpy as np
import pytest
import tifffile

from topoclass.bigimage import open_large_image, overview
from topoclass.errors import ImageReadError
from topoclass.images import read_micrograph
from topoclass.mapping import map_image, map_totals, plan_tiles, read_tiles, tile_side

KINDS = ("ordered", "vacancies", "grains", "disordered")
QUARTER = 576  # px; a quarter of the pasted mosaic
SPACING = 13.0  # px; one spacing for all quarters, inside the training range (8-20 px)


# ------------------------------------------------------------------ reading in pieces


@pytest.mark.parametrize("layout", [
    {}, {"bigtiff": True}, {"tile": (64, 64)}, {"tile": (64, 48), "compression": "zlib"},
    {"rowsperstrip": 7}, {"rowsperstrip": 7, "compression": "zlib"},
])
def test_piece_equals_the_same_rectangle_of_the_whole_read(tmp_path, layout):
    # Reference: the whole-file reader (topoclass.images, itself tested against PIL/tifffile);
    # a piece must be exactly its rectangle of the whole image.
    pixels = (np.random.default_rng(0).random((300, 410)) * 65535).astype(np.uint16)
    path = tmp_path / "piece.tif"
    tifffile.imwrite(path, pixels, **layout)
    whole = read_micrograph(path).image
    with open_large_image(path) as big:
        assert big.access == ("memmap" if "compression" not in layout and "tile" not in layout
                              else "segments")
        piece = big.read((37, 21, 301, 250)).image
    np.testing.assert_array_equal(piece, whole[21:250, 37:301])


def test_png_is_read_whole_only_within_the_memory_limit(tmp_path):
    from PIL import Image

    path = tmp_path / "field.png"
    Image.fromarray((np.random.default_rng(1).random((200, 300)) * 255).astype(np.uint8)).save(
        path)
    with open_large_image(path) as big:
        assert big.access == "whole"
        np.testing.assert_array_equal(big.read((0, 0, 300, 200)).image,
                                      read_micrograph(path).image)
    with pytest.raises(ImageReadError) as info:
        open_large_image(path, memory_limit_mb=0.5)
    text = str(info.value)
    assert "field.png" in text and "--memory-limit" in text and "\n" not in text


def test_truncated_tiff_gives_one_clear_line(tmp_path):
    path = tmp_path / "cut.tif"
    tifffile.imwrite(path, np.zeros((512, 512), np.uint16) + 7, tile=(128, 128))
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])
    with pytest.raises(ImageReadError) as info:
        open_large_image(path)
    text = str(info.value)
    assert "cut.tif" in text and "truncated" in text and "\n" not in text


def test_overview_is_the_block_mean(tmp_path):
    # Reference: skimage.measure.block_reduce on the whole image (scikit-image).
    from skimage.measure import block_reduce

    pixels = (np.random.default_rng(2).random((600, 900)) * 65535).astype(np.uint16)
    path = tmp_path / "wide.tif"
    tifffile.imwrite(path, pixels, tile=(128, 128))
    with open_large_image(path) as big:
        small, factor = overview(big, longest=200)
    whole = read_micrograph(path).image
    assert factor == 5 and small.shape == (120, 180)
    np.testing.assert_allclose(small, block_reduce(whole, (5, 5), np.mean), atol=1e-6)


# ------------------------------------------------------------------ tile geometry


@pytest.mark.parametrize("shape,tile,overlap", [
    ((1152, 1152), 230, 39), ((100, 5000), 270, 40), ((999, 1001), 128, 0),
    ((64, 64), 256, 30), ((12000, 9000), 400, 45),
])
def test_tiles_cover_the_image_exactly_once_outside_the_overlaps(shape, tile, overlap):
    # Elementary geometry: the cores partition the frame (areas add up and no two cores
    # intersect, so every pixel is in exactly one); each tile holds its core and lies in the
    # frame; neighbouring tiles share at least the overlap.
    plan = plan_tiles(shape, tile, overlap)
    rows, cols = shape
    cores, boxes = plan.cores, plan.boxes
    area = (cores[:, 2] - cores[:, 0]) * (cores[:, 3] - cores[:, 1])
    assert area.sum() == rows * cols
    count = np.zeros(shape, dtype=np.int32) if rows * cols <= 2_000_000 else None
    if count is not None:
        for x0, y0, x1, y1 in cores:
            count[y0:y1, x0:x1] += 1
        assert (count == 1).all()
    assert (boxes[:, 0] >= 0).all() and (boxes[:, 1] >= 0).all()
    assert (boxes[:, 2] <= cols).all() and (boxes[:, 3] <= rows).all()
    assert (boxes[:, :2] <= cores[:, :2]).all() and (boxes[:, 2:] >= cores[:, 2:]).all()
    side = min(tile, rows, cols)
    assert ((boxes[:, 2] - boxes[:, 0]) >= min(side, cols)).all()
    for i, j in itertools.combinations(range(len(plan)), 2):
        a, b = cores[i], cores[j]
        if a[0] == b[0] and a[2] == b[2] and a[3] == b[1]:  # vertical neighbours
            assert boxes[i][3] - boxes[j][1] >= overlap
        if a[1] == b[1] and a[3] == b[3] and a[2] == b[0]:  # horizontal neighbours
            assert boxes[i][2] - boxes[j][0] >= overlap
        if len(plan) > 400:
            break


def test_tile_side_holds_the_training_site_count():
    # A square of side L on a triangular lattice of spacing a holds L^2 / (sqrt(3)/2 a^2)
    # sites (elementary geometry: each site owns a hexagon of that area).
    class Card:
        settings = {"training_images": {"median_n_sites": 400.0}}

    side, note = tile_side(Card(), 10.0)
    assert side == round(10.0 * np.sqrt(400 * np.sqrt(3) / 2))
    assert "400 sites" in note


def test_totals_count_cores_once():
    rows = [{"status": "ok", "verdict": "a", "core_x0": 0, "core_y0": 0, "core_x1": 10,
             "core_y1": 10},
            {"status": "ok", "verdict": "b", "core_x0": 10, "core_y0": 0, "core_x1": 40,
             "core_y1": 10},
            {"status": "error", "verdict": "", "core_x0": 0, "core_y0": 10, "core_x1": 40,
             "core_y1": 20}]
    totals = {t["verdict"]: t for t in map_totals(rows, ["a", "b"], pixel_size_nm=50.0)}
    assert totals["a"]["fraction"] == pytest.approx(100 / 800)
    assert totals["b"]["fraction"] == pytest.approx(300 / 800)
    assert totals["not measured"]["fraction"] == pytest.approx(400 / 800)
    assert totals["b"]["area_um2"] == pytest.approx(300 * 0.05**2)


# ------------------------------------------------------------------ the map of a known mosaic


@pytest.fixture(scope="module")
def pasted_mosaic(tmp_path_factory, small_dataset):
    """Four invented micrographs of known class pasted 2 x 2, as a tiled 16-bit TIFF."""
    from topoclass.synth import draw_sample, grains_per_spacing2, make_micrograph

    # The grains quarter holds grains of the training images' size (in spacings): with the
    # few grains of one training image spread over a quarter, a tile can sit inside one grain.
    n_grains = round(grains_per_spacing2(small_dataset.parent) * (QUARTER / SPACING) ** 2)
    quarters = []
    for k, kind in enumerate(KINDS):
        sample = draw_sample(kind, seed=100 + k)
        sample["spacing_range_px"] = [SPACING, SPACING]
        amounts = {"n_grains": n_grains} if kind == "grains" else None
        quarters.append(make_micrograph(kind, size=QUARTER, seed=200 + k, sample=sample,
                                        amounts=amounts)[0])
    mosaic = np.block([[quarters[0], quarters[1]], [quarters[2], quarters[3]]])
    path = tmp_path_factory.mktemp("mosaic") / "mosaic.tif"
    tifffile.imwrite(path, (mosaic * 65535).astype(np.uint16), tile=(128, 128),
                     compression="zlib", resolution=(1e7 / 7.7, 1e7 / 7.7),
                     resolutionunit="CENTIMETER")
    return path


@pytest.fixture(scope="module")
def mosaic_map(pasted_mosaic, small_model, tmp_path_factory):
    from topoclass.model import load_model

    model = load_model(small_model.directory)
    out = tmp_path_factory.mktemp("map")
    summary = map_image(model, pasted_mosaic, out, jobs=2)
    return model, summary, out


def test_map_of_four_pasted_images_recovers_each_quarter(mosaic_map):
    model, summary, out = mosaic_map
    rows = read_tiles(out / "tiles.csv")
    assert len(rows) == len(summary.plan) == summary.scored
    inside = 0
    for r in rows:
        x0, y0, x1, y1 = (int(r[k]) for k in ("x0", "y0", "x1", "y1"))
        col = 0 if x1 <= QUARTER else 1 if x0 >= QUARTER else None
        row = 0 if y1 <= QUARTER else 1 if y0 >= QUARTER else None
        if col is None or row is None:
            continue  # the tile straddles a seam
        inside += 1
        assert r["predicted"] == KINDS[2 * row + col], r
    assert inside >= 12
    totals = {t["verdict"]: t for t in summary.totals}
    assert sum(t["fraction"] for t in summary.totals) == pytest.approx(1.0)
    assert totals["ordered"]["area_um2"] == pytest.approx(
        totals["ordered"]["area_px"] * 0.0077**2, rel=1e-3)


def test_map_outputs_columns_and_resume(mosaic_map, pasted_mosaic):
    model, summary, out = mosaic_map
    with open(out / "tiles.csv", newline="", encoding="utf-8") as fh:
        header = next(csv.reader(fh))
    classes = [str(c) for c in model.classes]
    assert header[:8] == ["x0", "y0", "x1", "y1", "status", "predicted", "confidence",
                          "verdict"]
    assert header[8:8 + len(classes)] == [f"p_{c}" for c in classes]
    assert "unfamiliar" in header and "n_sites" in header
    # A killed run: keep the first rows and half a row; resume maps only the rest.
    text = (out / "tiles.csv").read_text(encoding="utf-8").splitlines(keepends=True)
    killed = out.parent / (out.name + "-killed")
    killed.mkdir()
    (killed / "map.json").write_text((out / "map.json").read_text())
    (killed / "tiles.csv").write_text("".join(text[:6]) + text[6][:20], encoding="utf-8")
    again = map_image(model, pasted_mosaic, killed, resume=True)
    assert again.skipped == 5 and again.scored == len(summary.plan) - 5
    assert sorted(read_tiles(killed / "tiles.csv"), key=lambda r: (int(r["y0"]), int(r["x0"]))) \
        == sorted(read_tiles(out / "tiles.csv"), key=lambda r: (int(r["y0"]), int(r["x0"])))
    with pytest.raises(Exception, match="--resume"):
        map_image(model, pasted_mosaic, killed)


def test_map_pictures(mosaic_map):
    from PIL import Image

    from topoclass.report.map_view import write_map_views
    from topoclass.scoring import CAUTION

    _, summary, out = mosaic_map
    png, page = write_map_views(out)
    with Image.open(png) as im:
        assert im.size[0] > 1000
    text = page.read_text(encoding="utf-8")
    assert html.escape(CAUTION) in text and text.count("class='tile'") == len(summary.plan)


def test_the_100_megapixel_guard_still_protects_score(tmp_path, small_model):
    # A header declaring 10,001 x 10,000 pixels: score refuses it before decoding, as before.
    from topoclass.model import load_model
    from topoclass.scoring import read_scores, score_images

    path = tmp_path / "huge.tif"
    tifffile.imwrite(path, shape=(10_000, 10_001), dtype=np.uint8)  # sparse on disk
    summary = score_images(load_model(small_model.directory), [path], tmp_path / "s.csv",
                           cache_dir=False)
    assert summary.failed == 1
    row = read_scores(tmp_path / "s.csv")[0]
    assert row["status"] == "error" and "100,000,000" in row["message"]


# ------------------------------------------------------------------ the analysed region


@pytest.mark.parametrize("edge", ["bottom", "top"])
@pytest.mark.parametrize("rows", [700, 2600])
def test_large_image_region_matches_the_whole_image_stage(tmp_path, edge, rows):
    # Reference: topoclass.region.analysed_region on the whole image read at once (tested on
    # its own against pasted data bars); read in edge strips (2600 rows: two strips of 1024
    # with rows between them unread) the large image must give the same box and bar.
    from topoclass.mapping import large_image_region
    from topoclass.region import analysed_region
    from topoclass.synth import add_data_bar, make_micrograph

    field = make_micrograph("ordered", size=400, seed=5)[0]
    field = np.tile(field, (-(-rows // 400), 1))[:rows]
    pixels, boundary = add_data_bar(field, height=60, edge=edge, seed=2)
    path = tmp_path / "bar.tif"
    tifffile.imwrite(path, (pixels * 65535).astype(np.uint16), tile=(128, 128))
    whole = analysed_region(read_micrograph(path).image)
    with open_large_image(path) as big:
        found = large_image_region(big)
        assert found.box == whole.box and found.data_bar == whole.data_bar
        assert found.data_bar.edge == edge and found.data_bar.boundary == boundary
        # The user's region (fractions of the frame) is searched for a bar inside it.
        half = large_image_region(big, (0.0, 0.0, 0.5, 1.0))
        assert half.box[::2] == (0, 200) and half.data_bar is not None
        assert large_image_region(big, auto=False).box == (0, 0, 400, rows + 60)


def test_map_leaves_the_data_bar_out_of_every_tile(tmp_path, small_model):
    from PIL import Image

    from topoclass.mapping import read_map_header
    from topoclass.model import load_model
    from topoclass.report.map_view import write_map_views
    from topoclass.synth import add_data_bar, draw_sample, make_micrograph

    sample = draw_sample("ordered", seed=100)
    sample["spacing_range_px"] = [SPACING, SPACING]
    field = make_micrograph("ordered", size=QUARTER, seed=200, sample=sample)[0]
    pixels, boundary = add_data_bar(field, edge="bottom", seed=4)
    path = tmp_path / "with-bar.tif"
    tifffile.imwrite(path, (pixels * 65535).astype(np.uint16), tile=(128, 128))
    out = tmp_path / "map"
    summary = map_image(load_model(small_model.directory), path, out)
    bar = summary.region.data_bar
    assert bar is not None and bar.edge == "bottom" and bar.boundary == boundary
    rows = read_tiles(out / "tiles.csv")
    assert rows and max(int(r["y1"]) for r in rows) < boundary
    assert all(r["status"] == "ok" and r["predicted"] == "ordered" for r in rows)
    # The cores cover the analysed region exactly once (elementary geometry).
    x0, y0, x1, y1 = summary.region.box
    assert sum((int(r["core_x1"]) - int(r["core_x0"])) * (int(r["core_y1"]) - int(r["core_y0"]))
               for r in rows) == (x1 - x0) * (y1 - y0)
    assert read_map_header(out)["data_bar"]["boundary"] == boundary
    assert any("data bar along the bottom edge" in n for n in summary.notes)
    png, page = write_map_views(out)
    text = page.read_text(encoding="utf-8")
    assert "class='left-out bar'" in text and f"y='{boundary}'" in text
    with Image.open(png) as im:
        assert im.size[0] > 1000


# ------------------------------------------------------------------ on a Dask cluster


def test_map_on_a_local_cluster_writes_the_rows_of_one_process(tmp_path, small_model,
                                                               monkeypatch, capsys):
    # Reference: the project's own single-process map (jobs=1), as score --cluster is checked
    # in tests/test_cluster.py; two local worker processes on 127.0.0.1, closed at the end.
    pytest.importorskip("distributed", reason='the cluster extra is not installed (pip install '
                        '".[cluster]")')
    import sys

    from topoclass.cli import main
    from topoclass.model import load_model
    from topoclass.synth import add_data_bar, draw_sample, make_micrograph

    sample = draw_sample("vacancies", seed=101)
    sample["spacing_range_px"] = [SPACING, SPACING]
    field = make_micrograph("vacancies", size=480, seed=201, sample=sample)[0]
    pixels, _ = add_data_bar(field, edge="top", seed=6)
    path = tmp_path / "scan.tif"
    tifffile.imwrite(path, (pixels * 65535).astype(np.uint16), tile=(128, 128))
    one = tmp_path / "one"
    map_image(load_model(small_model.directory), path, one)
    out = tmp_path / "cluster"
    monkeypatch.setattr(sys, "argv", ["topoclass", "map", str(small_model.directory), str(path),
                                      "--out", str(out), "--cluster", "local:2"])
    main()
    captured = capsys.readouterr()
    assert "cluster: local cluster on 127.0.0.1, 2 worker(s)" in captured.err
    assert (out / "tiles.csv").read_text() == (one / "tiles.csv").read_text()
    assert (out / "map.png").exists() and "Caution" in captured.out
