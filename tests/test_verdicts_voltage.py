"""Service-voltage verdicts against the published (or remembered) limits, boundary by boundary.

Limits (tests/SOURCES.md, "Service-voltage ranges" and "EN 50160"): ANSI C84.1 Range A
service 114-126 V on 120 V (pub); Range A utilization 108-125 V, Range B service 110-127 V,
utilization 104-127 V (from memory); EN 50160 10-min means within Un ±10 % for 95 % of each
week, all within +10 %/-15 % (pub). C84.1 averaging window: 10-min means are common practice
(cp). Expected values are worked by hand in the comments.
"""

from __future__ import annotations

import numpy as np
import pytest

from agent.verdicts.limits import ansi_band, standard_for
from agent.verdicts.series import moving_rms_mean, week_start, window_means
from agent.verdicts.voltage import ansi_c84_1, en50160_weekly, sustained_excursions

EPS = 0.01  # [V] a step well above float noise, well below any limit's meaning
#: Monday 2026-06-01 00:00 UTC (an invented period starts here).
MONDAY = 1_780_272_000.0


@pytest.mark.parametrize(
    ("range_name", "point", "low", "high"),
    [("A", "service", 114.0, 126.0),  # ANSI C84.1 Range A service (pub)
     ("A", "outlet", 108.0, 125.0),  # Range A utilization (from memory)
     ("B", "service", 110.0, 127.0),  # Range B service (from memory)
     ("B", "outlet", 104.0, 127.0)],  # Range B utilization (from memory)
)
def test_ansi_bands_on_120_and_240_v(range_name: str, point: str, low: float,
                                     high: float) -> None:
    band = ansi_band(120.0, range_name, point)
    assert (band.low_v, band.high_v) == pytest.approx((low, high))
    # Scaled to the declared nominal: 240 V doubles every limit.
    band = ansi_band(240.0, range_name, point)
    assert (band.low_v, band.high_v) == pytest.approx((2 * low, 2 * high))


@pytest.mark.parametrize(("point", "low", "high"),
                         [("service", 114.0, 126.0), ("outlet", 108.0, 125.0)])
def test_range_a_boundaries_both_sides(point: str, low: float, high: float) -> None:
    # Exactly on a limit is inside; a hair beyond is outside (limits inclusive).
    on = ansi_c84_1([low, high], 120.0, point)
    assert on.verdict == "range_a" and on.passed is True
    below = ansi_c84_1([low - EPS], 120.0, point)
    assert below.details["range_a"]["passed"] is False and below.verdict == "range_b"
    assert below.details["range_a"]["time_below_s"] == 600.0  # one 10-min mean
    above = ansi_c84_1([high + EPS], 120.0, point)
    assert above.details["range_a"]["time_above_s"] == 600.0 and above.passed is False


@pytest.mark.parametrize(("point", "low", "high"),
                         [("service", 110.0, 127.0), ("outlet", 104.0, 127.0)])
def test_range_b_boundaries_both_sides(point: str, low: float, high: float) -> None:
    inside_b = ansi_c84_1([low, high], 120.0, point)
    assert inside_b.verdict == "range_b" and inside_b.passed is False
    assert "Range B" in inside_b.rule
    assert ansi_c84_1([low - EPS], 120.0, point).verdict == "outside_b"
    assert ansi_c84_1([high + EPS], 120.0, point).verdict == "outside_b"


def test_every_value_judged_flagged_share_stated() -> None:
    # Issue probe: 0.88 pu = 105.6 V as a 10-min mean, flagged by the dip it holds (0.88 <
    # the 0.90 dip threshold). It is judged: below Range B service 110 V (from memory): outside_b.
    v = ansi_c84_1([120.0, 105.6, 120.0], 120.0, flagged=[False, True, False])
    assert v.verdict == "outside_b" and v.passed is False
    assert v.basis["flagged"] == 1 and v.basis["flagged_share"] == pytest.approx(1 / 3, 1e-3)
    assert v.basis["flagged_judged"] is True and v.basis["values"] == "10-min means"
    assert ansi_c84_1([np.nan], 120.0).verdict == "no_data"
    assert ansi_c84_1([np.nan], 120.0).passed is None
    with pytest.raises(ValueError, match="measurement_point"):
        ansi_c84_1([120.0], 120.0, "meter")
    with pytest.raises(ValueError, match="averaging window"):
        ansi_c84_1([120.0], 120.0, window_s=120.0)


def test_one_second_at_109_v_is_no_c84_1_failure() -> None:
    # Issue probe: a day of 120 V with one second at 109 V. Ten-min means (common practice):
    # that interval's mean is sqrt((599·120² + 109²)/600) = 119.98 V, inside Range A; no run
    # outside Range A lasts > 1 min. Verdict range_a, no excursion listed.
    t = MONDAY + np.arange(86400.0)
    v = np.full(t.size, 120.0)
    v[5000] = 109.0
    tw, mw, _fw = window_means(t, v, 600.0)
    assert tw.size == 144
    assert mw[8] == pytest.approx(np.sqrt((599 * 120.0**2 + 109.0**2) / 600), rel=1e-12)
    got = ansi_c84_1(mw, 120.0, per_second=(t, v))
    assert got.verdict == "range_a" and got.details["excursions"]["longer_than_60s"] == []


