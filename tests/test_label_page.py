"""The labelling page, in a real headless Chromium, and its server.

The page is driven with the keyboard as a user would; after every step the sheet on disk must
hold exactly the expected rows. The server must refuse requests without the run's token, and a
server killed mid-way must leave a sheet that reads, continues and trains.
"""

from __future__ import annotations

import csv
import json
import os
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from pathlib import Path

import pytest
from _browser import chromium_driver, severe_messages

import topoclass
from topoclass.labeling import LabelBook
from topoclass.labeling.server import LabelServer, LabelSession
from topoclass.labels import read_labels

CLASSES = ["ordered", "vacancies", "grains", "disordered"]


def _rows(path: Path) -> list[list[str]]:
    if not path.exists():
        return []
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.reader(fh))


def _wait_for(check, what: str, timeout: float = 20.0):
    end = time.monotonic() + timeout
    while True:
        value = check()
        if value:
            return value
        if time.monotonic() > end:
            raise AssertionError(f"timed out waiting for {what}")
        time.sleep(0.05)


def _sheet_is(sheet: Path, expected: list[list[str]]) -> None:
    try:
        _wait_for(lambda: _rows(sheet) == expected, "the sheet")
    except AssertionError:
        assert _rows(sheet) == expected  # shows the difference


def _showing(browser, name: str) -> None:
    def shown():
        return browser.find_element("id", "name").text

    try:
        _wait_for(lambda: shown() == name, f"the page to show {name}")
    except AssertionError:
        assert shown() == name


@pytest.fixture
def page(small_dataset, feature_cache, tmp_path):
    images = list(read_labels(small_dataset).images)[::4]  # 6 images, every class
    sheet = tmp_path / "work" / "labels.csv"
    session = LabelSession(images, LabelBook(sheet, CLASSES), cache_dir=feature_cache)
    with LabelServer(session) as server:
        yield server, sheet, [session.book.key(p) for p in images]


def test_label_with_the_keyboard_undo_and_the_sheet_follows(page):
    server, sheet, names = page
    with chromium_driver() as browser:
        from selenium.webdriver.common.by import By
        from selenium.webdriver.common.keys import Keys

        browser.get(server.url)
        _wait_for(lambda: browser.find_elements(By.CSS_SELECTOR, "body[data-ready=yes]"),
                  "the page")
        body = browser.find_element(By.TAG_NAME, "body")
        assert browser.find_element(By.ID, "name").text == names[0]

        body.send_keys("1")
        _sheet_is(sheet, [["image", "label"], [names[0], "ordered"]])
        _showing(browser, names[1])

        group = browser.find_element(By.ID, "group")
        group.send_keys("sample-09", Keys.ENTER)
        body.send_keys("2")
        _sheet_is(sheet, [["image", "label", "group"], [names[0], "ordered", ""],
                          [names[1], "vacancies", "sample-09"]])
        _showing(browser, names[2])

        body.send_keys("3")  # the sample is kept from the previous image
        _sheet_is(sheet, [["image", "label", "group"], [names[0], "ordered", ""],
                          [names[1], "vacancies", "sample-09"],
                          [names[2], "grains", "sample-09"]])

        body.send_keys("u")
        _sheet_is(sheet, [["image", "label", "group"], [names[0], "ordered", ""],
                          [names[1], "vacancies", "sample-09"]])
        _showing(browser, names[2])  # the undone image is shown again

        body.send_keys(Keys.ARROW_LEFT)
        _showing(browser, names[1])
        body.send_keys(Keys.ARROW_RIGHT, Keys.ARROW_RIGHT)
        _showing(browser, names[3])

        body.send_keys("o")  # the site overlay, coloured by coordination
        circles = _wait_for(lambda: browser.find_elements(By.CSS_SELECTOR, "#overlay circle"),
                            "the site overlay")
        assert len(circles) > 50

        field = browser.find_element(By.ID, "newclassname")
        field.send_keys("pits", Keys.ENTER)
        _wait_for(lambda: len(browser.find_elements(By.CSS_SELECTOR, "#classes button")) == 5,
                  "the new class")
        body.send_keys("5")
        _sheet_is(sheet, [["image", "label", "group"], [names[0], "ordered", ""],
                          [names[1], "vacancies", "sample-09"], [names[3], "pits", "sample-09"]])
        thumbs = browser.execute_script(
            "return Array.from(document.querySelectorAll('#strip img'))"
            ".map(i => i.complete ? i.naturalWidth : -1);")
        assert len(thumbs) == len(names) and all(w != 0 for w in thumbs), thumbs
        assert severe_messages(browser) == []


