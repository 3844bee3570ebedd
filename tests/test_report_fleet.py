"""The fleet report over a store filled with real wire messages (built by agent.wire.codec,
committed with RecorderStore.commit_batch). The street is invented.

Expected values: IEEE 1564-2014 SARFI-X = Σ Nᵢ / N_T with one-minute temporal aggregation
(aggregation window from memory); ITIC curve (2000) boundaries (pub); ANSI C84.1 Range A
service 114-126 V (pub), Range B service 110-127 V (from memory); IEEE 1159 categories (pub).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
from _store_helpers import pg_database, store_url

from agent.cli.main import main
from agent.events.classify import classify_event
from agent.events.types import Event, Thresholds
from agent.report.fleet import fleet_report, render_text
from agent.store.recorder import Item, RecorderStore
from agent.wire import codec
from agent.wire.records import SummaryBatcher

SITE = "invented-lane"
T0 = 1_780_000_000.0  # an invented afternoon (whole second)
HOMES = ("h1", "h2", "h3", "h4", "h5")
__all__ = ["pg_database", "store_url"]  # fixtures: every store test runs on SQLite and PostgreSQL


class Home:
    """One invented home's message stream (contiguous seqs in one epoch)."""

    def __init__(self, device: str) -> None:
        self.identity = codec.Identity(site=SITE, device=device, epoch="e1")
        self.seq = 0
        self.messages: list[dict[str, Any]] = []

    def add(self, body: dict[str, Any]) -> None:
        self.seq += 1
        # Through the real encoder and decoder: the store sees exactly the wire form.
        self.messages.append(codec.decode(codec.encode(self.identity.stamp(body, self.seq))))

    def event(self, eid: str, kind: str, start: float, duration: float, level_pu: float,
              *, ended_by: str = "recovery", uncertainty: float | None = None) -> None:
        ev = Event(event_id=eid, kind=kind, channels=(0,), start=0.0, start_utc=start,  # type: ignore[arg-type]
                   nominal_v=120.0, thresholds=Thresholds(), level_v=level_pu * 120.0,
                   end=duration * 3840.0, end_utc=start + duration,
                   per_channel_level_v=(level_pu * 120.0,), ended_by=ended_by,  # type: ignore[arg-type]
                   end_uncertainty_s=uncertainty, time_error_s=0.001, sync_state="synced")
        classify_event(ev, 60.0)
        self.add(codec.event_body(ev, "ended", channel_names=["L1"]))

    def trend(self, values: np.ndarray, flags: np.ndarray, start: float) -> None:
        batcher = SummaryBatcher(["L1"], k=60)
        t = start + np.arange(values.size, dtype=float)
        col = values[:, None]
        bodies = batcher.add_many(t, col, col, col, np.full(values.size, 60.0),
                                  np.full((values.size, 1), 0.02), np.full(values.size, np.nan),
                                  flags)
        last = batcher.flush()
        for body in [*bodies, *([last] if last else [])]:
            self.add(body)

    def status(self, state: str, t: float, last_ran: float | None = None) -> None:
        self.add(codec.status_body(state, agent_version="0.1", uptime_s=2.0, outbox_depth=0,
                                   sync="synced", time_error_s=0.001, last_ran=last_ran, t=t))