def test_two_minutes_at_0_88_pu() -> None:
    # Issue probe: 0.88 pu (105.6 V) for 2 min inside one 10-min interval of 120 V.
    # 10-min mean = sqrt((120·105.6² + 480·120²)/600) = 117.25 V: inside Range A; the run of
    # 120 s is longer than 1 min (listed, outside Range B 110 V, mem) but shorter than the
    # window: the 10-min verdict stays range_a with the excursion listed beside it.
    t = MONDAY + np.arange(1200.0)
    v = np.full(t.size, 120.0)
    v[60:180] = 105.6
    _tw, mw, _ = window_means(t, v, 600.0)
    assert mw[0] == pytest.approx(np.sqrt((120 * 105.6**2 + 480 * 120.0**2) / 600))
    ten = ansi_c84_1(mw, 120.0, per_second=(t, v))
    ex = ten.details["excursions"]
    assert ten.verdict == "range_a" and len(ex["longer_than_60s"]) == 1
    assert ex["longer_than_60s"][0]["duration_s"] == 120.0
    assert ex["longer_than_60s"][0]["outside_b"] is True and ex["longer_than_600s"] == []
    assert any("longer than 1 min" in n for n in ten.notes)
    # With a 1-min averaging window (configurable, cp) the two minutes are outside Range B.
    _t1, m1, _ = window_means(t, v, 60.0)
    one = ansi_c84_1(m1, 120.0, window_s=60.0, per_second=(t, v))
    assert one.verdict == "outside_b" and one.details["range_b"]["time_below_s"] == 120.0


def test_excursion_lengths_on_both_sides_of_1_and_10_min() -> None:
    t = MONDAY + np.arange(3000.0)
    v = np.full(t.size, 120.0)
    v[100:160] = 113.0  # exactly 60 s below 114 V: not longer than 1 min
    v[300:361] = 113.0  # 61 s: listed
    v[1000:1600] = 127.5  # exactly 600 s above 126 V: > 1 min, not > 10 min
    v[2000:2601] = 127.5  # 601 s: > 10 min
    lists = {lim: sustained_excursions(t, v, 114.0, 126.0, longer_than_s=lim)
             for lim in (60.0, 600.0)}
    assert [e["duration_s"] for e in lists[60.0]] == [61.0, 600.0, 601.0]
    assert [e["duration_s"] for e in lists[600.0]] == [601.0]
    assert [e["side"] for e in lists[60.0]] == ["low", "high", "high"]
    # A 601-s excursion outside Range A straddling two aligned windows decides the verdict
    # even where neither 10-min mean is outside (means of 10-min windows: cp).
    t2 = MONDAY + np.arange(1800.0)
    v2 = np.full(t2.size, 120.0)
    v2[300:901] = 126.5  # straddles the 600-s tick: each window holds ~300 s of it
    _, m2, _ = window_means(t2, v2, 600.0)
    assert np.all(m2 <= 126.0)
    got = ansi_c84_1(m2, 120.0, per_second=(t2, v2))
    assert got.verdict == "range_b" and got.passed is False


def test_en50160_band_boundaries() -> None:
    t = MONDAY + 600.0 * np.arange(100)
    # EN 50160: Un ±10 % is 207-253 V (pub); exactly on the limits is inside.
    on = en50160_weekly(t[:2], [207.0, 253.0], 230.0)
    assert on.passed is True and on.verdict == "provisional_pass"
    assert on.details["band"]["low_v"] == pytest.approx(207.0)
    # Above +10 % fails "all within +10 %" whatever the share (certain: not provisional).
    over = en50160_weekly(t, [230.0] * 99 + [253.0 + EPS], 230.0)
    assert over.verdict == "fail" and "+10 %/-15 %" in over.rule
    # -15 % (195.5 V) is the lower edge of "all": on it inside, below it fails.
    assert en50160_weekly(t, [195.5] + [230.0] * 99, 230.0).details["all"]["passed"] is True
    assert en50160_weekly(t, [195.5 - EPS] + [230.0] * 99, 230.0).passed is False


def test_en50160_95_percent_share_on_a_whole_week() -> None:
    # 1008 means in a week (7 × 24 × 6). At least 95 % within ±10 % (pub): 5 % of 1008 =
    # 50.4, so 50 means at 200 V (below -10 %, above -15 %) pass, 51 fail.
    t = MONDAY + 600.0 * np.arange(1008)
    ok = en50160_weekly(t, [230.0] * 958 + [200.0] * 50, 230.0)
    bad = en50160_weekly(t, [230.0] * 957 + [200.0] * 51, 230.0)
    assert ok.verdict == "pass" and ok.details["weeks"][0]["complete"] is True
    assert bad.verdict == "fail" and "95 %" in bad.rule
    assert bad.details["band"]["time_below_s"] == 51 * 600.0


