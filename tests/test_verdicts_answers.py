"""Nominal inference, inverter trips, frequency / THD / unbalance, interruption statistics and
the voltage profile, each on hand-worked invented values with boundaries on both sides.

Sources (tests/SOURCES.md): IEEE 1547-2018 default trip settings by category (pub); EN 50549-1
10-min mean above 1.10 Un (from memory); EN 50160 frequency, THD, u2 and interruption rules
(pub); NEMA max-deviation unbalance and C84.1's 3 % (from memory); IEEE 1366 indices and the
5-min threshold (pub); nominal systems IEC 60038 / ANSI C84.1 and the inference rule (cp).
"""

from __future__ import annotations

import numpy as np
import pytest

from agent.verdicts.base import Verdict
from agent.verdicts.interruptions import interruption_stats
from agent.verdicts.inverter import ieee1547_event, inverter_trips, sustained_trips
from agent.verdicts.limits import ansi_band
from agent.verdicts.nominal import Nominal, guard_inferred, infer_nominal
from agent.verdicts.profile import voltage_profile
from agent.verdicts.supply import (
    frequency_en50160,
    max_deviation_unbalance,
    ten_second_means,
    thd_en50160,
    unbalance_max_deviation,
    unbalance_u2,
)
from agent.verdicts.voltage import ansi_c84_1, en50160_weekly

MONDAY = 1_780_272_000.0  # 2026-06-01 00:00 UTC, a Monday


# --- nominal ---------------------------------------------------------------------------------

def test_126_6_v_undeclared_is_judged_on_120_v_and_fails() -> None:
    # Issue probe: 126.6 V at 60 Hz, split phase. Only 120 V is a 120/240 V service's
    # line-to-neutral nominal: inferred 120 V; 126.6 V > Range A service 126 V (pub).
    n = infer_nominal(126.6, 60.0, "120/240")
    assert n == Nominal(120.0, "inferred", (120.0,))
    # Single phase at 60 Hz: 120 V is the usual nominal and 126.6 V lies within its ±10 %,
    # so 120 V is kept over the nearer 127 V; 127 V stays a plausible candidate.
    n1 = infer_nominal(126.6, 60.0, "1ph")
    assert n1.volts == 120.0 and 127.0 in n1.candidates

    def judge(nominal: float) -> Verdict:
        return ansi_c84_1([126.6] * 6, nominal)

    got = guard_inferred(judge(n1.volts), n1, judge)
    assert got.verdict == "range_b" and got.passed is False  # a fail stays a fail
    assert any("--nominal" in note for note in got.notes)


def test_an_inferred_nominal_never_turns_a_fail_into_a_pass() -> None:
    # A home whose nominal was inferred as 127 V with 120 V also plausible (both within ±10 %
    # of its median), reading 126.9 V: inside Range A on 127 V (120.65-133.35 V), outside it
    # on 120 V (126 V, pub).
    n = Nominal(127.0, "inferred", (127.0, 120.0))

    def judge(nominal: float) -> Verdict:
        return ansi_c84_1([126.9] * 6, nominal)

    on_inferred = judge(127.0)
    assert on_inferred.verdict == "range_a"  # 126.9 V inside 120.65-133.35 V
    got = guard_inferred(on_inferred, n, judge)
    # Against 120 V it is outside Range A (126 V): the answer is undetermined, not a pass.
    assert got.verdict == "undetermined" and got.passed is None
    assert got.details["fails_against_v"] == 120.0
    # 132 V = 120 V + 10 %: on the edge, 120 V kept; 132.5 V: the nearest, 127 V.
    assert infer_nominal(132.0, 60.0, "1ph").volts == 120.0
    assert infer_nominal(132.5, 60.0, "1ph").volts == 127.0


def test_230_v_recording_is_230_v() -> None:
    # Issue probe: a 230 V recording at 50 Hz is 230 V (IEC 60038), not 240 V.
    assert infer_nominal(230.0, 50.0, "1ph").volts == 230.0
    # 240 V is within 230 V +10 % (253 V): still 230 V, with 240 V plausible.
    n = infer_nominal(240.0, 50.0, "1ph")
    assert n.volts == 230.0 and set(n.candidates) == {230.0, 220.0, 240.0}
    # Boundaries of the ±10 % plausibility: 253 V keeps 230 V, 253.5 V moves to 240 V.
    assert infer_nominal(253.0, 50.0, "1ph").volts == 230.0
    assert infer_nominal(253.5, 50.0, "1ph").volts == 240.0
    # Only the detected frequency's nominals: 230 V measured on a 60-Hz three-phase service
    # is outside 120 V ±10 % and no 60-Hz nominal is 230 V: the nearest 60-Hz one, 277 V.
    assert infer_nominal(230.0, 60.0, "3ph").volts == 277.0
    assert infer_nominal(100.0, 50.0, "1ph").volts == 100.0


