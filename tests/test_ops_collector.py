"""The collector as an operator runs it (issue 9), on real parts: Mosquitto started with the
project's broker-config, PostgreSQL, SQLite.

- it refuses to start (one line, exit 2, never connects) when the store cannot be opened;
- it leaves the shared group while its store fails and rejoins when the store is back;
- it logs each failed connection, a stats line per interval, and a client-id clash;
- it fills the export queue only when an exporter is configured;
- it announces its presence (retained, with a Last Will); $SYS is readable by its user.
"""

from __future__ import annotations

import io
import json
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import msgpack
import paho.mqtt.client as mqtt
import pytest
import structlog
from _fleet_helpers import COLLECTOR, CollectorThread
from _mqtt_helpers import Broker, client, free_port, make_broker, wait_for
from _store_helpers import admin_dsn, pg_database, schema_url

from agent import logs
from agent.store.recorder import RecorderStore
from agent.wire import codec

__all__ = ["pg_database"]

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    b = make_broker(tmp_path)
    b.add_device("unit-1")
    b.start()
    try:
        yield b
    finally:
        b.stop()


def write_config(tmp_path: Path, port: int, password: str, *, cid: str = "collector-1",
                 url: str | None = None, extra: str = "") -> Path:
    cdir = tmp_path / f"cfg-{cid}-{uuid.uuid4().hex[:6]}"
    cdir.mkdir()
    (cdir / "password").write_text(password)
    cfg = cdir / "collector.toml"
    cfg.write_text(COLLECTOR.format(cid=cid, url=url or f"sqlite:///{tmp_path / 'rec.db'}",
                                    captures=tmp_path / "captures", port=port, extra=extra))
    cfg.chmod(0o640)
    return cfg


@contextmanager
def captured_logs() -> Iterator[io.StringIO]:
    stream = io.StringIO()
    logs.configure("debug", stream, journald=False)
    try:
        yield stream
    finally:
        structlog.reset_defaults()


def events(stream: io.StringIO) -> list[dict[str, Any]]:
    return [json.loads(line) for line in stream.getvalue().splitlines() if line.startswith("{")]


def gap_payload(device: str, seq: int, site: str = "site-t", epoch: str = "e1") -> bytes:
    ident = codec.Identity(site=site, device=device, epoch=epoch)
    return codec.encode(ident.stamp(codec.gap_body("bulk", 10_000 + seq, 10_000 + seq, 1,
                                                   "outbox_full"), seq))


def publish_gaps(b: Broker, device: str, seqs: range, site: str = "site-t") -> None:
    c = client(b.port, device, b.devices[device], client_id=f"pub-{uuid.uuid4().hex[:6]}")
    c.connect("127.0.0.1", b.port)
    c.loop_start()
    try:
        for seq in seqs:
            c.publish(f"hc/v1/{site}/{device}/gap", gap_payload(device, seq, site),
                      qos=1).wait_for_publish(5)
    finally:
        c.disconnect()
        c.loop_stop()


def pg_url(dbname: str) -> str:
    parts = urlsplit(admin_dsn())
    return urlunsplit((parts.scheme, parts.netloc, "/" + dbname, "", ""))


# --- fail fast --------------------------------------------------------------------------

def _collect(cfg: Path, cwd: Path, env: dict[str, str] | None = None
             ) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "agent.cli.main", "collect", "--config",
                           str(cfg)], cwd=cwd, capture_output=True, text=True, timeout=60,
                          check=False, env=env)


def _never_connected(b: Broker, cid: str) -> bool:
    return f" as {cid} " not in (b.root / "mosquitto.log").read_text()