@pytest.fixture
def store(store_url: str, tmp_path: Path) -> Any:
    s = RecorderStore(store_url, tmp_path / "captures")
    homes = {d: Home(d) for d in HOMES}
    # A feeder-wide sag to 0.60 pu for 0.2 s reaches h1-h4 within 20 ms of each other.
    for i, d in enumerate(HOMES[:4]):
        homes[d].event(f"{d}-sag", "dip", T0 + 0.005 * i, 0.2, 0.60)
    # h1: a second, shallower dip 30 s later (a recloser shot): same IEEE 1564 aggregate.
    homes["h1"].event("h1-dip2", "dip", T0 + 30.0, 0.1, 0.85)
    # h2 (invented rooftop solar): a swell to 1.15 pu for 0.4 s at +100 s.
    homes["h2"].event("h2-swell", "swell", T0 + 100.0, 0.4, 1.15)
    # h3: a 1-s interruption at 2 % residual at +200 s.
    homes["h3"].event("h3-int", "interruption", T0 + 200.0, 1.0, 0.02)
    # h4: its monitor lost power in an interruption; closed by the journal after restart.
    homes["h4"].event("h4-lost", "interruption", T0 + 300.0, 5.0, 0.0, ended_by="power_loss",
                      uncertainty=3.0)
    homes["h4"].status("online", T0 + 310.0, last_ran=T0 + 305.0)
    # Trend: h1 steady 120 V; h2 50 s at 125 V, 45 s at 126.5 V, 5 s at 133 V flagged (swell).
    homes["h1"].trend(np.full(100, 120.0), np.zeros(100), T0 - 200.0)
    h2 = np.concatenate([np.full(50, 125.0), np.full(45, 126.5), np.full(5, 133.0)])
    h2_flags = np.concatenate([np.zeros(95), np.ones(5)])
    homes["h2"].trend(h2, h2_flags, T0 - 200.0)
    for d in HOMES[:4]:
        s.update_device_model(d, SITE, {"nominal_v": 120.0, "nominal_hz": 60.0,
                                        "measurement_point": "service", "feeder": "F1"})
    homes["h5"].status("online", T0 - 500.0)
    for d, h in homes.items():
        # Received when sent: h5 was last heard long before the report, the others just now.
        at = T0 - 500.0 if d == "h5" else T0 + 350.0
        upto = s.commit_batch([Item(message=m, received_at=at) for m in h.messages])
        assert upto[(h.identity.device, "e1")] == h.seq  # all committed, nothing dead-lettered
    s.set_device_status("h5", SITE, "offline", T0 - 400.0)
    try:
        yield s
    finally:
        s.close()


def test_fleet_event_with_four_homes(store: RecorderStore) -> None:
    r = fleet_report(store, now=T0 + 400.0)
    assert r["homes_monitored"] == 5
    # Starts within 15 ms (< the 100-ms simultaneity window plus clock errors): one event.
    assert len(r["fleet_events"]) == 1
    fe = r["fleet_events"][0]
    assert fe["homes"] == 4 and fe["devices"] == ["h1", "h2", "h3", "h4"]
    assert fe["kinds"] == ["dip"] and fe["worst_level_pu"] == pytest.approx(0.60)
    assert fe["spread_s"] == pytest.approx(0.015)
    assert fe["share"] == pytest.approx(0.8)
    # h1-h4 are provisioned on feeder F1 (h5 has no site model): all of F1's homes were hit.
    assert fe["feeder"] == "F1" and fe["homes_on_feeder"] == 4


def test_sarfi_worked_example(store: RecorderStore) -> None:
    r = fleet_report(store, now=T0 + 400.0)
    s = r["sarfi"]
    # Worked by hand, N_T = 5 homes. IEEE 1564 one-minute aggregation per home (from memory):
    #   h1 {0.60 dip, 0.85 dip 30 s later} -> one aggregate, representative 0.60;
    #   h2 {0.60 dip}, {1.15 swell}; h3 {0.60 dip}, {0.02 interruption};
    #   h4 {0.60 dip}, {0.00 interruption}; h5 nothing.  -> 7 representatives.
    # SARFI-90: residual < 0.90: four 0.60 + 0.02 + 0.00 = 6 -> 6/5 = 1.2
    # SARFI-70: the same 6 -> 1.2;  SARFI-50 and SARFI-10: 0.02 and 0.00 -> 2/5 = 0.4
    # SARFI-110: the 1.15 swell -> 1/5 = 0.2;  SARFI-120 and SARFI-140: 0.
    assert s["counts"] == {"SARFI-90": 6, "SARFI-70": 6, "SARFI-50": 2, "SARFI-10": 2,
                           "SARFI-110": 1, "SARFI-120": 0, "SARFI-140": 0}
    assert s["index"]["SARFI-90"] == pytest.approx(1.2)
    assert s["index"]["SARFI-50"] == pytest.approx(0.4)
    assert s["index"]["SARFI-110"] == pytest.approx(0.2)
    # ITIC (2000, pub): 0.60 pu for 0.2 s is below the 70 % line (20 ms-0.5 s): outside (x4);
    # 0.02 pu for 1 s and 0.00 pu for 5 s are below the 80 % line (0.5-10 s): outside (x2);
    # 1.15 pu for 0.4 s is under the 120 % line (3 ms-0.5 s): inside. 6/5 = 1.2.
    assert s["itic_count"] == 6 and s["SARFI-ITIC"] == pytest.approx(1.2)
    assert s["events_stored"] == 8 and s["events_counted"] == 7
    assert r["temporal_aggregates"]["per_home_aggregates"] == 7


