# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""Outage windows kept by the recorder store (restart reports, last-gasp events) and the
site-level outages computed from them, on SQLite and PostgreSQL."""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from _store_helpers import (  # noqa: F401  (pytest fixtures are used by name)
    aggregate,
    event,
    msg,
    pg_database,
    store,
    store_url,
)

from agent.store.db import Database
from agent.store.recorder import _MIGRATIONS, RecorderStore

T0 = 1_700_000_000.0  # invented scenario time [s UTC]


def restart_report(seq: int, *, last_ran: float, t: float, uptime_s: float,
                   **kw: Any) -> dict[str, Any]:
    """The agent's first status after a start (agent.publish.edge.EdgePublisher.startup)."""
    return msg("status", seq, state="online", t=t, uptime_s=uptime_s, last_ran=last_ran,
               reason="restart", agent_version="0.1", outbox_depth=0, **kw)


def power_loss_event(seq: int, event_id: str, end: float, **kw: Any) -> dict[str, Any]:
    """An event the open-event journal closed after a restart (agent.events.persist)."""
    return event(seq, event_id, "closed", end_utc=end, ended_by="power_loss", **kw)


def test_restart_report_gives_a_window_that_outlives_the_status(store: RecorderStore) -> None:
    store.commit_batch([restart_report(1, last_ran=T0, t=T0 + 130.0, uptime_s=10.0)])
    # A later heartbeat replaces the device's latest status; the window stays.
    store.commit_batch([msg("status", 2, state="heartbeat", t=T0 + 200.0, uptime_s=80.0)])
    assert store.devices()[0]["status"]["state"] == "heartbeat"
    (w,) = store.outage_windows()
    # Window from when the agent last ran to its own start, t - uptime_s (restart rule in
    # agent.store.outages, module docstring rule 2): T0 .. T0 + 120 s.
    assert (w.device, w.site, w.start_utc, w.end_utc) == ("dev-1", "site-1", T0, T0 + 120.0)
    assert w.sources == ("restart_report",) and w.duration_s == pytest.approx(120.0)
    # A redelivered report changes nothing (idempotent on device, epoch, seq).
    store.commit_batch([restart_report(1, last_ran=T0, t=T0 + 130.0, uptime_s=10.0)])
    assert store.count("outage_windows") == 1


def test_power_loss_event_gives_a_window(store: RecorderStore) -> None:
    start = 1_700_000_100.0  # event() starts every event here
    store.commit_batch([
        event(1, "ev-open", "open"),  # still open: no window yet
        power_loss_event(2, "ev-lost", start + 7.5, end_uncertainty_s=2.0),
        event(3, "ev-ok", "closed", end_utc=start + 1.0, ended_by="recovery"),
    ])
    (w,) = store.outage_windows()
    # Last-gasp rule: event start to its inferred end (agent.store.outages rule 2).
    assert (w.device, w.start_utc, w.end_utc, w.sources) == (
        "dev-1", start, start + 7.5, ("last_gasp",))
    # A newer version of the same event no longer ended by power loss: its window goes.
    store.commit_batch([event(4, "ev-lost", "closed", end_utc=start + 7.5,
                              ended_by="end_of_data")])
    assert store.outage_windows() == []


def test_restart_and_last_gasp_of_one_device_merge(store: RecorderStore) -> None:
    start = 1_700_000_100.0
    store.commit_batch([
        power_loss_event(1, "ev-lost", start + 5.0, end_uncertainty_s=3.0),
        restart_report(2, last_ran=start + 5.0, t=start + 12.0, uptime_s=2.0),
    ])
    raw = store.outage_windows(merged=False)
    assert sorted(w.sources[0] for w in raw) == ["last_gasp", "restart_report"]
    (w,) = store.outage_windows()
    # Overlapping/touching windows of one device are one window (common practice).
    assert (w.start_utc, w.end_utc) == (start, start + 10.0)
    assert w.sources == ("last_gasp", "restart_report")


