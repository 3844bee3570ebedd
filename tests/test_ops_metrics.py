"""Prometheus metrics scraped over HTTP during a fleet run (real Mosquitto, simulated agents as
subprocesses, SQLite store), with the counters checked against what was sent: every seq the
outboxes issued, every presence message, and malformed messages by reason. The text is
parsed with prometheus-client's own exposition parser."""

from __future__ import annotations

import threading
import time
import urllib.request
import uuid
from pathlib import Path

import msgpack
import paho.mqtt.client as mqtt
from _fleet_helpers import CollectorThread, make_fleet
from _mqtt_helpers import client, free_port, make_broker, wait_for
from prometheus_client.parser import text_string_to_metric_families
from test_ops_collector import publish_gaps, write_config

from agent.ops.metrics import MetricsSettings
from agent.store.recorder import RecorderStore

P = "halfcycle_collector_"


def scrape(address: tuple[str, int]) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    with urllib.request.urlopen(f"http://{address[0]}:{address[1]}/metrics", timeout=5) as r:
        text = r.read().decode()
    return {(s.name, tuple(sorted(s.labels.items()))): s.value
            for fam in text_string_to_metric_families(text) for s in fam.samples}


def value(samples: dict, name: str, **labels: str) -> float:
    return samples.get((P + name, tuple(sorted(labels.items()))), 0.0)


def test_metrics_counters_match_what_the_fleet_sent(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 2, duration=12.0, summary=2)
    presence: list[int] = []
    lock = threading.Lock()

    def on_message(_c: mqtt.Client, _u: object, m: mqtt.MQTTMessage) -> None:
        body = msgpack.unpackb(m.payload, raw=False)
        if body.get("seq") == 0 and not m.retain:
            with lock:
                presence.append(1)

    watcher = client(fleet.broker.port, "collector", fleet.broker.collector_password,
                     client_id=f"watch-{uuid.uuid4().hex[:6]}")
    watcher.on_message = on_message
    watcher.connect("127.0.0.1", fleet.broker.port)
    watcher.subscribe("hc/v1/+/+/status", qos=1)
    watcher.loop_start()
    cfg = fleet.collector_config(extra='[metrics]\nbind = "127.0.0.1:0"\n')
    try:
        with CollectorThread(cfg) as col:
            address = col.collector.metrics_address
            assert address is not None and address[0] == "127.0.0.1"
            agents = [fleet.spawn_agent(d, speed=6.0) for d in fleet.devices]
            for p in agents:
                assert p.wait(120) == 0
            # Three malformed messages from a device: dead letters by reason.
            dev = fleet.devices[0]
            bad = client(fleet.broker.port, dev, fleet.broker.devices[dev])
            bad.connect("127.0.0.1", fleet.broker.port)
            bad.loop_start()
            for _ in range(3):
                bad.publish(f"hc/v1/invented-street/{dev}/summary", b"\xc1 not msgpack",
                            qos=1).wait_for_publish(5)
            bad.disconnect()
            bad.loop_stop()
            issued = sum(fleet.last_seq(d)[1] for d in fleet.devices)
            assert wait_for(lambda: col.collector.stats.received >= issued + 3, 30)
            time.sleep(0.5)
            m = scrape(address)
            stats = col.collector.stats
        with lock:
            presence_seen = len(presence)
    finally:
        watcher.disconnect()
        watcher.loop_stop()
        fleet.stop_all()
    received = value(m, "messages_received_total")
    # Every seq each outbox issued, plus the seq-0 presence messages and the 3 bad ones, plus
    # redeliveries (a resend after an ack timeout counts again; the store keeps it once).
    assert received >= issued + presence_seen + 3
    assert received == stats.received
    assert value(m, "messages_committed_total") == received  # nothing left uncommitted
    assert value(m, "dead_letters_total", reason="not_msgpack") == 3
    assert value(m, "batch_size_messages_sum") == received
    assert value(m, "commit_seconds_count") == stats.batches > 0
    assert value(m, "queue_depth_messages") == 0
    assert value(m, "store_errors_total") == 0 and value(m, "stepped_aside") == 0
    assert value(m, "alerts_pending") == 0  # nothing sets it until alerts exist
    assert value(m, "mqtt_connected") == 1
    for d in fleet.devices:
        age = value(m, "unit_last_seen_age_seconds", site="invented-street", device=d)
        assert 0 <= age < 120
    with RecorderStore(f"sqlite:///{tmp_path / 'recorder.db'}", tmp_path / "captures") as s:
        assert s.count("received") == issued  # stored once each
        assert s.count("export_queue") == 0  # no [export] configured


def test_metrics_bind_must_be_an_address_and_port() -> None:
    import pytest

    from agent.config import ConfigError, Section

    for bad in ("9464", "localhost:9464", "127.0.0.1:99999", "127.0.0.1:"):
        with pytest.raises(ConfigError, match=r"metrics\.bind"):
            MetricsSettings.from_section(Section({"bind": bad}, "c.toml", "metrics"))
    ok = MetricsSettings.from_section(Section({"bind": "[::1]:9464"}, "c.toml", "metrics"))
    assert ok is not None and ok.loopback and ok.port == 9464


def test_export_backlog_and_failures_when_the_time_series_server_is_down(
        tmp_path: Path) -> None:
    b = make_broker(tmp_path)
    b.add_device("unit-1")
    b.start()
    dead_tsdb = free_port()  # nothing listens: every write is refused
    cfg = write_config(tmp_path, b.port, b.collector_password,
                       extra=f'[metrics]\nbind = "127.0.0.1:0"\n[export]\n'
                             f'url = "http://127.0.0.1:{dead_tsdb}"\ntoken = "unused"\n')
    cfg.write_text(cfg.read_text().replace("[collector]\n", "[collector]\nstats_interval_s = 0.3\n",
                                           1))
    try:
        with CollectorThread(cfg) as col:
            publish_gaps(b, "unit-1", range(1, 6))
            address = col.collector.metrics_address
            assert address is not None
            assert wait_for(lambda: value(scrape(address), "export_failures_total") >= 1, 30)
            m = scrape(address)
    finally:
        b.stop()
    assert value(m, "export_backlog_rows") == 5  # the five gap notices wait for the server
    assert value(m, "messages_committed_total") == 5