def test_units_lost_power_offline_out_of_range(store: RecorderStore) -> None:
    r = fleet_report(store, now=T0 + 400.0)
    dev = {d["device"]: d for d in r["devices"]}
    assert [d for d in HOMES if dev[d]["lost_power"]] == ["h3", "h4"]
    assert dev["h4"]["power_loss_events"] == 1
    # The power-loss event and the restart report give one outage window for h4.
    windows = [w for w in r["outage_windows"] if w["device"] == "h4"]
    assert len(windows) == 1 and set(windows[0]["sources"]) == {"last_gasp", "restart_report"}
    # One home of five out is not a site outage (needs more than half of the site's homes:
    # common practice for "most devices of a site").
    assert r["site_outages"] == []
    assert dev["h5"]["state"] == "offline"
    assert dev["h5"]["silent_s"] == pytest.approx(900.0)
    reasons = {a["device"]: " ".join(a["reasons"]) for a in r["attention"]}
    assert "offline" in reasons["h5"] and "power" in reasons["h4"]
    assert "interrupted" in reasons["h3"]
    # h2: 5 s at 133 V = 1.108 pu is beyond IEEE 1547-2018 OV1 (1.10 pu, 2 s clearing, cat II,
    # pub) for longer than its clearing time: the inverter would have tripped. Its 45 s at
    # 126.5 V are no sustained voltage (no 10-min mean, shorter than 1 min): no C84.1 entry.
    assert "overvoltage would trip an inverter" in reasons["h2"]
    assert "C84.1" not in reasons["h2"]
    # h3's interruption (0.02 pu, 1 s) lies below UV2 (0.45 pu, 0.16 s) all along: a trip,
    # in the inverter verdict; the attention list names the interruption, not the trip.
    assert dev["h3"]["inverter"]["verdict"] == "trip"
    assert "inverter" not in reasons["h3"]
    assert "h1" not in reasons
    # IEEE 1159: 0.60 pu for 0.2 s (12 cycles at 60 Hz) and 0.85 pu for 0.1 s (6 cycles) are
    # instantaneous sags (0.5-30 cycles, 0.1-0.9 pu); 0.02 pu for 1 s a momentary interruption.
    assert dev["h1"]["events_by_category"] == {"instantaneous sag": 2}
    assert dev["h3"]["events_by_category"]["momentary interruption"] == 1
    assert dev["h1"]["worst_dip"]["level_pu"] == pytest.approx(0.60)
    assert dev["h2"]["max_swell"]["level_pu"] == pytest.approx(1.15)


def test_compliance_and_overvoltage_from_trend(store: RecorderStore) -> None:
    r = fleet_report(store, now=T0 + 400.0)
    dev = {d["device"]: d for d in r["devices"]}
    h1, h2 = dev["h1"]["compliance"], dev["h2"]["compliance"]
    # ANSI C84.1 concerns sustained voltages, judged on 10-min means (window: common
    # practice): 100 s of per-second values hold no complete 10-min mean, so there is no
    # verdict (passed null), whatever the seconds say; no run outside Range A lasts > 1 min.
    assert h1["verdict"] == "no_data" and h1["passed"] is None
    assert h2["verdict"] == "no_data" and h2["passed"] is None
    assert h2["basis"]["count"] == 0 and h2["basis"]["values"] == "10-min means"
    assert h2["excursions"] == {"longer_than_60s": [], "longer_than_600s": []}
    assert dev["h2"]["out_of_range"] is False
    # Overvoltage: 133 V > 1.10 × 120 V = 132 V for 5 s (EN 50549-1 level, from memory).
    ov = dev["h2"]["overvoltage"]
    assert ov["seconds_above"] == 5 and ov["ten_min_means"] == 0
    # Highest per day: the swell's own maximum, 1.15 × 120 V = 138 V.
    assert max(ov["max_per_day"].values()) == pytest.approx(138.0)
    # Nominal known from the site model; h5 has no model and no events or trend.
    assert dev["h1"]["nominal_source"] == "declared" and dev["h5"]["nominal_v"] is None