def test_most_of_a_site_out_together_is_one_site_outage(store: RecorderStore) -> None:
    # Site A: 4 devices, 3 with overlapping restart windows; the 4th reports only data.
    batch: list[dict[str, Any]] = []
    for i, (off, back) in enumerate([(0.0, 60.0), (2.0, 61.0), (1.0, 65.0)]):
        batch.append(restart_report(1, device=f"a{i}", site="site-a", last_ran=T0 + off,
                                    t=T0 + back + 5.0, uptime_s=5.0))
    batch.append(aggregate(1, device="a3", site="site-a"))
    # Site B: 2 of 4 out is not more than half: no site outage there.
    for i in range(4):
        batch.append(aggregate(1, device=f"b{i}", site="site-b"))
    for i in range(2):
        batch.append(restart_report(2, device=f"b{i}", site="site-b", last_ran=T0,
                                    t=T0 + 65.0, uptime_s=5.0))
    store.commit_batch(batch)
    assert len(store.outage_windows()) == 5
    assert len(store.outage_windows("site-a")) == 3
    (so,) = store.site_outages(fraction=0.5)
    assert so.site == "site-a" and so.devices == ("a0", "a1", "a2")
    assert so.devices_monitored == 4 and so.peak_out == 3
    assert so.fraction_affected == pytest.approx(0.75)  # 3 / 4
    # Median start and end of the three windows (agent.store.outages rule 3).
    assert (so.start_utc, so.end_utc) == (T0 + 1.0, T0 + 61.0)
    # With a lower bar, site B's two of four (50 %) count too.
    assert {s.site for s in store.site_outages(fraction=0.4)} == {"site-a", "site-b"}


def test_last_will_alone_marks_offline_and_makes_no_window(store: RecorderStore) -> None:
    store.commit_batch([aggregate(1)])
    # The broker's Last Will: presence (seq 0), offline, with the time of the connection.
    will = msg("status", 0, state="offline", t=T0 - 3600.0, last_ran=T0 - 7200.0)
    store.commit_batch([will])
    (dev,) = store.devices()
    assert dev["state"] == "offline"
    # A will fires up to 1.5 x keepalive late (MQTT 3.1.1 cl. 3.1.2.10): never an outage.
    assert store.outage_windows() == [] and store.site_outages() == []
    # A device's own sequenced offline report is no window either.
    store.commit_batch([msg("status", 2, state="offline", t=T0, last_ran=T0 - 60.0)])
    assert store.count("outage_windows") == 0


def test_impossible_restart_report_is_dead_lettered(store: RecorderStore) -> None:
    bad = restart_report(2, last_ran=T0 + 500.0, t=T0 + 130.0, uptime_s=10.0)
    assert store.commit_batch([aggregate(1), bad, aggregate(3)]) == {("dev-1", "e1"): 3}
    (dl,) = store.dead_letters()
    assert "last_ran" in dl["reason"] and json.loads(dl["raw"])["seq"] == 2
    assert store.count("aggregates") == 2 and store.outage_windows() == []


def test_refusal_in_the_bulk_write_falls_back_to_one_message(
        store: RecorderStore, monkeypatch: pytest.MonkeyPatch) -> None:
    """The batch is first written in bulk; a row the database refuses there undoes the bulk
    attempt, and the batch is applied again message by message: only that one is
    dead-lettered, in the same single transaction."""
    real = Database.executemany
    calls: list[int] = []

    def refuse_seq_2(db: Database, text: str, rows: Any) -> None:
        calls.append(len(rows))
        if text.startswith("INSERT INTO aggregates") and any(r[2] == 2 for r in rows):
            raise db.data_errors[0]("injected bulk refusal")
        real(db, text, rows)

    monkeypatch.setattr(Database, "executemany", refuse_seq_2)
    assert store.commit_batch([aggregate(s) for s in (1, 2, 3)]) == {("dev-1", "e1"): 3}
    assert [r["seq"] for r in store.aggregates()] == [1, 3]
    assert [r.payload["seq"] for r in store.claim_exports(10)] == [1, 3]
    (dl,) = store.dead_letters()
    assert "injected bulk refusal" in dl["reason"] and json.loads(dl["raw"])["seq"] == 2
    assert max(calls) == 3  # the bulk attempt did happen before the fallback