def test_twenty_percent_of_a_week_at_0_88_pu_fails() -> None:
    # Issue probe: a week with 20 % of its 10-min means at 0.88 pu (202.4 V on 230 V), every
    # one of them flagged by its dip. 202 of 1008 outside ±10 % (> 50.4): fails, certain.
    t = MONDAY + 600.0 * np.arange(1008)
    v = np.full(1008, 230.0)
    low = np.arange(1008) % 5 == 0  # 202 means
    v[low] = 0.88 * 230.0
    got = en50160_weekly(t, v, 230.0, flagged=low)
    assert got.verdict == "fail" and got.passed is False
    assert got.basis["flagged"] == 202
    assert got.details["weeks"][0]["fraction_within_10pct"] == pytest.approx(806 / 1008)


def test_a_bad_week_cannot_hide_among_good_ones() -> None:
    # Four calendar weeks: three of 1008 means at 230 V, one with 60 means at 200 V (60/1008
    # = 5.95 % outside > 5 %). Pooled, 60/4032 = 1.5 % outside would pass; per week it fails.
    t = MONDAY + 600.0 * np.arange(4 * 1008)
    v = np.full(t.size, 230.0)
    v[2 * 1008: 2 * 1008 + 60] = 200.0
    got = en50160_weekly(t, v, 230.0)
    assert got.verdict == "fail" and got.details["band"]["fraction_inside"] > 0.95
    weeks = got.details["weeks"]
    assert len(weeks) == 4 and [w["passed"] for w in weeks] == [True, True, False, True]
    assert weeks[2]["week"] == "2026-W25" and weeks[0]["start"] == "2026-06-01T00:00:00Z"
    assert week_start(MONDAY + 3 * 86400.0) == MONDAY  # Thursday -> its Monday (ISO 8601)


def test_provisional_week_and_certain_fail_under_1008() -> None:
    t = MONDAY + 600.0 * np.arange(200)
    # 50 outside of 200: the share fails so far but 50 ≤ 50.4 could still pass: provisional.
    maybe = en50160_weekly(t, [230.0] * 150 + [200.0] * 50, 230.0)
    assert maybe.verdict == "provisional_fail" and maybe.passed is False
    # 51 outside: no rest of the week can bring it to 95 %: certain fail.
    sure = en50160_weekly(t, [230.0] * 149 + [200.0] * 51, 230.0)
    assert sure.verdict == "fail"


def test_window_and_moving_means_against_numpy() -> None:
    rng = np.random.default_rng(7)
    t = np.arange(1000.0) + 1.7e9
    v = 230.0 + rng.normal(0, 5, t.size)
    t_end, mean = moving_rms_mean(t, v)
    expected = np.sqrt(np.convolve(v * v, np.ones(600), "valid") / 600)
    assert t_end[0] == t[599] and t_end.size == 401
    np.testing.assert_allclose(mean, expected, rtol=1e-12)
    # Clock-aligned window means: 1.7e9 = 2833333·600 + 200, so the first window holds
    # 400 values (< 99 % of 600, common practice: dropped) and the second 600 values.
    starts, means, _ = window_means(t, v, 600.0)
    assert starts.tolist() == [1.7e9 + 400.0]
    assert means[0] == pytest.approx(np.sqrt(np.mean(v[400:1000] ** 2)), rel=1e-12)


def test_standard_choice() -> None:
    # Common practice: 60 Hz supplies are judged by ANSI C84.1, 50 Hz ones by EN 50160.
    assert standard_for(120.0, 60.0) == "ansi" and standard_for(230.0, 50.0) == "en50160"


def test_runs_split_on_gaps_and_falses() -> None:
    from agent.verdicts.series import runs

    t = np.array([0.0, 1, 2, 3, 10, 11, 12, 13])
    m = np.array([True, True, False, True, True, True, False, True])
    # [0,2) run; index 3 alone (t=3, next t=10 is a gap); [4,6); [7,8).
    assert runs(t, m, 1.0) == [(0, 2), (3, 4), (4, 6), (7, 8)]
    assert runs(t, np.zeros(8, bool), 1.0) == []
    assert runs(t[:1], [True], 1.0) == [(0, 1)]


def test_no_window_mean_is_no_data_unless_an_excursion_outlasts_the_window() -> None:
    # 9 min of per-second values (no complete 10-min mean). A 90-s run at 127.5 V (above
    # Range B 127 V, mem) is listed but decides nothing: no_data, passed null.
    t = MONDAY + np.arange(540.0)
    v = np.full(t.size, 120.0)
    v[100:190] = 127.5
    _, m, _ = window_means(t, v, 600.0)
    got = ansi_c84_1(m, 120.0, per_second=(t, v))
    assert m.size == 0 and got.verdict == "no_data" and got.passed is None
    assert len(got.details["excursions"]["longer_than_60s"]) == 1
    # On 1-min means the same run is sustained over whole windows: outside Range B.
    _, m1, _ = window_means(t, v, 60.0)
    assert ansi_c84_1(m1, 120.0, window_s=60.0, per_second=(t, v)).verdict == "outside_b"