def test_undetermined_en50160_on_inferred_nominal() -> None:
    t = MONDAY + 600.0 * np.arange(10)
    # Median 230 V: 230 V inferred; 220 V (4.5 %) and 240 V (4.2 %) plausible.
    values = [230.0] * 8 + [250.0] * 2
    n = infer_nominal(float(np.median(values)), 50.0, "1ph")
    assert n.volts == 230.0 and 220.0 in n.candidates

    def judge(nominal: float) -> Verdict:
        return en50160_weekly(t, values, nominal)

    got = guard_inferred(judge(n.volts), n, judge)
    # On 230 V: 250 V ≤ 253 V, all inside: passes. On 220 V: 250 V > 242 V (+10 %), also
    # above "all within +10 %": fails there -> undetermined, never a pass.
    assert judge(230.0).passed is True and judge(220.0).passed is False
    assert got.verdict == "undetermined" and got.passed is None


# --- inverter --------------------------------------------------------------------------------

@pytest.mark.parametrize(("category", "ov1_clearing", "uv1_pu", "uv1_clearing"),
                         [("I", 2.0, 0.70, 2.0), ("II", 2.0, 0.70, 10.0),
                          ("III", 13.0, 0.88, 21.0)])
def test_ieee1547_defaults_both_sides(category: str, ov1_clearing: float, uv1_pu: float,
                                      uv1_clearing: float) -> None:
    # IEEE 1547-2018 default settings (pub): OV1 1.10 pu, OV2 1.20 pu / 0.16 s.
    assert ieee1547_event("swell", 1.15, ov1_clearing, category)["result"] == "trip"
    assert ieee1547_event("swell", 1.15, ov1_clearing - 0.01, category)["result"] \
        == "ride_through"
    assert ieee1547_event("swell", 1.10, 60.0, category)["result"] == "ride_through"  # on it
    # OV2: 1.21 pu for 0.16 s is beyond 1.20 pu; the time beyond 1.20 is at most the swell's
    # duration above 1.10: may trip. 0.15 s: rides through.
    assert ieee1547_event("swell", 1.21, 0.16, category)["result"] == "may_trip"
    assert ieee1547_event("swell", 1.21, 0.15, category)["result"] == "ride_through"
    # UV1: a dip just below the setting for its clearing time may trip; on the setting not.
    assert ieee1547_event("dip", uv1_pu - 0.01, uv1_clearing, category)["result"] == "may_trip"
    assert ieee1547_event("dip", uv1_pu, uv1_clearing, category)["result"] == "ride_through"
    # An interruption is below every UV setting for its whole duration: a certain trip.
    uv2 = 0.16 if category != "III" else 2.0
    assert ieee1547_event("interruption", 0.0, uv2, category)["result"] == "trip"
    assert ieee1547_event("interruption", 0.0, uv2 - 0.01, category)["result"] == "ride_through"


def test_solar_home_at_1_12_pu_twelve_hours_a_day() -> None:
    # Issue probe: a 230 V home at 1.12 pu (257.6 V) from 06:00 to 18:00 UTC, 230 V otherwise,
    # for two days. EN 50549-1 (from memory): the 10-min moving mean exceeds 1.10 Un = 253 V
    # on both days -> trip; IEEE 1547 OV1 (1.10 pu, cat II 2 s) trips too.
    t = MONDAY + np.arange(2 * 86400.0)
    hour = (t % 86400) // 3600
    v = np.where((hour >= 6) & (hour < 18), 1.12 * 230.0, 230.0)
    got = inverter_trips([], 230.0, per_second=(t, v), en50549=True)
    assert got.verdict == "trip" and got.passed is False
    en = got.details["en50549_1"]
    # Moving means above 253 V: windows wholly inside the 12 h plus those mostly inside.
    assert en["above"] > 2 * (12 * 3600 - 600)
    assert got.details["per_day"] == {"2026-06-01": "trip", "2026-06-02": "trip"}
    assert [s["setting"] for s in got.details["sustained"]] == ["OV1", "OV1"]


