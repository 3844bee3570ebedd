"""Figures and page parts, checked against published values and independent computation.

Sources (tests/SOURCES.md): ITIC curve 2000 revision and SEMI F47 (pub); ANSI C84.1 Range A
service 114–126 V (pub) and Range B 110–127 V (from memory); EN 50160 ±10 % and +10/−15 % (pub); the
RMS of a sine A·sin(ωt) is A/√2 (Mathematics, exact); Urms(1/2) per IEC 61000-4-30 Ed.3
5.4.2 (pub).
"""

from __future__ import annotations

import math
import xml.etree.ElementTree as ET
from datetime import UTC

import numpy as np
import pytest

from agent.events.classify import classify
from agent.events.types import Capture
from agent.render import data, figures, pages
from agent.verdicts import Verdict

SVG = "{http://www.w3.org/2000/svg}"


def _svg_texts(svg: str) -> str:
    root = ET.fromstring(svg)
    assert root.tag == f"{SVG}svg"
    return " ".join("".join(t.itertext()) for t in root.iter(f"{SVG}text"))


def _curve(points: tuple[tuple[float, float], ...], d: float) -> float:
    """The drawn step curve's value at duration d (the last point at or before d)."""
    value = points[0][1]
    for x, y in points:
        if x <= d:
            value = y
    return value


@pytest.mark.parametrize("d", [0.03, 0.1, 0.3, 0.7, 2.0, 5.0, 20.0, 50.0])
def test_drawn_itic_lower_curve_agrees_with_the_classifier(d: float) -> None:
    # ITIC 2000 (pub): the classifier and the drawn curve come from the same publication;
    # just below the drawn lower curve is "no_damage", just above it "no_interruption".
    lower = _curve(figures.ITIC_LOWER, d)
    assert classify("dip", lower - 0.02, d, 60.0)["itic_region"] == "no_damage"
    assert classify("dip", lower + 0.02, d, 60.0)["itic_region"] == "no_interruption"


@pytest.mark.parametrize("d", [0.05, 0.3, 0.7, 2.0, 20.0])
def test_drawn_itic_upper_curve_agrees_with_the_classifier(d: float) -> None:
    upper = _curve(figures.ITIC_UPPER, d)
    assert classify("swell", upper + 0.02, d, 60.0)["itic_region"] == "prohibited"
    assert classify("swell", upper - 0.02, d, 60.0)["itic_region"] == "no_interruption"


@pytest.mark.parametrize("d", [0.06, 0.15, 0.3, 0.45, 0.7, 0.95])
def test_drawn_semi_f47_envelope_agrees_with_the_classifier(d: float) -> None:
    # SEMI F47 (pub): 50 % to 200 ms, 70 % to 0.5 s, 80 % to 1 s.
    level = _curve(figures.SEMI_F47, d)
    assert classify("dip", level - 0.02, d, 60.0)["semi_f47"] == "outside"
    assert classify("dip", level + 0.02, d, 60.0)["semi_f47"] == "inside"


def test_event_curve_figures_are_svg_with_text_and_caption() -> None:
    events = [{"kind": "dip", "duration_s": 0.25, "level_pu": 0.65,
               "classification": {"ieee1159_category": "sag",
                                  "ieee1159_duration_class": "instantaneous"}},
              {"kind": "swell", "duration_s": 4.0, "level_pu": 1.13,
               "classification": {"ieee1159_category": "swell",
                                  "ieee1159_duration_class": "temporary"}}]
    for fig, words in ((figures.itic(events), "ITIC"), (figures.semi_f47(events), "SEMI F47"),
                       (figures.swells_vs_trips(events), "OV1")):
        text = _svg_texts(fig.svg)  # text stays text (svg.fonttype none): searchable
        assert words in text
        assert "instantaneous sag" in text or fig.name == "swells-trips"
        assert "SOURCES.md" in fig.caption or "IEEE 1547" in fig.caption
        assert "http" not in fig.svg.replace("http://www.w3.org", "").replace(
            "http://purl.org", "").replace("http://creativecommons.org", "") \
            .replace("https://matplotlib.org", "")


