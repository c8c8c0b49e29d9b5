"""Open map.html in a real headless browser (chromium through selenium): zoom and tile details.

Skipped, with the reason, only when selenium or a chromium/chromedriver binary is missing.
The map folder is written by hand (a plan from ``plan_tiles`` and rows in the tiles.csv
layout), so this checks the page, not the classifier.
"""

from __future__ import annotations

import json

import numpy as np
import pytest
import tifffile
from _browser import chromium_driver, severe_messages

from topoclass.mapping import plan_tiles, tile_columns
from topoclass.report.map_view import write_map_views
from topoclass.rowfile import csv_header, csv_line

CLASSES = ["disordered", "ordered"]


@pytest.fixture(scope="module")
def map_page(tmp_path_factory):
    out = tmp_path_factory.mktemp("map")
    image = out / "scan.tif"
    pixels = (np.random.default_rng(0).random((600, 900)) * 65535).astype(np.uint16)
    tifffile.imwrite(image, pixels, tile=(128, 128))
    plan = plan_tiles((600, 900), 256, 30)
    columns = tile_columns(CLASSES)
    lines = [csv_header(columns)]
    for i, (box, core) in enumerate(zip(plan.boxes, plan.cores, strict=True)):
        verdict = CLASSES[i % 2] if i != 1 else "unfamiliar"
        row = dict(zip(("x0", "y0", "x1", "y1"), box.tolist(), strict=True))
        row.update(zip(("core_x0", "core_y0", "core_x1", "core_y1"), core.tolist(), strict=True))
        row.update(status="ok", verdict=verdict, predicted=CLASSES[i % 2], confidence=0.9,
                   n_sites=300 + i)
        lines.append(csv_line(row, columns))
    (out / "tiles.csv").write_text("".join(lines), encoding="utf-8")
    header = {"image": str(image), "shape": [600, 900], "tile_px": plan.tile,
              "overlap_px": plan.overlap, "spacing_px": 12.0, "pixel_size_nm": 8.0,
              "classes": CLASSES, "n_tiles": len(plan)}
    (out / "map.json").write_text(json.dumps(header), encoding="utf-8")
    _, page = write_map_views(out)
    return page, plan


@pytest.fixture(scope="module")
def browser():
    with chromium_driver() as driver:
        yield driver


def test_map_page_loads_with_every_tile(browser, map_page):
    page, plan = map_page
    browser.get(page.resolve().as_uri())
    assert severe_messages(browser) == []
    assert len(browser.find_elements("css selector", "#map rect.tile")) == len(plan)
    href = browser.execute_script("return document.querySelector('#map image')"
                                  ".getAttribute('href').slice(0, 23);")
    assert href == "data:image/jpeg;base64,"
    assert "Re-validate the model" in browser.find_element("css selector", ".caution").text


def test_zoom_buttons_change_the_view(browser, map_page):
    page, _ = map_page
    browser.get(page.resolve().as_uri())

    def width():
        return float(browser.execute_script(
            "return document.getElementById('map').getAttribute('viewBox');").split()[2])

    assert width() == 900
    browser.find_element("id", "zoom-in").click()
    assert width() == pytest.approx(450)
    browser.find_element("id", "zoom-in").click()
    assert width() == pytest.approx(225)
    browser.find_element("id", "zoom-fit").click()
    assert width() == 900


def test_clicking_a_tile_shows_its_details(browser, map_page):
    page, plan = map_page
    browser.get(page.resolve().as_uri())
    tile = browser.find_elements("css selector", "#map rect.tile")[1]
    browser.execute_script(
        "arguments[0].dispatchEvent(new MouseEvent('click', {bubbles: true}));", tile)
    text = browser.find_element("id", "tile-detail").text
    x0, y0, x1, y1 = plan.boxes[1].tolist()
    assert f"tile {x0},{y0} – {x1},{y1}" in text
    assert "unfamiliar" in text and "301" in text
    assert "chosen" in tile.get_attribute("class")