def test_collector_refuses_to_start_on_a_missing_postgresql_database(
        broker: Broker, tmp_path: Path, pg_database: str) -> None:
    cfg = write_config(tmp_path, broker.port, broker.collector_password,
                       url=pg_url("hc_no_such_db_o9"))
    done = _collect(cfg, tmp_path)
    assert done.returncode == 2
    lines = [ln for ln in done.stderr.splitlines() if not ln.startswith("{")]
    assert lines == [lines[0]] and 'database "hc_no_such_db_o9" does not exist' in lines[0]
    assert "Traceback" not in done.stderr
    # It never took a share of the fleet: the broker saw no connection from it.
    assert _never_connected(broker, "collector-1")


def test_collector_refuses_to_start_without_psycopg(broker: Broker, tmp_path: Path) -> None:
    shadow = tmp_path / "no-psycopg" / "psycopg"
    shadow.mkdir(parents=True)
    (shadow / "__init__.py").write_text("raise ImportError('psycopg is not installed')\n")
    cfg = write_config(tmp_path, broker.port, broker.collector_password,
                       url="postgresql://postgres@127.0.0.1:5432/postgres")
    env = {"PYTHONPATH": f"{shadow.parent}:{ROOT}", "PATH": "/usr/bin:/bin"}
    done = _collect(cfg, tmp_path, env)
    assert done.returncode == 2, done.stderr
    assert "psycopg" in done.stderr and "Traceback" not in done.stderr
    assert _never_connected(broker, "collector-1")


# --- step aside while the store fails ---------------------------------------------------

def test_collector_leaves_the_group_while_its_store_fails(
        broker: Broker, tmp_path: Path, pg_database: str) -> None:
    import psycopg

    role = f"hc_o9_{uuid.uuid4().hex[:8]}"
    url = schema_url(pg_database)
    schema = url.split("search_path%3D")[-1]
    with psycopg.connect(pg_database, autocommit=True) as admin:
        admin.execute(f'CREATE ROLE "{role}" LOGIN')
        admin.execute(f'GRANT ALL ON SCHEMA "{schema}" TO "{role}"')
        admin.execute(f'ALTER DEFAULT PRIVILEGES IN SCHEMA "{schema}" GRANT ALL ON TABLES '
                      f'TO "{role}"')
        admin.execute(f'GRANT CONNECT ON DATABASE "{pg_database.rsplit("/", 1)[1]}" '
                      f'TO "{role}"')
    RecorderStore(url, tmp_path / "captures").close()  # schema created by the admin
    with psycopg.connect(pg_database, autocommit=True) as admin:
        admin.execute(f'GRANT ALL ON ALL TABLES IN SCHEMA "{schema}" TO "{role}"')
        admin.execute(f'GRANT ALL ON ALL SEQUENCES IN SCHEMA "{schema}" TO "{role}"')
    parts = urlsplit(url)
    weak_url = urlunsplit((parts.scheme, f"{role}@{parts.hostname}:{parts.port}", parts.path,
                           parts.query, ""))
    weak = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password,
                                        cid="weak", url=weak_url))
    strong = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password,
                                          cid="strong", url=url))
    store = RecorderStore(url, tmp_path / "captures")
    try:
        with captured_logs() as out, weak, strong:
            publish_gaps(broker, "unit-1", range(1, 21))
            assert wait_for(lambda: store.committed_upto("unit-1", "e1") == 20, 20)
            assert weak.collector.stats.committed > 0  # both had a share
            # The weak collector's store goes away: its role may no longer log in.
            with psycopg.connect(pg_database, autocommit=True) as admin:
                admin.execute(f'ALTER ROLE "{role}" NOLOGIN')
                admin.execute("SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
                              "WHERE usename = %s", (role,))
            publish_gaps(broker, "unit-1", range(21, 41))
            assert wait_for(lambda: weak.collector.aside, 20)
            received_aside = weak.collector.stats.received
            # Everything published after it stepped aside reaches the other collector; with
            # the old behaviour half of it stayed unacknowledged with the weak collector.
            publish_gaps(broker, "unit-1", range(41, 81))
            assert wait_for(lambda: len(store.db.query(
                "SELECT seq FROM received WHERE device = 'unit-1' AND seq > 40")) == 40, 20)
            assert weak.collector.stats.received == received_aside
            # The store comes back: the weak collector rejoins and takes a share again.
            with psycopg.connect(pg_database, autocommit=True) as admin:
                admin.execute(f'ALTER ROLE "{role}" LOGIN')
            assert wait_for(lambda: not weak.collector.aside, 40)
            before = weak.collector.stats.committed
            publish_gaps(broker, "unit-1", range(81, 121))
            assert wait_for(lambda: weak.collector.stats.committed > before, 20)
        names = [e["event"] for e in events(out)]
        assert "collector_store_failed" in names and "collector_store_back" in names
    finally:
        store.close()
        with psycopg.connect(pg_database, autocommit=True) as admin:
            admin.execute(f'ALTER ROLE "{role}" LOGIN')