def test_version_1_database_migrates_and_backfills_windows(store_url: str,
                                                            tmp_path: Path) -> None:
    """A store from before the outage_windows table: its rows stay, and the windows its
    power-loss events and latest restart report still hold are made at the upgrade."""
    db = Database(store_url)
    assert db.migrate(_MIGRATIONS[:1]) == 1
    status = json.dumps({"state": "online", "t": T0 + 30.0, "uptime_s": 10.0,
                         "last_ran": T0 + 5.0})
    lost = power_loss_event(7, "ev-lost", 1_700_000_110.0)
    with db.transaction():
        db.execute("INSERT INTO devices (device, site, status, first_seen, last_seen, state,"
                   " state_since) VALUES ('dev-1', 'site-1', ?, 1, 1, 'online', 1)", (status,))
        db.execute("INSERT INTO events (event_id, device, site, epoch, seq, kind, state,"
                   " channels, start_utc, end_utc, thresholds, classification, payload,"
                   " first_received, updated_at) VALUES ('ev-lost', 'dev-1', 'site-1', 'e1', 7,"
                   " 'dip', 'closed', '[0]', ?, ?, ?, ?, ?, 1, 1)",
                   (lost["start_utc"], lost["end_utc"], "{}", "{}", json.dumps(lost)))
    db.close()
    with RecorderStore(store_url, tmp_path / "c") as new:
        assert new.db.schema_version() == RecorderStore.latest_schema_version() >= 2
        assert [d["device"] for d in new.devices()] == ["dev-1"]
        raw = sorted((w.sources[0], w.start_utc, w.end_utc)
                     for w in new.outage_windows(merged=False))
        # Restart: last_ran .. t - uptime_s; last gasp: event start .. end (outages rule 2).
        assert raw == [("last_gasp", 1_700_000_100.0, 1_700_000_110.0),
                       ("restart_report", T0 + 5.0, T0 + 20.0)]
        new.migrate()  # again: nothing changes
        assert new.count("outage_windows") == 2
        new.commit_batch([restart_report(1, last_ran=T0, t=T0 + 20.0, uptime_s=10.0)])
        assert new.count("outage_windows") == 3


def test_planned_restart_is_stored_but_makes_no_window(store: RecorderStore) -> None:
    # Issue 7 item 5 (invented): the agent stops cleanly (its own sequenced offline status
    # with reason planned_stop), then starts again and says last_stop = planned.
    store.commit_batch([msg("status", 1, state="offline", t=T0, uptime_s=3600.0,
                            reason="planned_stop", agent_version="0.1", outbox_depth=0,
                            last_ran=None)])
    (dev,) = store.devices()
    assert dev["state"] == "offline" and dev["status"]["reason"] == "planned_stop"
    store.commit_batch([restart_report(2, last_ran=T0 + 1.0, t=T0 + 130.0, uptime_s=10.0,
                                       last_stop="planned", v=2)])
    assert store.outage_windows() == [] and store.site_outages() == []
    (dev,) = store.devices()
    assert dev["state"] == "online" and dev["status"]["last_stop"] == "planned"
    # The same silence after an unplanned stop (crash, kill, power cut) is an outage window.
    store.commit_batch([restart_report(3, last_ran=T0 + 200.0, t=T0 + 330.0, uptime_s=10.0,
                                       last_stop="unplanned", v=2)])
    (w,) = store.outage_windows()
    assert (w.start_utc, w.end_utc, w.sources) == (T0 + 200.0, T0 + 320.0, ("restart_report",))


def test_events_read_back_with_the_time_below_the_dip_threshold(store: RecorderStore) -> None:
    # Issue 7 item 7: an interruption keeps two durations. Event v2 sends dip_duration_s; for
    # a v1 message the store derives it (enclosing_duration_s of an interruption, duration_s
    # of a dip; agent.events.types.dip_duration_of).
    start = 1_700_000_100.0  # event() starts every event here
    store.commit_batch([
        {**event(1, "ev-v2", "closed", end_utc=start + 0.4, enclosing_duration_s=1.5,
                 dip_duration_s=1.5, v=2), "kind": "interruption"},
        {**event(2, "ev-v1", "closed", end_utc=start + 0.4, enclosing_duration_s=1.2),
         "kind": "interruption"},
        event(3, "ev-dip", "closed", end_utc=start + 0.25),
    ])
    got = {e["event_id"]: (e["duration_s"], e["dip_duration_s"]) for e in store.events()}
    assert got["ev-v2"] == (pytest.approx(0.4), 1.5)
    assert got["ev-v1"] == (pytest.approx(0.4), 1.2)
    assert got["ev-dip"] == (pytest.approx(0.25), pytest.approx(0.25))
