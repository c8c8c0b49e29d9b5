"""Open the HTML batch report in a real headless browser (chromium through selenium).

Skipped, with the reason, only when selenium or a chromium/chromedriver binary is missing.
Install on Debian: ``apt-get install -y chromium chromium-driver`` and ``pip install selenium``.
"""

from __future__ import annotations

import pytest
from _browser import chromium_driver, severe_messages
from _report_data import CLASSES, scores_fixture

from topoclass.report import write_batch_report


@pytest.fixture(scope="module")
def browser():
    with chromium_driver() as driver:
        yield driver


@pytest.fixture(scope="module")
def report_page(tmp_path_factory):
    scores, rows = scores_fixture(tmp_path_factory.mktemp("batch"), n_ok=5)
    return write_batch_report(scores, details=2), rows


def test_report_loads_without_errors_and_every_image_shows(browser, report_page):
    out, rows = report_page
    browser.get(out.resolve().as_uri())
    assert browser.title == "topoclass batch report"
    assert severe_messages(browser) == []
    images = browser.find_elements("css selector", "img")
    assert len(images) == len(rows) - 1  # every scored image has a thumbnail
    widths = browser.execute_script(
        "return Array.from(document.images).map(i => i.complete ? i.naturalWidth : 0);")
    assert all(w > 0 for w in widths), widths


def test_clicking_a_header_sorts_the_rows(browser, report_page):
    out, rows = report_page
    browser.get(out.resolve().as_uri())
    column = f"p {CLASSES[1]}"
    headers = browser.find_elements("css selector", "#scores thead th")
    index = [h.text.replace("↕", "").strip() for h in headers].index(column)

    def values():
        return browser.execute_script(
            "return Array.from(document.querySelectorAll('#scores tbody tr'))"
            ".map(r => r.cells[arguments[0]].dataset.value);", index)

    headers[index].click()
    up = values()
    numbers = [float(v) for v in up if v != ""]
    assert numbers == sorted(numbers) and len(numbers) == len(rows) - 1
    assert up[-1] == ""  # the failed row (no probability) sorts last
    headers[index].click()
    down = [float(v) for v in values() if v != ""]
    assert down == sorted(numbers, reverse=True)
    # Sorting by the row number restores the file order.
    headers[0].click()
    assert [int(v) for v in browser.execute_script(
        "return Array.from(document.querySelectorAll('#scores tbody tr'))"
        ".map(r => r.cells[0].dataset.value);")] == list(range(len(rows)))
    assert severe_messages(browser) == []


def test_detail_view_opens_with_its_pictures(browser, report_page):
    out, _ = report_page
    browser.get(out.resolve().as_uri())
    link = browser.find_elements("css selector", "a[href^='scores_files/']")[0]
    browser.get(link.get_attribute("href"))
    # Two pictures layered over the one micrograph JPEG, and the diagram with two barcodes.
    boxes = browser.execute_script(
        "return Array.from(document.querySelectorAll('svg')).map(s => "
        "s.getBoundingClientRect().width);")
    assert len(boxes) == 5 and all(w > 100 for w in boxes), boxes
    jpeg = browser.execute_async_script(
        "const done = arguments[0]; const im = new Image();"
        "im.onload = () => done(im.naturalWidth); im.onerror = () => done(-1);"
        "im.src = document.querySelector('svg.layers image').getAttribute('href');")
    assert jpeg > 100
    assert severe_messages(browser) == []
    browser.find_element("link text", "back to the report").click()
    assert browser.current_url == out.resolve().as_uri()
