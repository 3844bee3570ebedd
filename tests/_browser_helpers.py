"""Headless Chromium (Debian's ``chromium`` + ``chromium-driver``) driven by selenium."""

from __future__ import annotations

import shutil
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                  "--no-first-run", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--window-size=1280,1600")


def _binary(*names: str) -> str | None:
    for name in names:
        found = shutil.which(name)
        if found:
            return found
    return None


@contextmanager
def chromium() -> Iterator[Any]:
    """A fresh headless Chromium with its own profile directory; skips when not installed."""
    webdriver = pytest.importorskip("selenium.webdriver")
    from selenium.webdriver.chrome.service import Service

    browser = _binary("chromium", "chromium-browser")
    driver_bin = _binary("chromedriver")
    if browser is None or driver_bin is None:
        pytest.skip("Debian's chromium and chromium-driver are not installed (.ci/run installs)")
    profile = tempfile.mkdtemp(prefix="hc-chromium-")
    opts = webdriver.ChromeOptions()
    opts.binary_location = browser
    for flag in CHROMIUM_FLAGS:
        opts.add_argument(flag)
    opts.add_argument(f"--user-data-dir={profile}")
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(driver_bin), options=opts)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


def console_errors(driver: Any) -> list[dict[str, Any]]:
    """SEVERE entries of the browser log (console errors, failed loads)."""
    return [e for e in driver.get_log("browser") if e.get("level") == "SEVERE"]


def broken_images(driver: Any) -> list[str]:
    """Sources of images that did not load (naturalWidth 0), after waiting for all."""
    driver.execute_script("document.querySelectorAll('img').forEach(i => i.loading = 'eager');")
    driver.set_script_timeout(60)
    return list(driver.execute_async_script(
        "const done = arguments[0];"
        "const imgs = Array.from(document.images);"
        "Promise.all(imgs.map(i => i.complete ? null : new Promise(r => {"
        "  i.addEventListener('load', r); i.addEventListener('error', r); })))"
        ".then(() => done(imgs.filter(i => !(i.naturalWidth > 0)).map(i => i.src)));"))


def full_screenshot(driver: Any, path: Path) -> Path:
    """A screenshot of the whole page height."""
    height = int(driver.execute_script("return document.documentElement.scrollHeight"))
    driver.set_window_size(1280, min(max(height, 800), 16000))
    driver.save_screenshot(str(path))
    return path
