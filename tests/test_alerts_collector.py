"""Alerts end to end on real parts: Mosquitto (project broker-config), edge agents with
simulated sources (an invented street), the collector, an SQLite recorder store, a real HTTP
receiver and a real MQTT subscriber.

A unit whose agent is SIGKILLed goes offline (the broker publishes its Last Will): one alert is
raised; when the agent comes back it is cleared; both reach the webhook and the MQTT alerts
topic once. A collector SIGKILLed after committing an alert but before delivering it delivers
it after its restart, once. (Rules: agent/alerts, common practice.)
"""

from __future__ import annotations

import json
import signal
import sqlite3
import subprocess
from collections.abc import Iterator
from pathlib import Path

import pytest
from _alert_helpers import AlertSubscriber, WebhookReceiver, wait_for
from _fleet_helpers import CollectorThread, Fleet, make_fleet
from _mqtt_helpers import free_port

ALERTS = """
[alerts]
tick_s = 1.0
retry_min_s = 0.2
retry_max_s = 1.0
[alerts.webhook]
url = "http://127.0.0.1:{port}/alerts"
timeout_s = 2.0
[[alerts.rule]]
name = "unit-offline"
kind = "offline"
clear_after_s = 0
min_hold_s = 0
"""


@pytest.fixture
def fleet(tmp_path: Path) -> Iterator[Fleet]:
    # Long enough scenarios to stay up (real time) while the test kills and restarts one.
    f = make_fleet(tmp_path, 3, duration=120.0, summary=5)
    yield f
    # The agents are not under test here: no drain at the end (it would wait for acks).
    for proc in f.procs:
        if proc.poll() is None and "edge" in proc.args:  # type: ignore[operator]
            proc.kill()
            proc.wait(10)
    f.stop_all()


def store_state(fleet: Fleet) -> dict[str, str]:
    db = sqlite3.connect(fleet.root / "recorder.db")
    try:
        return dict(db.execute("SELECT device, state FROM devices").fetchall())
    except sqlite3.OperationalError:
        return {}
    finally:
        db.close()


def queue_rows(fleet: Fleet) -> list[tuple[str, str, int]]:
    db = sqlite3.connect(fleet.root / "recorder.db")
    try:
        return db.execute("SELECT alert_id, channel, attempts FROM alert_queue ORDER BY id"
                          ).fetchall()
    finally:
        db.close()


def start_agents(fleet: Fleet) -> dict[str, subprocess.Popen[bytes]]:
    procs = {d: fleet.spawn_agent(d, 1.0) for d in fleet.devices}
    assert wait_for(lambda: store_state(fleet) == {d: "online" for d in fleet.devices}, 60), \
        store_state(fleet)
    return procs


def test_unit_offline_raised_once_and_cleared_once(fleet: Fleet) -> None:
    web = WebhookReceiver().start()
    sub = AlertSubscriber(fleet.broker.port, fleet.broker.collector_password)
    cfg = fleet.collector_config(extra=ALERTS.format(port=web.port))
    try:
        with CollectorThread(cfg) as col:
            procs = start_agents(fleet)
            procs["home-2"].send_signal(signal.SIGKILL)
            raised = "unit-offline:home-2:1:raised"
            assert wait_for(lambda: web.ids == [raised] and sub.ids() == [raised], 30), \
                (web.ids, sub.ids())
            fleet.spawn_agent("home-2", 1.0)
            cleared = "unit-offline:home-2:1:cleared"
            assert wait_for(lambda: len(web.ids) == 2 and len(sub.ids()) == 2, 60)
            # Let ticks run a few more times: nothing else may be sent.
            wait_for(lambda: False, 3.0)
            assert web.ids == [raised, cleared] and sub.ids() == [raised, cleared]
            assert col.collector.alerts is not None
            stats = col.collector.alerts.engine.stats
            assert (stats.raised, stats.cleared, stats.errors) == (1, 1, 0)
        topic, body, _ = sub.got[0]
        assert topic == "hc/v1/invented-street/alerts/home-2/unit-offline"
        assert body["reason"] == "broker reports the unit offline" and body["site"] == \
            "invented-street"
        # A late subscriber gets each unit's current state, retained.
        late = AlertSubscriber(fleet.broker.port, fleet.broker.collector_password)
        try:
            assert wait_for(lambda: len(late.got) == 1, 10)
            assert late.got[0][1]["change"] == "cleared" and late.got[0][2] is True
        finally:
            late.close()
        assert queue_rows(fleet) == []  # delivered on both channels, gone from the queue
    finally:
        sub.close()
        web.stop()


def test_collector_killed_before_delivery_delivers_after_restart(fleet: Fleet) -> None:
    port = free_port()  # nothing listens here yet: the webhook is down
    cfg = fleet.collector_config(extra=ALERTS.format(port=port) + "\n")
    text = cfg.read_text().replace("[alerts]\n", "[alerts]\nmqtt = false\n")
    cfg.write_text(text)
    collector = fleet.spawn_collector(cfg)
    web = WebhookReceiver(port)
    try:
        procs = start_agents(fleet)
        procs["home-3"].send_signal(signal.SIGKILL)
        raised = "unit-offline:home-3:1:raised"
        # Committed with the presence and tried at least once (the webhook is down).
        assert wait_for(lambda: any(r[0] == raised and r[2] >= 1 for r in queue_rows(fleet)),
                        30), queue_rows(fleet)
        collector.send_signal(signal.SIGKILL)
        collector.wait(10)
        web.start()
        collector = fleet.spawn_collector(cfg)
        assert wait_for(lambda: web.ids == [raised], 30), web.ids
        fleet.spawn_agent("home-3", 1.0)
        cleared = "unit-offline:home-3:1:cleared"
        assert wait_for(lambda: web.ids == [raised, cleared], 60), web.ids
        wait_for(lambda: False, 3.0)
        assert web.ids == [raised, cleared]  # once each
        assert json.loads(json.dumps(web.got[0][1]))["device"] == "home-3"
        assert wait_for(lambda: queue_rows(fleet) == [], 10)
    finally:
        web.stop()
