"""The fleet report's verdicts over a store filled through RecorderStore.commit_batch with
known per-second and 10-min values (invented homes), the issue's probes as regressions.

Answers are worked by hand beside each check. Sources (tests/SOURCES.md): ANSI C84.1 Range A
service 114-126 V (pub), Range B service 110-127 V (from memory), averaging window (cp);
EN 50160 weekly rule (pub); EN 50549-1 10-min mean (from memory); IEEE 1547-2018 defaults
(pub); IEEE 1366 and EN 50160 interruptions (pub); IEEE 1564 SARFI-ITIC, ITIC 2000 (pub).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from _report_helpers import Home
from _store_helpers import pg_database, store_url

from agent.cli.main import main
from agent.report.fleet import fleet_report, render_text
from agent.store.recorder import RecorderStore
from agent.verdicts import INDICATIVE

MONDAY = 1_780_272_000.0  # 2026-06-01 00:00 UTC, a Monday (an invented period)
__all__ = ["pg_database", "store_url"]  # fixtures: those tests run on SQLite and PostgreSQL


def _store(tmp_path: Path, name: str = "r.db") -> RecorderStore:
    return RecorderStore(f"sqlite:///{tmp_path / name}", tmp_path / "captures")


def _dev(report: dict[str, Any], device: str) -> dict[str, Any]:
    return next(d for d in report["devices"] if d["device"] == device)


def test_solar_home_at_1_12_pu_twelve_hours_a_day(tmp_path: Path) -> None:
    # Issue probe: 230 V / 50 Hz home at 1.12 pu (257.6 V) 06:00-18:00 UTC for two days,
    # 230 V otherwise; every 10-min mean of the 12 h is flagged by the swell it holds.
    home = Home("sun", 230.0, 50.0)
    for k in range(288):
        t = MONDAY + 600.0 * k
        high = 6 <= (t % 86400) // 3600 < 18
        home.ten_min(t, (257.6 if high else 230.0,), flagged=bool(high))
    for day in range(2):
        home.event(f"sw{day}", "swell", MONDAY + day * 86400 + 6 * 3600, 12 * 3600.0, 1.12)
    with _store(tmp_path) as s:
        home.commit(s, MONDAY + 2 * 86400)
        r = fleet_report(s, now=MONDAY + 2 * 86400 + 60)
    d = _dev(r, "sun")
    ov = d["overvoltage"]
    # 144 of 288 means above 1.10 × 230 = 253 V (was 0 when flagged means were dropped).
    assert ov["ten_min_means"] == 288 and ov["ten_min_above"] == 144
    inv = d["inverter"]
    # EN 50549-1 (from memory): 10-min means above 1.10 Un on both days -> trip per day;
    # IEEE 1547-2018 OV1 (1.10 pu, cat II clearing 2 s, pub): each 12-h swell at 1.12 pu trips.
    assert inv["verdict"] == "trip" and inv["en50549_1"]["above"] == 144
    assert inv["per_day"] == {"2026-06-01": "trip", "2026-06-02": "trip"}
    assert [e["result"] for e in inv["per_event"]] == ["trip", "trip"]
    # EN 50160: 144 of 288 means above +10 % (also outside "all"): fails, certain.
    c = d["compliance"]
    assert c["verdict"] == "fail" and c["basis"]["flagged"] == 144
    assert c["basis"]["flagged_share"] == 0.5


def test_week_with_20_percent_at_0_88_pu_fails(tmp_path: Path) -> None:
    # Issue probe: a complete calendar week (1008 means), every fifth at 0.88 pu (202.4 V),
    # each flagged by its dip: 202 outside ±10 % > 50.4 (5 %): EN 50160 fails (pub).
    home = Home("low", 230.0, 50.0)
    for k in range(1008):
        home.ten_min(MONDAY + 600.0 * k, (202.4 if k % 5 == 0 else 230.0,),
                     flagged=k % 5 == 0)
    with _store(tmp_path) as s:
        home.commit(s, MONDAY + 7 * 86400)
        r = fleet_report(s, now=MONDAY + 7 * 86400)
    c = _dev(r, "low")["compliance"]
    assert c["standard"] == "EN 50160" and c["verdict"] == "fail" and c["passed"] is False
    assert c["weeks"][0]["complete"] is True and c["weeks"][0]["outside_10pct"] == 202
    assert c["basis"]["flagged"] == 202
    assert _dev(r, "low")["profile"]["percentiles_v"]["p5"] == pytest.approx(202.4)


def test_one_second_at_109_v_and_two_minutes_at_0_88_pu(tmp_path: Path) -> None:
    # Issue probes on 120 V / 60 Hz service homes, per-second values only (2 h each).
    t = MONDAY + np.arange(7200.0)
    blip = np.full(t.size, 120.0)
    blip[3000] = 109.0  # one second
    sag = np.full(t.size, 120.0)
    sag[3000:3120] = 105.6  # 0.88 pu for 120 s, flagged as a dip
    flags = np.zeros(t.size)
    flags[3000:3120] = 1
    a, b = Home("blip"), Home("sag")
    a.trend(t, blip)
    b.trend(t, sag, flags)
    with _store(tmp_path) as s:
        a.commit(s, t[-1] + 1)
        b.commit(s, t[-1] + 1)
        r = fleet_report(s, now=t[-1] + 2)
    blip_c, sag_c = _dev(r, "blip")["compliance"], _dev(r, "sag")["compliance"]
    # One second: the 10-min mean holding it is sqrt((599·120² + 109²)/600) = 119.98 V, inside
    # Range A; 12 means judged; no attention entry (it was outside_b on seconds before).
    assert blip_c["verdict"] == "range_a" and blip_c["basis"]["count"] == 12
    assert all(a["device"] != "blip" for a in r["attention"])
    # Two minutes at 105.6 V: the 10-min mean is sqrt((120·105.6² + 480·120²)/600) = 117.25 V
    # (inside Range A) and the run is listed as a sustained excursion > 1 min, outside
    # Range B; the property manager sees it in the period list.
    assert sag_c["verdict"] == "range_a" and sag_c["basis"]["flagged"] == 1
    ex = sag_c["excursions"]["longer_than_60s"]
    assert len(ex) == 1 and ex[0]["duration_s"] == 120.0 and ex[0]["outside_b"] is True
    # The summary beside the verdict says so too.
    assert "1 sustained excursion(s) > 1 min outside Range A, 1 outside Range B" \
        in sag_c["summary"]
    attention = {a["device"]: a for a in r["attention"]}
    assert "105.6 V for 120 s" in " ".join(attention["sag"]["period"])
    # The same store judged on 1-min means (configurable window, cp): outside Range B.
    with _store(tmp_path) as s:
        one = fleet_report(s, now=t[-1] + 2, averaging_window_s=60.0)
    assert _dev(one, "sag")["compliance"]["verdict"] == "outside_b"


def test_undeclared_126_6_v_is_not_inferred_as_127_v(tmp_path: Path) -> None:
    # Issue probe: no site model, no events: 126.6 V at 60 Hz for 20 min. Inferred among the
    # 60-Hz single-phase nominals: 120 V (126.6 V within its ±10 %), marked inferred;
    # 126.6 V > 126 V Range A service (pub), < 127 V Range B (from memory): range_b.
    t = MONDAY + np.arange(1200.0)
    home = Home("undeclared")
    home.trend(t, np.full(t.size, 126.6))
    with _store(tmp_path) as s:
        home.commit(s, t[-1] + 1, declare=False)
        r = fleet_report(s, now=t[-1] + 2)
    d = _dev(r, "undeclared")
    assert d["nominal_v"] == 120.0 and d["nominal_source"] == "inferred"
    assert d["compliance"]["verdict"] == "range_b" and d["compliance"]["passed"] is False
    assert any("--nominal" in n for n in d["compliance"]["notes"])


def test_since_keeps_silent_units_and_now_is_apart(store_url: str, tmp_path: Path) -> None:
    # u1 reports throughout; u2 fell silent a day before the period and never came back.
    t = MONDAY + np.arange(1200.0)
    u1, u2 = Home("u1"), Home("u2")
    u1.trend(t, np.full(t.size, 120.0))
    u2.trend(t - 86400 * 2, np.full(t.size, 120.0))
    with RecorderStore(store_url, tmp_path / "captures") as s:
        u1.commit(s, t[-1] + 1)
        u2.commit(s, t[0] - 86400 * 2 + 1200)
        r = fleet_report(s, now=t[-1] + 60, start_utc=MONDAY - 3600)
    names = [d["device"] for d in r["devices"]]
    assert names == ["u1", "u2"]  # never dropped
    assert r["homes_monitored"] == 1 and _dev(r, "u2")["monitored_in_period"] is False
    att = {a["device"]: a for a in r["attention"]}
    # Now: u2 is offline since its last message (nothing heard for > 900 s, cp).
    assert att["u2"]["now"][0]["state"] == "offline"
    assert att["u2"]["now"][0]["since"].startswith("2026-05-30")
    # The period: silent since before it.
    assert any(p.startswith("silent since 2026-05-30") for p in att["u2"]["period"])
    assert "u1" not in att
    text = render_text(r)
    assert "now:" in text and "in the period:" in text and "silent before the period" in text


def test_interruptions_sarfi_sides_and_contracts(store_url: str, tmp_path: Path, capsys:
                                                 pytest.CaptureFixture[str]) -> None:
    h1, h2 = Home("h1"), Home("h2")
    # h1: a 10-min interruption (long; IEEE 1366 sustained) and a 1.21 pu, 0.6 s swell (ITIC
    # 2000: above 110 % beyond 0.5 s -> prohibited: swell side). h2: a 0.5-pu, 0.3 s dip
    # (below ITIC 70 % for 20 ms-0.5 s: sag side) and a 2-min interruption (short).
    h1.event("i1", "interruption", MONDAY + 100, 600.0, 0.0)
    h1.event("s1", "swell", MONDAY + 1000, 0.6, 1.21)
    h2.event("d2", "dip", MONDAY + 2000, 0.3, 0.5)
    h2.event("i2", "interruption", MONDAY + 3000, 120.0, 0.0)
    with RecorderStore(store_url, tmp_path / "captures") as s:
        h1.commit(s, MONDAY + 4000)
        h2.commit(s, MONDAY + 4000)
        r = fleet_report(s, now=MONDAY + 4100)
        url = store_url
    i = r["interruptions"]
    assert i["en50160"] == {"short": 1, "long": 1}
    # IEEE 1366 over N_T = 2 homes: SAIFI 1/2, SAIDI 10 min / 2 = 5 min, CAIDI 10 min,
    # MAIFI 1/2 (the 2-min one).
    assert i["ieee1366"]["SAIFI"] == 0.5 and i["ieee1366"]["SAIDI_min"] == 5.0
    assert i["ieee1366"]["CAIDI_min"] == 10.0 and i["ieee1366"]["MAIFI"] == 0.5
    sf = r["sarfi"]
    # Sag side (IEEE 1564 SARFI-ITIC): the 0.5 pu dip and both interruptions (0 pu, below
    # 80 % beyond 0.5 s) = 3 -> 1.5; swell side apart: 1 -> 0.5.
    assert sf["itic_count"] == 3 and sf["itic_swell_count"] == 1
    assert sf["SARFI-ITIC"] == 1.5 and sf["ITIC-swell"] == 0.5
    # Contracts: compliance.{standard, verdict, passed} and overvoltage kept; every verdict
    # states its basis; the indicative line once per report, in JSON and in text.
    assert main(["report", "--store", url, "--json"]) == 0
    out = capsys.readouterr().out
    got = json.loads(out)
    assert got["indicative"] == INDICATIVE and out.count(INDICATIVE) == 1
    for dev in got["devices"]:
        assert {"standard", "verdict", "passed"} <= set(dev["compliance"])
        assert "overvoltage" in dev and "basis" in dev["compliance"]
        assert "basis" in dev["inverter"]
    assert main(["report", "--store", url, "--window", "5", "--inverter-category", "III"]) == 0
    text = capsys.readouterr().out
    assert text.count(INDICATIVE) == 1 and "category III" in text
    assert main(["report", "--store", url, "--window", "7"]) == 2
    assert "--window" in capsys.readouterr().err


def test_a_bad_week_cannot_hide_in_the_store(tmp_path: Path) -> None:
    # Four calendar weeks of 10-min aggregates at 230 V; the third holds 60 means at 200 V
    # (60/1008 = 5.95 % outside ±10 % > 5 %, EN 50160 pub). Pooled: 60/4032 = 1.5 % outside,
    # a pass; per calendar week: the third fails, and so does the period.
    home = Home("weeks", 230.0, 50.0)
    for k in range(4 * 1008):
        home.ten_min(MONDAY + 600.0 * k, (200.0 if 2016 <= k < 2076 else 230.0,))
    with _store(tmp_path) as s:
        home.commit(s, MONDAY + 28 * 86400)
        r = fleet_report(s, now=MONDAY + 28 * 86400)
    c = _dev(r, "weeks")["compliance"]
    assert c["band"]["fraction_inside"] == pytest.approx(1 - 60 / 4032, abs=1e-6)
    assert c["verdict"] == "fail"
    assert [w["passed"] for w in c["weeks"]] == [True, True, False, True]
    assert "failing weeks 2026-W25" in c["summary"]


def test_split_phase_supply_verdicts(tmp_path: Path) -> None:
    # Invented 120/240 V home, 20 min of per-second values: legs 123 V and 117 V (NEMA max
    # deviation 3/120 = 2.5 % ≤ 3 %, from memory), 60.0 Hz (within ±1 %, EN 50160 pub: the
    # share over less than a year is provisional), THD 2 % (≤ 8 %, 2 of 1008 means:
    # provisional).
    t = MONDAY + np.arange(1200.0)
    home = Home("split", channels=("L1", "L2"))
    home.trend(t, np.column_stack([np.full(t.size, 123.0), np.full(t.size, 117.0)]))
    with _store(tmp_path) as s:
        home.commit(s, t[-1] + 1)
        r = fleet_report(s, now=t[-1] + 2)
    sup = _dev(r, "split")["supply"]
    assert sup["unbalance"]["verdict"] == "pass" and sup["unbalance"]["max"] == 0.025
    assert "NEMA" in sup["unbalance"]["rule"]
    assert sup["frequency"]["verdict"] == "provisional_pass"
    assert sup["frequency"]["basis"]["count"] == 120  # 1200 s = 120 ten-second means
    assert sup["thd"]["verdict"] == "provisional_pass"
    # Both legs judged for C84.1: 117 and 123 V inside 114-126 V (pub).
    assert _dev(r, "split")["compliance"]["verdict"] == "range_a"


def test_now_out_of_range_apart_from_the_period(tmp_path: Path) -> None:
    # 120 V / 60 Hz home, six 10-min aggregates: five at 120 V, the last at 127.5 V (above
    # Range B service 127 V, mem). Now (5 min after the last ended): out of range now, by
    # the last 10-min mean (fleet now, cp); in the period: outside Range B on 10-min means.
    home = Home("hot")
    for k in range(6):
        home.ten_min(MONDAY + 600.0 * k, (127.5 if k == 5 else 120.0,))
    end = MONDAY + 3600.0
    with _store(tmp_path) as s:
        home.commit(s, end)
        r = fleet_report(s, now=end + 300.0)
        later = fleet_report(s, now=end + 86400.0)
    att = {a["device"]: a for a in r["attention"]}["hot"]
    assert [n["state"] for n in att["now"]] == ["out_of_range"]
    assert att["now"][0]["since"] == "2026-06-01T00:50:00.000Z"
    assert "outside ANSI C84.1 Range B service on 10-min means" in att["period"]
    # A day later the last mean is stale: offline now, the period's verdict unchanged.
    att = {a["device"]: a for a in later["attention"]}["hot"]
    assert [n["state"] for n in att["now"]] == ["offline"]
    assert "outside ANSI C84.1 Range B service on 10-min means" in att["period"]


def test_event_and_status_fields_read_defensively() -> None:
    from agent.report.device import EMPTY_TEN_MIN, dip_duration, supply_verdicts
    from agent.report.seconds import every_second

    # Time below the dip threshold: the event row's field, else its payload's, else none.
    assert dip_duration({"dip_duration_s": 1.5, "payload": {"dip_duration_s": 9.0}}) == 1.5
    assert dip_duration({"payload": {"dip_duration_s": 2.0}}) == 2.0
    assert dip_duration({"dip_duration_s": -1.0, "payload": {}}) is None
    assert dip_duration({"dip_duration_s": True}) is None
    # THD orders from the edge's status: a sample rate capping the order at 25 names the
    # rule a partial THD (EN 50160 counts to the 40th, pub).
    t = MONDAY + np.arange(1200.0)
    trend = {"t": t, "mean": np.full((t.size, 1), 120.0), "hz": np.full(t.size, 60.0),
             "thd": np.full((t.size, 1), 0.02), "imbalance": np.full(t.size, np.nan),
             "flagged": np.zeros(t.size, bool)}
    sup = supply_verdicts(every_second(trend), EMPTY_TEN_MIN, 60.0, "1ph", 1,
                          thd_max_order=25)
    assert "to order 25 (partial)" in sup["thd"]["rule"] and "unbalance" not in sup
