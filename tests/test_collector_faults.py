"""Collector fault tests on real parts (Mosquitto, SQLite, PostgreSQL), loopback only.

The invariant checked everywhere: for every (device, epoch) the store's contiguous committed
sequence number reaches the last sequence number the agent's outbox issued (nothing lost),
and every message is stored once (nothing duplicated). Durations are kept short for CI.
"""

from __future__ import annotations

import hashlib
import signal
import time
from pathlib import Path

from _fleet_helpers import EXPORT, CollectorThread, Fleet, make_fleet
from _mqtt_helpers import wait_for
from _store_helpers import pg_database, schema_url
from _tsdb_helpers import VictoriaMetrics, sample_count, victoria_metrics

from agent.store.recorder import RecorderStore

__all__ = ["pg_database", "victoria_metrics"]  # fixtures, imported for pytest


def _wait_agents(fleet: Fleet, procs: list, timeout: float = 120.0) -> None:
    end = time.monotonic() + timeout
    for p in procs:
        p.wait(max(1.0, end - time.monotonic()))
        assert p.returncode == 0, (fleet.root / "agent logs").as_posix()


def _assert_complete(fleet: Fleet, store: RecorderStore) -> dict[str, int]:
    issued = {}
    for d in fleet.devices:
        epoch, last = fleet.last_seq(d)
        issued[d] = last
        assert last > 10
        # Nothing lost: the contiguous commit covers every seq the outbox ever issued.
        assert store.committed_upto(d, epoch) == last, d
    # Nothing duplicated: one `received` row per (device, epoch, seq) and one event per id.
    assert store.count("received") == sum(issued.values())
    ids = [e["event_id"] for e in store.events()]
    assert len(ids) == len(set(ids))
    return issued


def _events_per_device(store: RecorderStore) -> dict[str, list[str]]:
    out: dict[str, list[str]] = {}
    for e in sorted(store.events(), key=lambda e: e["start_utc"]):
        out.setdefault(e["device"], []).append(e["kind"])
    return out


def test_collector_sigkill_mid_stream_loses_and_duplicates_nothing(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 3, duration=30.0)
    try:
        cfg = fleet.collector_config()
        first = fleet.spawn_collector(cfg)
        time.sleep(1.0)
        agents = [fleet.spawn_agent(d, speed=8.0) for d in fleet.devices]
        time.sleep(1.5)
        first.send_signal(signal.SIGKILL)  # mid-stream, with messages in its session
        first.wait(10)
        time.sleep(1.0)
        fleet.spawn_collector(cfg)  # same client id: the persistent session resumes
        _wait_agents(fleet, agents)
        store = RecorderStore(f"sqlite:///{tmp_path / 'recorder.db'}", tmp_path / "captures")
        try:
            _assert_complete(fleet, store)
            events = _events_per_device(store)
            assert events == {"home-1": ["dip"], "home-2": ["dip"], "home-3": ["dip", "swell"]}
        finally:
            store.close()
    finally:
        fleet.stop_all()


def test_broker_sigkill_messages_are_resent_and_committed(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 2, duration=30.0)
    try:
        with CollectorThread(fleet.collector_config()) as col:
            agents = [fleet.spawn_agent(d, speed=8.0) for d in fleet.devices]
            time.sleep(1.5)
            # Whatever the broker acknowledged but had not saved is gone with it; the agents'
            # outboxes still hold it (PUBACK is not durability) and resend after reconnecting.
            fleet.broker.kill9()
            time.sleep(0.5)
            fleet.broker.start()
            _wait_agents(fleet, agents)
            assert wait_for(lambda: col.collector.stats.committed > 0, 5)
        store = RecorderStore(col.settings.store_url, col.settings.captures_dir)
        try:
            _assert_complete(fleet, store)
        finally:
            store.close()
    finally:
        fleet.stop_all()


def test_two_collectors_share_the_load_on_postgresql(
    tmp_path: Path, pg_database: str, victoria_metrics: VictoriaMetrics
) -> None:
    url = schema_url(pg_database)
    fleet = make_fleet(tmp_path, 4, duration=20.0, summary=2)
    export = EXPORT.format(url=victoria_metrics.url)
    try:
        RecorderStore(url, tmp_path / "captures").close()  # migrate once before both start
        with CollectorThread(fleet.collector_config("collector-1", url, export)) as a, \
                CollectorThread(fleet.collector_config("collector-2", url, export)) as b:
            agents = [fleet.spawn_agent(d, speed=10.0) for d in fleet.devices]
            _wait_agents(fleet, agents)
            # One exporter per store: the other collector stands by.
            assert wait_for(lambda: a.collector.is_exporter or b.collector.is_exporter, 10)
            assert a.collector.is_exporter != b.collector.is_exporter
            series = victoria_metrics.poll_export('{__name__="hc_event_duration_s"}',
                                                  lambda got: sample_count(got) >= 5,
                                                  timeout_s=30)
        # Every ended event exported once (4 dips and a swell), none twice.
        assert sample_count(series) == 5
        # The shared subscription split the data between the two collectors.
        assert a.collector.stats.committed > 0 and b.collector.stats.committed > 0
        store = RecorderStore(url, tmp_path / "captures")
        try:
            _assert_complete(fleet, store)
            # Capture chunks of one capture reached different collectors; each capture was
            # still reassembled once, its file named by SHA-256.
            events = store.events()
            assert len(events) == 5
            for ev in events:
                caps = store.captures(ev["event_id"])
                triggers = {c["fields"]["trigger"] for c in caps}
                # A 150-ms dip ends inside its start capture's 20 post-trigger cycles, which
                # is then extended (one capture); the 0.8-s swell gets a start and an end one.
                assert triggers == ({"start", "end"} if ev["kind"] == "swell" else {"start"})
                for c in caps:
                    data, _meta = store.capture_payload(c["capture_id"])  # sha256-checked
                    assert len(data) == c["size"] > 0
                    assert hashlib.sha256(c["path"].read_bytes()).hexdigest() == c["sha256"]
            assert store.pending_chunks() == {}
        finally:
            store.close()
    finally:
        fleet.stop_all()