def test_requests_without_the_token_are_refused(page):
    server, sheet, _ = page
    base = server.url.split("?")[0]
    for path, data in (("", None), ("api/state", None), ("api/label?token=wrong",
                                                          b'{"index": 0, "label": "ordered"}')):
        with pytest.raises(urllib.error.HTTPError) as caught:
            urllib.request.urlopen(urllib.request.Request(base + path, data=data), timeout=10)
        assert caught.value.code == 403
    assert not sheet.exists()
    with urllib.request.urlopen(server.url, timeout=10) as reply:
        assert reply.status == 200


def test_a_killed_server_leaves_a_sheet_that_continues_and_trains(small_dataset, feature_cache,
                                                                  tmp_path):
    labelled = read_labels(small_dataset)
    sheet = tmp_path / "labels.csv"
    todo = list(zip(labelled.images, labelled.labels, labelled.groups, strict=True))
    first = _LabelProcess(labelled.images, sheet, feature_cache)
    try:
        for n, (image, label, group) in enumerate(todo[:14]):
            first.label(labelled.images.index(image), label, group)
            assert len(read_labels(sheet, partial=True)) == n + 1
        first.kill()  # SIGKILL: no clean-up runs at all
    finally:
        first.stop()
    assert len(read_labels(sheet, partial=True)) == 14
    second = _LabelProcess(labelled.images, sheet, feature_cache)  # the lock was freed
    try:
        state = second.get("api/state")
        assert sum(item["label"] is not None for item in state["images"]) == 14
        for image, label, group in todo[14:]:
            second.label(labelled.images.index(image), label, group)
    finally:
        second.stop()
    from topoclass.workflow import train_from_labels

    run = train_from_labels(sheet, tmp_path / "model", cv=3, cache_dir=feature_cache,
                            figures=False)
    assert sorted(run.model.classes) == sorted(CLASSES)


class _LabelProcess:
    """``topoclass label`` in a child process, talked to over HTTP."""

    def __init__(self, images, sheet, cache):
        root = Path(topoclass.__file__).resolve().parents[1]
        env = {**os.environ, "PYTHONPATH": str(root)}
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "topoclass", "label", *map(str, images), "--sheet",
             str(sheet), "--classes", ",".join(CLASSES), "--cache", str(cache)],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=env)
        line = self.proc.stdout.readline()
        assert line.startswith("labelling page: http://127.0.0.1:"), (line,
                                                                      self.proc.stderr.read())
        self.url = line.split(": ", 1)[1].strip()
        self.base, self.token = self.url.split("?token=")

    def get(self, path: str) -> dict:
        with urllib.request.urlopen(f"{self.base}{path}?token={self.token}", timeout=30) as r:
            return json.load(r)

    def label(self, index: int, label: str, group: str) -> None:
        body = json.dumps({"index": index, "label": label, "group": group}).encode()
        request = urllib.request.Request(f"{self.base}api/label?token={self.token}", data=body,
                                         headers={"Content-Type": "application/json"})
        with urllib.request.urlopen(request, timeout=30) as reply:
            assert reply.status == 200

    def kill(self) -> None:
        self.proc.kill()
        self.proc.wait(timeout=10)

    def stop(self) -> None:
        if self.proc.poll() is None:
            self.proc.send_signal(signal.SIGINT)
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        self.proc.stdout.close()
        self.proc.stderr.close()