def test_text_sections_and_cli(store: RecorderStore, store_url: str,
                               capsys: pytest.CaptureFixture[str]) -> None:
    text = render_text(fleet_report(store, now=T0 + 400.0))
    for title in ("Events seen by many homes at once", "Overvoltage and swells",
                  "Units out of range, offline or without power", "SARFI"):
        assert title in text
    assert "4/5" in text and "h1, h2, h3, h4" in text
    url = store_url
    assert main(["report", "--store", url, "--json"]) == 0
    got = json.loads(capsys.readouterr().out)
    assert got["fleet_events"][0]["homes"] == 4 and got["homes_monitored"] == 5
    assert main(["report", "--store", url]) == 0
    assert "Events seen by many homes at once" in capsys.readouterr().out


def test_cli_refuses_missing_or_foreign_store(tmp_path: Path,
                                              capsys: pytest.CaptureFixture[str]) -> None:
    assert main(["report", "--store", f"sqlite:///{tmp_path / 'nope.db'}"]) == 2
    assert "no SQLite file" in capsys.readouterr().err
    assert not (tmp_path / "nope.db").exists()  # nothing created
    foreign = tmp_path / "other.db"
    import sqlite3

    sqlite3.connect(foreign).execute("CREATE TABLE x (a)").connection.commit()
    assert main(["report", "--store", f"sqlite:///{foreign}"]) == 2
    assert "not a halfcycle recorder store" in capsys.readouterr().err
    assert main(["report", "--store", "mysql://x"]) == 2


def test_period_filter(store: RecorderStore) -> None:
    # Only the window around the h2 swell (+90 s .. +150 s): one home event, no fleet event.
    r = fleet_report(store, now=T0 + 400.0, start_utc=T0 + 90.0, end_utc=T0 + 150.0)
    assert r["fleet_events"] == []
    assert r["store"]["events"] == 1 and r["sarfi"]["counts"]["SARFI-110"] == 1
    # h5 was last heard at T0-500 s: not monitored during this period, so N_T = 4.
    assert r["homes_monitored"] == 4 and r["sarfi"]["index"]["SARFI-110"] == pytest.approx(0.25)
    with pytest.raises(ValueError, match="not before"):
        fleet_report(store, start_utc=T0, end_utc=T0)


def test_empty_store_and_unreadable_rows(tmp_path: Path) -> None:
    with RecorderStore(f"sqlite:///{tmp_path / 'empty.db'}", tmp_path / "c") as empty:
        r = fleet_report(empty)
        assert r["homes_monitored"] == 0 and r["fleet_events"] == []
        assert "none: no event started" in render_text(r)
        # A trend row the report cannot decode is counted and named, not silently dropped.
        home = Home("h9")
        home.trend(np.full(5, 120.0), np.zeros(5), T0)
        empty.commit_batch(home.messages)
        empty.db.run_in_transaction(lambda db: db.execute(
            "UPDATE trend SET data = ? WHERE device = 'h9'", (msgpack.packb({"n": "bad"}),)))
        r = fleet_report(empty, default_nominal_v=120.0)
        assert r["devices"][0]["trend_rows_unreadable"] == 1
        assert "NOT USED: unreadable per-second rows {'h9': 1}" in render_text(r)


def test_cli_period_options(store: RecorderStore, store_url: str,
                            capsys: pytest.CaptureFixture[str]) -> None:
    from agent.cli.report import parse_when

    assert parse_when("2h", "--since", 10_000.0) == 10_000.0 - 7200.0
    assert parse_when("2026-06-01T00:00Z", "--since", 0.0) == 1_780_272_000.0
    url = store_url
    assert main(["report", "--store", url, "--since", "yesterday"]) == 2
    assert "ISO 8601" in capsys.readouterr().err
    assert main(["report", "--store", url, "--since", "1d", "--until", "2d"]) == 2
    # T0 is in May 2026: a report of June 2026 has no events.
    assert main(["report", "--store", url, "--json", "--since", "2026-06-01T00:00Z",
                 "--until", "2026-07-01T00:00Z"]) == 0
    assert json.loads(capsys.readouterr().out)["store"]["events"] == 0


def _eu_home(s: RecorderStore, device: str, means: list[tuple[float, int, bool]],
             nominal: tuple[float, float] = (230.0, 50.0)) -> None:
    """A home (230 V / 50 Hz unless told) with stored 10-min aggregates only
    (rms, count, flagged)."""
    from agent.measurement.types import Aggregate

    home = Home(device)
    for i, (rms, count, flagged) in enumerate(means):
        home.add(codec.aggregate_body(Aggregate(kind="10min", t_utc=T0 + 600.0 * i,
                                                duration_s=600.0, rms=(rms,), thd=(0.01,),
                                                flagged=flagged, count=count), ["L1"]))
    s.update_device_model(device, SITE, {"nominal_v": nominal[0], "nominal_hz": nominal[1]})
    s.commit_batch(home.messages)