def test_sustained_trip_runs_both_sides_of_the_clearing_time() -> None:
    t = MONDAY + np.arange(100.0)
    pu = np.ones(100)
    pu[10:12] = 1.105  # 2 s beyond OV1 (1.10 pu, cat II clearing 2 s): trips
    pu[50:51] = 1.105  # 1 s: rides through
    got = sustained_trips(t, pu, "II")
    assert [(s["setting"], s["duration_s"]) for s in got] == [("OV1", 2.0)]


def test_dip_duration_read_where_recorded() -> None:
    # A dip to 0.60 pu whose interruption-length record is 12 s but whose time below the dip
    # threshold (dip_duration_s, newer events) is 1.5 s: UV1 cat II (0.70 pu, 10 s) is
    # judged on 1.5 s -> rides through; without the field, on 12 s -> may trip.
    ev = {"kind": "dip", "level_pu": 0.60, "duration_s": 12.0, "start_utc": MONDAY}
    assert inverter_trips([{**ev, "dip_duration_s": 1.5}], 120.0).verdict == "ride_through"
    assert inverter_trips([ev], 120.0).verdict == "may_trip"
    assert inverter_trips([], 120.0).verdict == "no_data"


# --- frequency, THD, unbalance -----------------------------------------------------------------

def test_frequency_en50160_both_sides() -> None:
    t = MONDAY + 10.0 * np.arange(1000)
    # ±1 % of 50 Hz is 49.5-50.5 Hz; 99.5 % of 1000 = 995 values must lie within (pub).
    f = np.full(1000, 50.0)
    f[:5] = 50.6  # 5 outside ±1 % but within +4 % (52 Hz): 99.5 % inside -> pass so far
    ok = frequency_en50160(t, f, 50.0)
    assert ok.verdict == "provisional_pass" and ok.details["fraction_within_1pct"] == 0.995
    f[5] = 50.6  # 6 outside: 99.4 % -> fails so far (less than a year: provisional)
    assert frequency_en50160(t, f, 50.0).verdict == "provisional_fail"
    f[6] = 52.01  # above +4 % = 52 Hz: certain fail
    assert frequency_en50160(t, f, 50.0).verdict == "fail"
    f[6] = 47.0  # -6 % = 47 Hz: on the limit, inside "always"
    assert frequency_en50160(t, f, 50.0).details["outside_4_6pct"] == 0
    # 10-s means of per-second values: arithmetic mean of 10 seconds (cp).
    _ts, fs = ten_second_means(MONDAY + np.arange(20.0), np.r_[np.full(10, 50.0),
                                                              np.full(10, 50.2)])
    assert fs.tolist() == pytest.approx([50.0, 50.2])


def test_thd_names_its_orders_and_judges_each_week() -> None:
    t = MONDAY + 600.0 * np.arange(1008)
    thd = np.full(1008, 0.03)
    thd[:50] = 0.081  # 50 above 8 % (≤ 5 % of 1008 = 50.4): pass
    ok = thd_en50160(t, thd)
    assert ok.verdict == "pass" and ok.rule.startswith("EN 50160 THD ≤ 8 %")
    thd[50] = 0.081  # 51: fail
    assert thd_en50160(t, thd).verdict == "fail"
    thd[:] = 0.08  # on the limit: inside
    assert thd_en50160(t, thd).passed is True
    partial = thd_en50160(t, thd, max_order=25)
    assert "to order 25 (partial)" in partial.rule and partial.basis["orders"] == [2, 25]


def test_unbalance_u2_and_nema_max_deviation() -> None:
    t = MONDAY + 600.0 * np.arange(100)
    u2 = np.full(100, 0.01)
    u2[:5] = 0.021  # 5 % above 2 %: 95 % within -> pass (provisional: 100 of 1008)
    assert unbalance_u2(t, u2).verdict == "provisional_pass"
    u2[5] = 0.021
    assert unbalance_u2(t, u2).passed is False
    # NEMA: legs 123 V and 117 V, average 120 V, max deviation 3 V -> 2.5 % (hand-worked).
    assert max_deviation_unbalance([[123.0, 117.0]])[0] == pytest.approx(0.025)
    assert unbalance_max_deviation([[123.6, 116.4]]).passed is True  # 3.6/120 = 3 %: on it
    assert unbalance_max_deviation([[123.7, 116.3]]).passed is False  # 3.08 %


