"""The static report and the live page in a real headless Chromium (Debian's chromium +
chromium-driver, driven by selenium): pages render, every image loads, no console errors,
nothing fetched from the network, and the fleet page shows a unit going offline without a
reload. Screenshots are kept under the pytest temporary folder (path printed).
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

import pytest
from _browser_helpers import broken_images, chromium, console_errors, full_screenshot
from _pages_helpers import copy_store, demo_dir, live_server  # noqa: F401  (fixture)

from agent.store.recorder import RecorderStore
from agent.web.app import create_app


@pytest.fixture(scope="module")
def shots(tmp_path_factory: pytest.TempPathFactory, request: pytest.FixtureRequest) -> Path:
    """Where the screenshots are kept (a pytest temporary folder); printed in the run."""
    path = tmp_path_factory.mktemp("screenshots")
    capture = request.config.pluginmanager.get_plugin("capturemanager")
    if capture is not None:
        with capture.global_and_fixture_disabled():
            print(f"\nscreenshots: {path}")
    return path


def _resources(driver: Any) -> list[str]:
    return list(driver.execute_script(
        "return performance.getEntriesByType('resource').map(e => e.name)"
        ".concat([location.href]);"))


def _check_page(driver: Any, shot: Path) -> None:
    assert broken_images(driver) == []
    assert console_errors(driver) == []
    full_screenshot(driver, shot)
    assert shot.stat().st_size > 10_000


def test_static_report_renders_offline(demo_dir: Path, shots: Path) -> None:  # noqa: F811
    index = demo_dir / "report" / "index.html"
    with chromium() as driver:
        driver.get(index.as_uri())
        assert "Supply report" in driver.title
        figures = driver.find_elements("css selector", "figure.plot img")
        # Fleet (timeline, SARFI, interruptions), ITIC, SEMI F47, swells vs trips, 5 per home,
        # and one waveform per capture.
        assert len(figures) >= 6 + 5 * 3 + 1
        assert all(f.find_element("xpath", "..").text for f in figures)  # each has a caption
        _check_page(driver, shots / "static-report.png")
        # One folder, no network: everything the page loaded is a file in the folder.
        for url in _resources(driver):
            assert url.startswith(demo_dir.joinpath("report").as_uri()), url
        # Times in the site's zone (the demo was asked for Europe/Berlin), UTC on hover.
        stamp = driver.find_element("css selector", "#now time")
        assert stamp.text.endswith(("CET", "CEST")) and stamp.get_attribute(
            "title").endswith("Z UTC")
        # Sortable without a framework: a click on "unit" sorts the units-now rows.
        header = driver.find_element("xpath", "//table[@id='now']//th[text()='unit']")
        header.click()
        header.click()
        names = [c.text for c in driver.find_elements("css selector", "#now tbody td:first-child")]
        assert names == sorted(names, reverse=True)
        # INDICATIVE once on the page that shows verdicts.
        assert driver.page_source.count("not a certified instrument") == 1


def test_live_pages_render(demo_dir: Path, tmp_path: Path, shots: Path) -> None:  # noqa: F811
    url, captures = copy_store(demo_dir, tmp_path / "store")
    app = create_app(url, captures, tz_name="Europe/Berlin", poll_s=1.0)
    with live_server(app) as base, chromium() as driver:
        for path, shot, needle in (("/", "live-fleet.png", "Units now"),
                                   ("/units/home-1", "live-unit.png", "Unit home-1"),
                                   ("/events?category=sag", "live-events.png", "Event log")):
            driver.get(base + path)
            assert needle in driver.title
            _check_page(driver, shots / shot)
            for res in _resources(driver):
                assert res.startswith(base), res  # no CDN, no outside fetch
        driver.get(base + "/units/home-1")
        assert len(driver.find_elements("css selector", ".wave img")) >= 1
        link = driver.find_element("css selector", ".wave a").get_attribute("href")
        assert link.endswith("/comtrade.zip")
        driver.get(base + "/events?category=swell")
        kinds = [c.text for c in driver.find_elements("css selector",
                                                        "#events tbody td:nth-child(3)")]
        assert kinds and all(k.startswith("swell") for k in kinds)


def test_fleet_page_shows_a_unit_going_offline_without_reload(
        demo_dir: Path, tmp_path: Path, shots: Path) -> None:  # noqa: F811
    url, captures = copy_store(demo_dir, tmp_path / "store")
    writer = RecorderStore(url, captures, migrate=False)
    device = "home-2"
    site = next(d["site"] for d in writer.devices() if d["device"] == device)
    # The demo stopped its agents as planned; a fresh heartbeat brings home-2 back online
    # through the store's own commit path.
    now = time.time()
    writer.commit_batch([{"v": 1, "type": "status", "device": device, "site": site,
                          "epoch": "browser-test", "seq": 1, "state": "online", "t": now,
                          "agent_version": "0.1.0", "uptime_s": 5.0, "last_ran": None,
                          "outbox_depth": 3, "clock": {"sync": "ntp", "error_s": 0.01}}])
    app = create_app(url, captures, poll_s=1.0)
    try:
        with live_server(app) as base, chromium() as driver:
            driver.get(base + "/")
            row = f"tr[data-device='{device}'] td.state"
            assert driver.find_element("css selector", row).text == "ok"
            driver.execute_script("window.hcNoReload = 'still here';")
            # The broker's Last Will arrives: the collector records the unit offline.
            writer.set_device_status(device, site, "offline", time.time())
            deadline = time.monotonic() + 30
            while driver.find_element("css selector", row).text != "offline":
                assert time.monotonic() < deadline, "the page did not show the unit offline"
                time.sleep(0.2)
            assert driver.execute_script("return window.hcNoReload;") == "still here"
            reason = driver.find_element("css selector",
                                         f"tr[data-device='{device}'] td.reason").text
            assert "offline" in reason
            assert console_errors(driver) == []
            full_screenshot(driver, shots / "live-fleet-offline.png")
    finally:
        writer.close()
