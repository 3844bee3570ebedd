"""Compliance functions against the published (or remembered) limits, boundary by boundary.

Limits: ANSI C84.1 Range A service 114-126 V on 120 V (pub); Range A utilization 108-125 V,
Range B service 110-127 V, utilization 104-127 V (from memory); EN 50160 10-min means within
Un ±10 % for 95 % of the week, all within +10 %/-15 % (pub); EN 50549-1 10-min mean above
1.10 Un (from memory). tests/SOURCES.md lists them with their confidence.
"""

from __future__ import annotations

import numpy as np
import pytest

from agent.report.compliance import (
    ansi_c84_1,
    ansi_limits,
    en50160_voltage,
    moving_rms_mean,
    overvoltage_summary,
    range_check,
    standard_for,
)

EPS = 0.01  # [V] a step well above float noise, well below any limit's meaning


@pytest.mark.parametrize(
    ("range_name", "point", "low", "high", "source"),
    [
        # ANSI C84.1 Range A service 114-126 V (pub)
        ("A", "service", 114.0, 126.0, "pub"),
        # ANSI C84.1 Range A utilization 108-125 V (from memory)
        ("A", "outlet", 108.0, 125.0, "mem"),
        # ANSI C84.1 Range B service 110-127 V (from memory)
        ("B", "service", 110.0, 127.0, "mem"),
        # ANSI C84.1 Range B utilization 104-127 V (from memory)
        ("B", "outlet", 104.0, 127.0, "mem"),
    ],
)
def test_ansi_limits_on_120_v(range_name: str, point: str, low: float, high: float,
                              source: str) -> None:
    assert ansi_limits(120.0, range_name, point) == pytest.approx((low, high))
    # Scaled to the declared nominal: 240 V (line to line) doubles every limit.
    assert ansi_limits(240.0, range_name, point) == pytest.approx((2 * low, 2 * high))


@pytest.mark.parametrize(
    ("point", "low", "high"),
    [("service", 114.0, 126.0),  # ANSI C84.1 Range A service 114-126 V (pub)
     ("outlet", 108.0, 125.0)],  # ANSI C84.1 Range A utilization 108-125 V (from memory)
)
def test_range_a_boundaries_both_sides(point: str, low: float, high: float) -> None:
    # Exactly on a limit is inside; a hair beyond is outside (limits inclusive).
    on = ansi_c84_1([low, high], 120.0, point)
    assert on["verdict"] == "range_a" and on["passed"] is True
    below = ansi_c84_1([low - EPS], 120.0, point)
    assert below["range_a"]["passed"] is False
    assert below["range_a"]["time_below_s"] == 1.0 and below["range_a"]["time_above_s"] == 0.0
    above = ansi_c84_1([high + EPS], 120.0, point)
    assert above["range_a"]["passed"] is False and above["range_a"]["time_above_s"] == 1.0


@pytest.mark.parametrize(
    ("point", "low", "high"),
    [("service", 110.0, 127.0),  # ANSI C84.1 Range B service 110-127 V (from memory)
     ("outlet", 104.0, 127.0)],  # ANSI C84.1 Range B utilization 104-127 V (from memory)
)
def test_range_b_boundaries_both_sides(point: str, low: float, high: float) -> None:
    inside_b = ansi_c84_1([low, high], 120.0, point)
    assert inside_b["verdict"] == "range_b"  # outside A, inside B
    assert inside_b["passed"] is False and inside_b["rule"].startswith("ANSI C84.1 Range B")
    assert ansi_c84_1([low - EPS], 120.0, point)["verdict"] == "outside_b"
    assert ansi_c84_1([high + EPS], 120.0, point)["verdict"] == "outside_b"


def test_ansi_fractions_times_worst_values() -> None:
    # 10 per-second values on 120 V service: 7 inside Range A, 2 below 114 V, 1 above 126 V
    # (ANSI C84.1 Range A service, pub). Counted by hand.
    v = np.array([120, 121, 119, 118, 122, 125, 115, 113.5, 112.0, 126.5])
    r = ansi_c84_1(v, 120.0, "service")
    a = r["range_a"]
    assert a["count"] == 10
    assert a["fraction_inside"] == pytest.approx(0.7)
    assert a["time_below_s"] == 2.0 and a["time_above_s"] == 1.0
    assert a["worst_low_v"] == 112.0 and a["worst_high_v"] == 126.5
    # 112-126.5 V is within Range B service 110-127 V (from memory)
    assert r["verdict"] == "range_b"
    # The same values as 10-min means: time outside counts 600 s each.
    r10 = ansi_c84_1(v, 120.0, "service", interval_s=600.0)
    assert r10["range_a"]["time_below_s"] == 1200.0


def test_excluded_and_missing_values_are_not_judged() -> None:
    # A flagged second (IEC 61000-4-30 Ed.3 flagging concept, from memory) and NaN are skipped.
    v = np.array([120.0, 60.0, np.nan, 121.0])
    r = ansi_c84_1(v, 120.0, exclude=[False, True, False, False])
    assert r["range_a"]["count"] == 2 and r["passed"] is True
    assert ansi_c84_1([np.nan], 120.0)["verdict"] == "no_data"
    with pytest.raises(ValueError, match="exclude"):
        ansi_c84_1(v, 120.0, exclude=[True])
    with pytest.raises(ValueError, match="measurement_point"):
        ansi_c84_1(v, 120.0, "meter")