# --- not silent -------------------------------------------------------------------------

def test_collector_logs_each_failed_connection_and_a_stats_line(tmp_path: Path) -> None:
    port = free_port()  # nothing listens here
    cfg = write_config(tmp_path, port, "pw", extra="")
    text = cfg.read_text().replace('[collector]\n', '[collector]\nstats_interval_s = 0.5\n', 1)
    cfg.write_text(text)
    from agent.collect.service import Collector, load_collector_settings

    with captured_logs() as out:
        col = Collector(load_collector_settings(cfg))
        stop = threading.Event()
        t = threading.Thread(target=col.run, args=(stop,), daemon=True)
        t.start()
        try:
            assert wait_for(lambda: sum(e["event"] == "collector_connect_failed"
                                        for e in events(out)) >= 2, 20)
            assert wait_for(lambda: any(e["event"] == "collector_stats" for e in events(out)), 5)
        finally:
            stop.set()
            t.join(30)
    failed = [e for e in events(out) if e["event"] == "collector_connect_failed"]
    assert failed[0]["port"] == port and failed[0]["logger"] == "halfcycle.collect"
    assert [e["failures"] for e in failed[:2]] == [1, 2]
    stats = next(e for e in events(out) if e["event"] == "collector_stats")
    assert stats["connected"] is False and stats["received"] == 0


def test_two_collectors_with_one_client_id_are_named(broker: Broker, tmp_path: Path) -> None:
    a = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password,
                                     cid="same-id"))
    b = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password,
                                     cid="same-id", url=f"sqlite:///{tmp_path / 'b.db'}"))
    with captured_logs() as out, a:
        b.thread.start()
        try:
            assert wait_for(lambda: any(e["event"] == "collector_client_id_in_use"
                                        for e in events(out)), 20)
        finally:
            b.stop.set()
            b.thread.join(30)
    clash = next(e for e in events(out) if e["event"] == "collector_client_id_in_use")
    assert clash["client_id"] == "same-id" and clash["level"] == "error"


# --- export queue -----------------------------------------------------------------------

def test_export_queue_filled_only_when_an_exporter_is_configured(
        broker: Broker, tmp_path: Path) -> None:
    url = f"sqlite:///{tmp_path / 'rec.db'}"
    with CollectorThread(write_config(tmp_path, broker.port, broker.collector_password,
                                      url=url)):
        publish_gaps(broker, "unit-1", range(1, 11))
        store = RecorderStore(url, tmp_path / "captures")
        try:
            assert wait_for(lambda: store.committed_upto("unit-1", "e1") == 10, 20)
            assert store.count("export_queue") == 0
        finally:
            store.close()
    # The store layer still queues when asked to (a collector with [export]).
    with RecorderStore(url, tmp_path / "captures", export=True) as store:
        store.commit_batch([json.loads(json.dumps(msgpack.unpackb(gap_payload("unit-1", 11))))])
        assert store.count("export_queue") == 1


# --- presence and $SYS ------------------------------------------------------------------