def test_en50160_from_stored_ten_minute_aggregates(tmp_path: Path) -> None:
    with RecorderStore(f"sqlite:///{tmp_path / 'eu.db'}", tmp_path / "c") as s:
        # 9 means at 230 V and one at 250 V: all within +10 % (253 V) and 100 % within ±10 %
        # (EN 50160, pub). A flagged mean at 180 V is judged too (flagging serves event
        # statistics, IEC 61000-4-30, from memory; EN 50160 judges every 10-min value) and is
        # below Un -15 % = 195.5 V: the week fails. A partial one (100 of 3000 intervals) at
        # 260 V is no 10-min mean and is not judged.
        _eu_home(s, "eu1", [(230.0, 3000, False)] * 9 + [(250.0, 3000, False),
                                                         (180.0, 3000, True), (260.0, 100, False)])
        # eu0: the same without the flagged mean: passes, provisional (10 of 1008 means).
        _eu_home(s, "eu0", [(230.0, 3000, False)] * 9 + [(250.0, 3000, False)])
        # 8 of 10 within ±10 % is below the 95 % share (EN 50160, pub): fails.
        _eu_home(s, "eu2", [(230.0, 3000, False)] * 8 + [(205.0, 3000, False)] * 2)
        # A 120 V / 60 Hz home without per-second data: ANSI C84.1 on its 10-min means;
        # 127 V is above Range A service 126 V (pub), on the Range B limit 127 V (from memory).
        _eu_home(s, "us1", [(120.0, 3000, False), (127.0, 3000, False)], (120.0, 60.0))
        r = fleet_report(s, now=T0 + 9000.0)
    dev = {d["device"]: d for d in r["devices"]}
    flagged, ok, bad = (dev[d]["compliance"] for d in ("eu1", "eu0", "eu2"))
    assert flagged["standard"] == "EN 50160" and flagged["passed"] is False
    assert flagged["count"] == 11 and flagged["basis"]["flagged"] == 1
    # Failing on a mean outside +10/-15 % is certain however the week continues.
    assert flagged["verdict"] == "fail" and "+10 %/-15 %" in flagged["rule"]
    assert ok["passed"] is True and ok["verdict"] == "provisional_pass"
    assert ok["complete_week"] is False and "provisional: 10 of 1008" in ok["summary"]
    assert dev["eu0"]["ten_min_aggregates"] == 10
    # 2 of 10 outside ±10 %: fails the share; 2 ≤ 50 outside, so the week could still pass
    # with 998 more means: provisional fail.
    assert bad["passed"] is False and "95 %" in bad["rule"]
    assert bad["verdict"] == "provisional_fail"
    assert bad["band"]["fraction_inside"] == pytest.approx(0.8)
    assert dev["eu2"]["out_of_range"] is True
    us = dev["us1"]["compliance"]
    assert us["standard"] == "ANSI C84.1" and us["verdict"] == "range_b"
    assert us["range_a"]["time_above_s"] == 600.0
    assert us["basis"]["source"] == "stored 10-min aggregates"


def test_swell_in_the_same_minute_as_a_sag_still_counts(tmp_path: Path) -> None:
    with RecorderStore(f"sqlite:///{tmp_path / 's.db'}", tmp_path / "c") as s:
        home = Home("h1")
        home.event("sag", "dip", T0, 0.2, 0.60)
        home.event("swell", "swell", T0 + 20.0, 0.4, 1.15)  # 20 s later: same minute
        home.event("sag2", "dip", T0 + 40.0, 0.1, 0.80)  # same minute as the first sag
        s.commit_batch(home.messages)
        r = fleet_report(s)
    # IEEE 1564 one-minute aggregation (from memory): the two sags are one aggregate
    # (representative 0.60); the swell is aggregated apart from the sags (common practice),
    # so N_T = 1: SARFI-90 = 1, SARFI-110 = 1.
    assert r["sarfi"]["counts"]["SARFI-90"] == 1 and r["sarfi"]["counts"]["SARFI-110"] == 1
    assert r["sarfi"]["events_counted"] == 2