def test_bands_are_the_verdicts_limits() -> None:
    a, b = data.bands_for(120.0, 60.0, "service")
    assert (a.low_v, a.high_v) == pytest.approx((114.0, 126.0))  # ANSI C84.1 A (pub)
    assert (b.low_v, b.high_v) == pytest.approx((110.0, 127.0))  # ANSI C84.1 B (from memory)
    inner, outer = data.bands_for(230.0, 50.0)
    assert (inner.low_v, inner.high_v) == pytest.approx((207.0, 253.0))  # EN 50160 ±10 %
    assert (outer.low_v, outer.high_v) == pytest.approx((195.5, 253.0))  # +10/−15 %


def _dip_capture(rate: float = 7680.0, hz: float = 60.0, v_rms: float = 120.0,
                 residual: float = 0.5) -> Capture:
    """An invented capture: 10 cycles at v_rms, then 20 cycles at residual × v_rms."""
    n_pre, n_post = int(10 * rate / hz), int(20 * rate / hz)
    t = np.arange(n_pre + n_post) / rate
    amp = np.where(np.arange(t.size) < n_pre, 1.0, residual) * v_rms * math.sqrt(2.0)
    scale = 0.01
    counts = np.round(amp * np.sin(2 * math.pi * hz * t) / scale).astype(np.int16)
    return Capture(capture_id="c1", event_id="e1", trigger="start", first_index=1000,
                   trigger_index=1000 + n_pre, trigger_utc=1_700_000_000.0, sample_rate=rate,
                   channel_names=("L1",), scale=np.array([scale]), counts=counts[:, None],
                   pre_cycles=10, post_cycles=20)


def test_capture_trace_urms_half_cycle_matches_the_sine() -> None:
    cap = _dip_capture()
    trace = data.capture_trace(cap, 120.0, 60.0)
    # Time axis: zero at the trigger, pre-trigger samples negative.
    assert trace.t_ms[0] == pytest.approx(-10 / 60 * 1e3)
    # Urms(1/2) on one-cycle windows (IEC 61000-4-30 5.4.2) of a steady sine is A/√2
    # (exact), here 120 V before and 60 V a cycle after the step; count rounding ±0.01 V.
    before = trace.urms[trace.urms_t_ms < -1.0][:, 0]
    after = trace.urms[trace.urms_t_ms > 1000 / 60 + 1.0][:, 0]
    assert before.size >= 5 and after.size >= 30
    assert before == pytest.approx(120.0, abs=0.05)
    assert after == pytest.approx(60.0, abs=0.05)
    # Independent: numpy RMS over the last whole cycle of the record.
    per = int(7680 / 60)
    assert float(np.sqrt(np.mean(trace.v[-per:, 0] ** 2))) == pytest.approx(after[-1], abs=0.05)
    fig = figures.waveform(trace, {"kind": "dip", "level_v": 60.0}, 120.0)
    assert "Urms(1/2)" in _svg_texts(fig.svg) and "IEC 61000-4-30" in fig.caption


def test_verdict_rows_render_any_verdict_generically() -> None:
    new = Verdict("a rule nobody has written yet", "pass", True, "cp", basis={"n": 3}).as_dict()
    report = {"devices": [{"device": "d1", "compliance": {"standard": "ansi", "verdict":
                                                         "range_a", "passed": True,
                                                         "rule": "ANSI C84.1",
                                                         "confidence": "pub"},
                           "verdicts": {"future": new}}]}
    rows = list(pages.verdict_rows(report))
    assert [r["rule"] for r in rows] == ["ANSI C84.1", "a rule nobody has written yet"]
    assert rows[1]["where"] == "d1.verdicts.future" and rows[1]["basis"] == "n: 3"


def test_times_in_the_site_zone_with_utc_on_hover() -> None:
    # 1_700_000_000 s is 2023-11-14 22:13:20 UTC (exact); in November Berlin keeps CET,
    # UTC+1 (EU summer time ends the last Sunday of October, Directive 2000/84/EC).
    html = str(pages.when(1_700_000_000.0, pages.zone("Europe/Berlin")))
    assert "2023-11-14 23:13:20 CET" in html
    assert 'title="2023-11-14T22:13:20Z UTC"' in html
    assert pages.zone("UTC") is UTC
    with pytest.raises(ValueError, match="unknown time zone"):
        pages.zone("Mars/Olympus")
