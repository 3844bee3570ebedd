"""The static report folder: ``halfcycle analyze --html`` on the bundled (invented)
recording, and ``halfcycle report --html`` on a real SQLite store holding a week of 10-min
means. Bands: ANSI C84.1 Range A service 114–126 V (pub), Range B 110–127 V (from memory)."""

from __future__ import annotations

import re
import xml.etree.ElementTree as ET
from pathlib import Path
from zoneinfo import ZoneInfo

import pytest

from agent.cli.demo_history import history_messages
from agent.cli.main import main
from agent.store.recorder import RecorderStore

T_END = 1_800_000_000.0


def _figures(index: Path) -> list[Path]:
    html = index.read_text()
    assert not re.search(r'(src|href)="(https?:)?//', html)  # no network
    srcs = re.findall(r'<img src="([^"]+)"', html)
    assert html.count("<figcaption>") == len(srcs)
    paths = [index.parent / s for s in srcs]
    for p in paths:
        ET.parse(p)  # well-formed SVG
    return paths


def test_analyze_html_on_the_bundled_recording(tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    out = tmp_path / "analysis"
    assert main(["analyze", "--html", str(out), "--tz", "Europe/Berlin"]) == 0
    assert f"HTML report: {out / 'index.html'}" in capsys.readouterr().err
    figs = _figures(out / "index.html")
    assert [p.stem for p in figs] == ["itic", "semi-f47", "profile", "histogram",
                                      "swells-trips"]
    html = (out / "index.html").read_text()
    assert "INVENTED" in html  # the bundled recording is an invented scenario
    assert (out / "assets" / "hc.js").is_file() and (out / "assets" / "hc.css").is_file()


def test_html_option_errors_are_one_line(tmp_path: Path,
                                         capsys: pytest.CaptureFixture[str]) -> None:
    (tmp_path / "file").write_text("x")
    assert main(["analyze", "--html", str(tmp_path / "file")]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "not a folder" in err[0]
    (tmp_path / "site").mkdir()
    (tmp_path / "site" / "index.html").write_text("<p>someone else's page</p>")
    assert main(["analyze", "--html", str(tmp_path / "site")]) == 2
    assert "not a halfcycle report" in capsys.readouterr().err
    assert (tmp_path / "site" / "index.html").read_text().startswith("<p>someone")


def test_report_html_over_a_week_of_ten_minute_means(tmp_path: Path,
                                                     capsys: pytest.CaptureFixture[str]
                                                     ) -> None:
    url = f"sqlite:///{tmp_path / 'recorder.db'}"
    roles = [{"role": "solar", "level_pu": 1.055}, {"role": "plain", "level_pu": 1.0}]
    with RecorderStore(url, tmp_path / "captures") as store:
        for dev in ("home-1", "home-2"):
            store.update_device_model(dev, "invented-street", {
                "nominal_v": 120.0, "nominal_hz": 60.0, "measurement_point": "service",
                "channel_names": ["L1", "L2"]})
        store.commit_batch(list(history_messages(["home-1", "home-2"], roles,
                                                 "invented-street", 120.0, T_END, 7.0,
                                                 ZoneInfo("America/Chicago"))))
        assert store.count("aggregates") == 2 * 7 * 144
    out = tmp_path / "report"
    assert main(["report", "--store", url, "--html", str(out), "--tz",
                 "America/Chicago"]) == 0
    figs = _figures(out / "index.html")
    names = [p.stem for p in figs]
    assert names[:6] == ["fleet-timeline", "sarfi", "interruptions", "itic", "semi-f47",
                         "swells-trips"]
    for dev in ("home-1", "home-2"):
        assert [n for n in names if n.startswith(dev)] == [
            f"{dev}-profile", f"{dev}-daily-envelope", f"{dev}-hour-profile",
            f"{dev}-histogram", f"{dev}-overvoltage-hours"]
    html = (out / "index.html").read_text()
    # Drawn from 10-min means, against the bands of agent.verdicts.limits.
    assert "10-min means per channel" in html
    assert "ANSI C84.1 Range A service 114.0–126.0 V (published)" in html
    assert "ANSI C84.1 Range B service 110.0–127.0 V (from memory)" in html
    # The daily envelope has one bar per local day in the period (7 days span 8 dates).
    days = ET.parse(out / "figures" / "home-1-daily-envelope.svg")
    labels = [t for t in ("".join(e.itertext()) for e in days.iter(
        "{http://www.w3.org/2000/svg}text")) if re.fullmatch(r"\d{4}-\d\d-\d\d", t)]
    assert len(labels) in (7, 8)
    # Verdicts once with the INDICATIVE line.
    assert html.count("not a certified instrument") == 1
    capsys.readouterr()
