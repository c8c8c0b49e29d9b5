"""A real headless Chromium for page tests (Debian's chromium and chromedriver via selenium).

``chromium_driver()`` skips the calling test, saying why, only when selenium, the browser or
chromedriver is missing. Install on Debian: ``apt-get install -y chromium chromium-driver``.
"""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager

import pytest

_BROWSERS = ("chromium", "chromium-browser", "google-chrome", "google-chrome-stable")
_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
          "--disable-component-update", "--disable-sync", "--no-first-run")


@contextmanager
def chromium_driver(window: str = "1300,1000") -> Iterator:
    """A selenium Chrome driver on a fresh profile, quit when the block ends."""
    webdriver = pytest.importorskip("selenium.webdriver", reason="selenium is not installed "
                                    "(pip install selenium)")
    binary = next((shutil.which(b) for b in _BROWSERS if shutil.which(b)), None)
    driver_path = shutil.which("chromedriver")
    if binary is None or driver_path is None:
        pytest.skip("no chromium/chrome binary or chromedriver on PATH "
                    "(apt-get install -y chromium chromium-driver)")
    from selenium.webdriver.chrome.service import Service

    with tempfile.TemporaryDirectory(prefix="topoclass-chromium-") as profile:
        options = webdriver.ChromeOptions()
        options.binary_location = binary
        for flag in _FLAGS:
            options.add_argument(flag)
        options.add_argument(f"--user-data-dir={profile}")
        options.add_argument(f"--window-size={window}")
        options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
        driver = webdriver.Chrome(options=options, service=Service(driver_path))
        try:
            yield driver
        finally:
            driver.quit()


def severe_messages(driver) -> list[dict]:
    """Console messages of level SEVERE (script errors, failed loads)."""
    return [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]