def test_en50160_band_boundaries() -> None:
    un = 230.0
    # EN 50160: Un ±10 % is 207-253 V (pub); exactly on the limits is inside.
    r = en50160_voltage([207.0, 253.0], un)
    assert r["band"]["low_v"] == pytest.approx(207.0)
    assert r["band"]["high_v"] == pytest.approx(253.0)
    assert r["passed"] is True and r["complete_week"] is False
    # Above +10 % fails the "all within +10 %" clause (pub) whatever the share.
    over = en50160_voltage([230.0] * 99 + [253.0 + EPS], un)
    assert over["passed"] is False and "all 10-min means" in over["rule"]
    # -15 % (195.5 V) is the lower edge of "all" (pub): on it inside, below it fails.
    assert en50160_voltage([195.5] + [230.0] * 99, un)["all"]["passed"] is True
    assert en50160_voltage([195.5 - EPS] + [230.0] * 99, un)["passed"] is False


def test_en50160_95_percent_share() -> None:
    un = 230.0
    # 1008 means in a week (7 × 24 × 6). EN 50160: at least 95 % within ±10 % (pub).
    # 5 % of 1008 = 50.4, so 50 means at 200 V (below -10 %, above -15 %) still pass, 51 fail.
    ok = np.array([230.0] * 958 + [200.0] * 50)
    bad = np.array([230.0] * 957 + [200.0] * 51)
    r_ok, r_bad = en50160_voltage(ok, un), en50160_voltage(bad, un)
    assert r_ok["complete_week"] and r_ok["passed"] is True
    assert r_ok["band"]["fraction_inside"] == pytest.approx(958 / 1008)
    assert r_bad["passed"] is False and "95 %" in r_bad["rule"]
    assert r_bad["band"]["time_below_s"] == 51 * 600.0


def test_moving_mean_against_numpy_convolution() -> None:
    # Oracle: RMS of each full 600-s window by numpy convolution of the squares.
    rng = np.random.default_rng(7)
    t = np.arange(1000.0) + 1.7e9
    v = 230.0 + rng.normal(0, 5, t.size)
    t_end, mean = moving_rms_mean(t, v)
    expected = np.sqrt(np.convolve(v * v, np.ones(600), "valid") / 600)
    assert t_end[0] == t[599] and t_end.size == 401
    np.testing.assert_allclose(mean, expected, rtol=1e-12)
    # A gap breaks every window across it.
    t_gap = np.delete(t, 300)
    v_gap = np.delete(v, 300)
    t2, _ = moving_rms_mean(t_gap, v_gap)
    assert t2.size == 1000 - 1 - 600 - 300 + 1  # windows ending after t[899] only


def test_overvoltage_summary_counts_and_daily_max() -> None:
    # 1.10 pu on 230 V = 253 V: EN 50549-1 10-min mean trip level (from memory).
    day0 = 1_780_000_000.0 - 1_780_000_000.0 % 86400
    t = np.concatenate([day0 + np.arange(700.0), day0 + 86400 + np.arange(10.0)])
    mean = np.full(t.size, 240.0)
    mean[100:110] = 254.0  # 10 s above 253 V
    mean[200] = 253.0  # on the limit: not above
    peak = mean.copy()
    peak[300] = 270.0  # a swell peak within one second
    peak[705] = 260.0  # next day's maximum
    s = overvoltage_summary(t, mean, peak, 230.0)
    assert s["threshold_v"] == pytest.approx(253.0)
    assert s["seconds_above"] == 10 and s["seconds_peak_above"] == 12
    assert s["max_v"] == 270.0 and s["max_pu"] == pytest.approx(270.0 / 230.0)
    days = sorted(s["max_per_day"].items())
    assert [v for _, v in days] == [270.0, 260.0]
    # 700 contiguous seconds give 101 full 10-min windows (the next day's 10 s give none);
    # none averages above 253 V: 10 s at 254 V cannot lift a 600-s mean of 240 V past it.
    assert s["ten_min_means"] == 101 and s["ten_min_above"] == 0
    # Stored 10-min aggregates are used as given when passed.
    s2 = overvoltage_summary(t, mean, None, 230.0, ten_min_means_v=[250.0, 253.5, np.nan])
    assert s2["ten_min_means"] == 2 and s2["ten_min_above"] == 1


def test_range_check_rejects_bad_limits_and_standard_choice() -> None:
    with pytest.raises(ValueError):
        range_check([1.0], 5.0, 5.0, rule="x", confidence="cp")
    # Common practice: 60 Hz supplies are judged by ANSI C84.1, 50 Hz ones by EN 50160.
    assert standard_for(120.0, 60.0) == "ansi" and standard_for(230.0, 50.0) == "en50160"
    assert standard_for(120.0, None) == "ansi" and standard_for(230.0, None) == "en50160"


def test_ten_minute_means_clock_aligned_and_complete_only() -> None:
    from agent.report.compliance import ten_minute_means

    start = 1_780_000_200.0  # a multiple of 600 s
    t = start + np.arange(1800.0)
    # First interval alternates 240/220 V: RMS = sqrt((240² + 220²) / 2) = sqrt(53000) V
    # (analytic). Second: 7 values missing, 593 < 99 % of 600 (common practice): dropped.
    # Third: constant 231 V with one flagged second: kept and flagged.
    v = np.where(np.arange(1800) % 2 == 0, 240.0, 220.0)
    v[1200:] = 231.0
    v[700:707] = np.nan
    flagged = np.zeros(1800, dtype=bool)
    flagged[1500] = True
    starts, means, flags = ten_minute_means(t, v, flagged)
    assert starts.tolist() == [start, start + 1200.0]
    assert means[0] == pytest.approx(np.sqrt(53000.0), rel=1e-12)
    assert means[1] == pytest.approx(231.0)
    assert flags.tolist() == [False, True]