def _retained(b: Broker, topic: str, user: str, password: str) -> list[mqtt.MQTTMessage]:
    got: list[mqtt.MQTTMessage] = []
    c = client(b.port, user, password, client_id=f"peek-{uuid.uuid4().hex[:6]}")
    c.on_message = lambda _c, _u, m: got.append(m)
    c.connect("127.0.0.1", b.port)
    c.subscribe(topic, qos=1)
    c.loop_start()
    try:
        wait_for(lambda: bool(got), 5)
    finally:
        c.disconnect()
        c.loop_stop()
    return got


def test_presence_is_retained_and_the_will_says_offline(broker: Broker, tmp_path: Path
                                                       ) -> None:
    cfg = write_config(tmp_path, broker.port, broker.collector_password, cid="col-p")
    topic = "hc/v1/_collector/col-p/presence"
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "collect", "--config",
                             str(cfg)], cwd=tmp_path, stderr=subprocess.DEVNULL)
    try:
        assert wait_for(lambda: any(msgpack.unpackb(m.payload)["state"] == "online"
                                    for m in _retained(broker, topic, "collector",
                                                       broker.collector_password)), 20)
    finally:
        proc.kill()  # no clean DISCONNECT: the broker publishes the Will
        proc.wait(10)
    assert wait_for(lambda: any(msgpack.unpackb(m.payload)["state"] == "offline"
                                for m in _retained(broker, topic, "collector",
                                                   broker.collector_password)), 20)
    # A device cannot forge it.
    body = {"state": "online"}
    c = client(broker.port, "unit-1", broker.devices["unit-1"])
    c.connect("127.0.0.1", broker.port)
    c.loop_start()
    c.publish(topic, msgpack.packb(body), qos=1, retain=True).wait_for_publish(5)
    c.disconnect()
    c.loop_stop()
    last = _retained(broker, topic, "collector", broker.collector_password)
    assert msgpack.unpackb(last[-1].payload)["state"] == "offline"


def test_sys_tree_is_readable_by_the_collector_only(broker: Broker) -> None:
    got = _retained(broker, "$SYS/broker/version", "collector", broker.collector_password)
    assert got and got[0].payload.startswith(b"mosquitto version")
    assert not _retained(broker, "$SYS/broker/version", "unit-1", broker.devices["unit-1"])




def test_a_store_that_passes_the_probe_but_fails_commits_backs_off(
        broker: Broker, tmp_path: Path) -> None:
    """A full disk, say: the probe's empty transaction goes through, every commit fails. The
    collector must not flap in and out of the group every second."""
    col = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password))

    def failing(_store: Any, _batch: Any) -> Any:
        raise OSError(28, "No space left on device")

    with captured_logs() as out, col:
        col.collector.process_batch = failing  # type: ignore[method-assign]
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and col.collector._rejoin_delay < 4.0:
            if not col.collector.aside:
                publish_gaps(broker, "unit-1", range(1, 2))
            time.sleep(0.2)
    failed = [e for e in events(out) if e["event"] == "collector_store_failed"]
    assert len(failed) >= 3 and "No space left" in failed[0]["error"]
    assert col.collector._rejoin_delay >= 4.0  # 1, 2, 4 s: growing, not reset by the probe


def test_a_restart_is_not_taken_for_a_client_id_clash(broker: Broker, tmp_path: Path) -> None:
    cfg = write_config(tmp_path, broker.port, broker.collector_password, cid="restarted")
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "collect", "--config",
                             str(cfg)], cwd=tmp_path, stderr=subprocess.DEVNULL)
    try:
        assert wait_for(lambda: " as restarted " in (broker.root / "mosquitto.log").read_text(),
                        20)
        time.sleep(0.5)
    finally:
        proc.kill()  # a crash, then two ordinary restarts
        proc.wait(10)
    with captured_logs() as out:
        for _ in range(2):
            with CollectorThread(cfg):
                time.sleep(0.5)
    names = [e["event"] for e in events(out)]
    assert names.count("collector_connected") == 2
    assert "collector_client_id_in_use" not in names