# --- interruptions -----------------------------------------------------------------------------

def test_interruption_statistics_hand_worked() -> None:
    # 4 homes monitored. Windows: h1 2 min (short, momentary) and 10 min (long, sustained);
    # h2 exactly 3 min (short: EN 50160 ≤ 3 min) and exactly 5 min (IEEE 1366: sustained is
    # > 5 min, so momentary) plus an overlapping report of the same 5 min (merged); h3 301 s.
    w = [{"device": "h1", "start_utc": 0.0, "end_utc": 120.0},
         {"device": "h1", "start_utc": 1000.0, "end_utc": 1600.0},
         {"device": "h2", "start_utc": 0.0, "end_utc": 180.0},
         {"device": "h2", "start_utc": 5000.0, "end_utc": 5300.0},
         {"device": "h2", "start_utc": 5100.0, "end_utc": 5200.0},
         {"device": "h3", "start_utc": 0.0, "end_utc": 301.0}]
    got = interruption_stats(w, 4)
    en, ieee = got.details["en50160"], got.details["ieee1366"]
    # EN 50160: short ≤ 180 s: 120, 180 -> 2; long: 600, 300, 301 -> 3.
    assert en == {"short": 2, "long": 3}
    # IEEE 1366 sustained > 300 s: 600 and 301 -> SAIFI 2/4 = 0.5; minutes 10 + 5.0167 ->
    # SAIDI 15.0167/4 = 3.754; CAIDI 15.0167/2 = 7.508; momentary 120, 180, 300 -> MAIFI 0.75.
    assert ieee["SAIFI"] == 0.5 and ieee["MAIFI"] == 0.75
    assert ieee["SAIDI_min"] == pytest.approx((600 + 301) / 60 / 4, abs=1e-3)
    assert ieee["CAIDI_min"] == pytest.approx((600 + 301) / 60 / 2, abs=1e-3)
    assert got.passed is None and got.basis["homes_monitored"] == 4


# --- profile -----------------------------------------------------------------------------------

def test_voltage_profile_percentiles_daily_hourly_and_periods() -> None:
    # 2 days of 10-min means: 118 V, except 07:00-08:00 UTC on day 1 at 112 V (6 means,
    # below Range A service 114 V: one out-of-range period of 3600 s).
    t = MONDAY + 600.0 * np.arange(288)
    v = np.full(288, 118.0)
    v[42:48] = 112.0
    got = voltage_profile(t, v, ansi_band(120.0, "A", "service"), nominal_v=120.0)
    pct = got.details["percentiles_v"]
    # numpy linear percentiles of 6 x 112 and 282 x 118: p1 at rank 2.87 -> 112, p5 -> 118.
    assert pct["p1"] == pytest.approx(np.percentile(v, 1)) and pct["p1"] == 112.0
    assert pct["p50"] == 118.0 and pct["p99"] == 118.0
    assert got.details["daily"]["2026-06-01"] == {"min_v": 112.0, "max_v": 118.0, "means": 144}
    # Hour 07 UTC holds 6 means of day 1 at 112 V and 6 of day 2 at 118 V: median 115 V.
    assert got.details["hourly"]["07"]["p50"] == 115.0
    assert got.details["hourly"]["08"]["p50"] == 118.0
    assert got.details["out_of_range"] == [{"start": "2026-06-01T07:00:00Z",
                                            "end": "2026-06-01T08:00:00Z",
                                            "duration_s": 3600.0, "side": "low",
                                            "extreme_v": 112.0}]


def test_overvoltage_summary_counts_and_daily_max() -> None:
    from agent.verdicts.inverter import overvoltage_summary

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
    assert [v for _, v in sorted(s["max_per_day"].items())] == [270.0, 260.0]
    # 700 contiguous seconds give 101 full 10-min moving windows (the next day's 10 s none);
    # none averages above 253 V: 10 s at 254 V cannot lift a 600-s mean of 240 V past it.
    assert s["ten_min_means"] == 101 and s["ten_min_above"] == 0
    # Stored 10-min aggregates are used as given when passed (NaN skipped).
    s2 = overvoltage_summary(t, mean, None, 230.0, ten_min_means_v=[250.0, 253.5, np.nan])
    assert s2["ten_min_means"] == 2 and s2["ten_min_above"] == 1
