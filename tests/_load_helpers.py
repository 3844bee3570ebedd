"""Load harness: many lightweight simulated agents against real collectors.

Each simulated agent is one paho client with its own broker credentials (bound to its site,
``setup.add_devices``) that replays messages built beforehand with the project's wire codec,
as an edge sends them: its online status, one summary of ``records`` per-second records per
tick, a 10-min aggregate and a heartbeat every tenth tick, and for every fourth agent one dip
event (the values are INVENTED, noise around 120 V). Agents are spread
over a few publisher processes; no measurement runs at publish time. Collectors are
``agent.collect.service.Collector`` in processes of their own (one, or several in one shared
group on a PostgreSQL store), each recording when every message it handled was committed.

What it measures: messages published and committed, per type; lost (published, not in
``received``); stored twice (more rows of a type than were sent, a unit's seconds under two
keys, rollups counting more seconds than were sent); publish-to-commit latency (p50, p99);
each collector's, the broker's and the publishers' CPU seconds (``/proc/<pid>/stat``,
``time.process_time``) and the rate the collectors sustained. Loopback only; every loop is
bounded in count and time.
"""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt

sys.path.insert(0, str(Path(__file__).resolve().parent))
sys.path.insert(0, str(Path(__file__).resolve().parent / "bench"))

from _mqtt_helpers import make_broker
from bench_fleet import NOMINAL, event_body

from agent.broker import setup
from agent.measurement.types import Aggregate
from agent.wire import codec
from agent.wire.records import SummaryBatcher

SITE = "invented-load"
CHANNELS = ["L1", "L2"]
#: The invented homes' site model (120/240 V split phase, 60 Hz, as in bench_fleet.py).
SITE_MODEL = {"nominal_v": NOMINAL, "nominal_hz": 60.0, "service_type": "120/240",
              "channel_names": CHANNELS, "measurement_point": "service", "feeder": "F1",
              "transformer": "T1", "labels": {}}
#: Message types an agent sends, in the order results report them.
KINDS = ("summary", "aggregate", "status", "event")


def agent_messages(device: str, ticks: int, records: int, t0: float, seed: int
                   ) -> list[list[tuple[str, str, bytes]]]:
    """(type, topic, payload) of one invented agent, tick by tick, in the order an edge sends
    them: its online status with the site model first; a summary of ``records`` per-second
    records per tick; every tenth tick the 10-min aggregate and a heartbeat status (the
    edge's heartbeat is every 600 s); every fourth agent (``seed % 4 == 0``) one dip, sent
    when it ended (``bench_fleet.event_body``)."""
    rng = np.random.default_rng(seed)
    ident = codec.Identity(SITE, device, "e1")
    out: list[list[tuple[str, str, bytes]]] = []
    seq = 0

    def add(tick: list[tuple[str, str, bytes]], kind: str, body: dict[str, Any]) -> None:
        nonlocal seq
        seq += 1
        tick.append((kind, f"hc/v1/{SITE}/{device}/{kind}",
                     codec.encode(ident.stamp(body, seq))))

    dip_tick = (3 + seed // 4) % ticks if seed % 4 == 0 else -1
    for k in range(ticks):
        tick: list[tuple[str, str, bytes]] = []
        t = t0 + k * records + np.arange(records, dtype=np.float64)
        if k == 0:
            add(tick, "status", codec.status_body(
                "online", agent_version="load", uptime_s=1.0, outbox_depth=0, sync="synced",
                time_error_s=0.002, t=float(t[0]) - 1.0, site_model=SITE_MODEL))
        v = NOMINAL + rng.normal(0.0, 0.4, (records, 2))
        batcher = SummaryBatcher(CHANNELS, k=records)
        bodies = batcher.add_many(t, v - 0.3, v, v + 0.3, 60.0 + rng.normal(0, 0.01, records),
                                  np.full((records, 2), 0.02), np.full(records, np.nan),
                                  np.zeros(records))
        add(tick, "summary", bodies[0] if bodies else batcher.flush())
        if k == dip_tick:
            add(tick, "event", event_body(f"{device}-dip-{k}", "dip", float(t[records // 2]),
                                          0.2, 0.8))
        if k % 10 == 9:
            agg = Aggregate(kind="10min", t_utc=float(t[-1] + 1 - 10 * records),
                            duration_s=10.0 * records, rms=(NOMINAL, NOMINAL + 0.1),
                            thd=(0.02, 0.02), hz=60.0, count=3600)
            add(tick, "aggregate", codec.aggregate_body(agg, CHANNELS))
            add(tick, "status", codec.status_body(
                "heartbeat", agent_version="load", uptime_s=float((k + 1) * records),
                outbox_depth=0, sync="synced", time_error_s=0.002, t=float(t[-1])))
        out.append(tick)
    return out


@dataclass
class Phase:
    """One load phase: ``agents`` publish a tick every ``tick_s`` [s] for ``ticks`` ticks."""

    agents: int
    ticks: int
    tick_s: float
    records: int = 60

    @property
    def rate(self) -> float:
        """Offered load [msg/s]: per agent and ten ticks, ten summaries, an aggregate and a
        heartbeat (the online status and the few events left out)."""
        return self.agents * 1.2 / self.tick_s


def _publisher(port: int, creds: list[tuple[str, str]],
               streams: list[list[list[tuple[str, str, bytes]]]], tick_s: float, start: Any,
               t_start: Any, sent: Any, index: list[list[int]], cpu: Any, slot: int) -> None:
    """One publisher process: its agents' clients, then one tick of every agent per
    ``tick_s`` (spread evenly over the tick), stamping each message's send time; its own
    CPU seconds from the start to the last acknowledgement go to ``cpu[slot]``."""
    clients = []
    for device, pw in creds:
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"sim-{device}",
                        protocol=mqtt.MQTTv5)
        c.username_pw_set(device, pw)
        c.max_inflight_messages_set(50)
        c.connect("127.0.0.1", port, keepalive=60)
        c.loop_start()
        clients.append(c)
    start.wait(60)
    cpu0 = time.process_time()
    t0 = t_start.value
    pos = [0] * len(clients)
    n_ticks = max((len(s) for s in streams), default=0)
    for tick in range(n_ticks):
        for a, c in enumerate(clients):
            if tick >= len(streams[a]):
                continue
            at = t0 + tick * tick_s + tick_s * a / max(len(clients), 1)
            delay = at - time.time()
            if delay > 0:
                time.sleep(delay)
            for _kind, topic, payload in streams[a][tick]:
                sent[index[a][pos[a]]] = time.time()
                info = c.publish(topic, payload, qos=1)
                for _ in range(5000):  # bounded: 5 s of a full client queue
                    if info.rc != mqtt.MQTT_ERR_QUEUE_SIZE:
                        break
                    time.sleep(0.001)
                    info = c.publish(topic, payload, qos=1)
                pos[a] += 1
    deadline = time.time() + 60
    while time.time() < deadline and any(getattr(c, "_out_messages", None) for c in clients):
        time.sleep(0.05)
    cpu[slot] = time.process_time() - cpu0
    for c in clients:
        c.loop_stop()
        c.disconnect()


def _cpu_s(pid: int) -> float:
    """User + system CPU seconds of a process (``/proc/<pid>/stat``, fields 14 and 15)."""
    try:
        fields = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    except OSError:
        return float("nan")
    return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")


def _collector(store_url: str, captures: str, port: int, password: str, cid: str,
               group: str, stop: Any, ready: Any, out_file: str) -> None:
    """A collector process that notes when each message it handled was committed."""
    import msgpack

    from agent.collect.service import Collector, CollectorSettings
    from agent.publish.mqtt import PublisherConfig

    settings = CollectorSettings(
        path=None, collector_id=cid, group=group, store_url=store_url,
        captures_dir=Path(captures), keep_trend=True, trend_retention_days=None,
        mqtt=PublisherConfig(host="127.0.0.1", port=port, tls=False, username="collector",
                             password=password), log_level="warning")
    collector = Collector(settings)
    original = collector.process_batch
    notes: list[tuple[str, int, float]] = []

    def timed(store: Any, batch: list[Any]) -> Any:
        upto = original(store, batch)
        now = time.time()
        for rec in batch:
            try:
                m = msgpack.unpackb(rec.payload, raw=False)
                notes.append((m["device"], int(m["seq"]), now))
            except Exception:  # a payload that is not ours: not counted
                pass
        return upto

    collector.process_batch = timed  # type: ignore[method-assign]
    halt, up = threading.Event(), threading.Event()
    th = threading.Thread(target=collector.run, args=(halt,), kwargs={"ready": up})
    th.start()
    if up.wait(30):
        ready.set()
    stop.wait(3600)
    halt.set()
    th.join(60)
    Path(out_file).write_text(json.dumps(notes))


@dataclass
class LoadResult:
    agents: int
    collectors: int
    backend: str
    duration_s: float
    offered_msg_s: float
    published: int
    committed: int
    lost: int
    duplicated: int
    committed_by: list[int]
    cpu_s: list[float]
    broker_cpu_s: float
    publishers_cpu_s: float
    p50_ms: float
    p99_ms: float
    drained_s: float
    records_published: int
    records_stored: int
    #: Per message type: published, and rows in its own table (summary: ``trend``,
    #: aggregate: ``aggregates``, event: ``events``, status: ``received``).
    published_by_kind: dict[str, int] = field(default_factory=dict)
    stored_by_kind: dict[str, int] = field(default_factory=dict)
    #: Where anything was stored more than once: name -> excess (rows, or records / 60).
    duplicates: dict[str, int] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)

    @property
    def per_collector_msg_s(self) -> float:
        return self.committed / self.duration_s / max(self.collectors, 1)

    def as_dict(self) -> dict[str, Any]:
        return {**asdict(self), "per_collector_msg_s": self.per_collector_msg_s}


@contextmanager
def pg_store(admin_dsn: str) -> Iterator[str]:
    """A fresh PostgreSQL database for one run, dropped afterwards."""
    import psycopg

    name = f"hc_load_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin_dsn, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    base, _, _ = admin_dsn.rpartition("/")
    try:
        yield f"{base}/{name}"
    finally:
        with psycopg.connect(admin_dsn, autocommit=True) as conn:
            conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def run_load(root: Path, store_url: str, phase: Phase, *, collectors: int = 1,
             publishers: int = 4, drain_timeout_s: float = 120.0) -> LoadResult:
    """One phase of ``phase.agents`` simulated agents against ``collectors`` collectors in
    one shared group on ``store_url``; waits (bounded) until every message is committed."""
    from agent.store.recorder import RecorderStore

    root.mkdir(parents=True, exist_ok=True)
    broker = make_broker(root)
    devices = [f"sim-{i:04d}" for i in range(phase.agents)]
    passwords = setup.add_devices(broker.root, [(d, SITE) for d in devices])
    broker.start()
    ctx = mp.get_context("fork")
    t0 = float(int(time.time() // 60 * 60) - phase.ticks * phase.records - 3600)
    streams = [agent_messages(d, phase.ticks, phase.records, t0, i)
               for i, d in enumerate(devices)]
    flat: list[tuple[str, int]] = []  # (device, seq) of every message, in global index order
    kinds: list[str] = []
    index: list[list[int]] = []
    for d, s in zip(devices, streams, strict=True):
        msgs = [m for tick in s for m in tick]
        index.append(list(range(len(flat), len(flat) + len(msgs))))
        flat.extend((d, k + 1) for k in range(len(msgs)))
        kinds.extend(kind for kind, _, _ in msgs)
    sent = ctx.Array("d", len(flat), lock=False)
    try:
        # The store's schema first, so collectors starting together do not race to create it.
        RecorderStore(store_url, root / "captures").close()
        stop, procs, files, readies = ctx.Event(), [], [], []
        for k in range(collectors):
            ready = ctx.Event()
            out = root / f"collector-{k}.json"
            p = ctx.Process(target=_collector, args=(
                store_url, str(root / "captures"), broker.port, broker.collector_password,
                f"load-{k}", "load", stop, ready, str(out)))
            p.start()
            procs.append(p)
            files.append(out)
            readies.append(ready)
        for r in readies:
            if not r.wait(60):
                raise RuntimeError("a collector did not start within 60 s")
        cpu0 = [_cpu_s(p.pid) for p in procs if p.pid]
        broker_pid = broker.proc.pid if broker.proc is not None else 0
        broker_cpu0 = _cpu_s(broker_pid)
        start, t_start = ctx.Event(), ctx.Value("d", 0.0)
        pubs = []
        groups = [g for g in (list(range(i, phase.agents, publishers))
                              for i in range(publishers)) if g]
        pub_cpu = ctx.Array("d", len(groups), lock=False)
        for slot, g in enumerate(groups):
            p = ctx.Process(target=_publisher, args=(
                broker.port, [(devices[a], passwords[devices[a]]) for a in g],
                [streams[a] for a in g], phase.tick_s, start, t_start, sent,
                [index[a] for a in g], pub_cpu, slot))
            p.start()
            pubs.append(p)
        time.sleep(2.0 + phase.agents / 200)  # clients connected
        t_start.value = time.time() + 0.5
        start.set()
        for p in pubs:
            p.join(phase.ticks * phase.tick_s + 180)
        t_end = time.time()
        # Drain: every published message committed (bounded).
        deadline = t_end + drain_timeout_s
        store = RecorderStore(store_url, root / "captures", migrate=False)
        try:
            while time.time() < deadline:
                if store.count("received") >= len(flat):
                    break
                time.sleep(0.25)
            drained = time.time() - t_end
            cpu1 = [_cpu_s(p.pid) for p in procs if p.pid]
            broker_cpu = _cpu_s(broker_pid) - broker_cpu0
            stop.set()
            for p in procs:
                p.join(90)
            db = store.db
            got = {(d, int(s)) for d, s in db.query("SELECT device, seq FROM received")}

            def one(sql: str) -> int:
                row = db.query_one(sql)
                return int(row[0]) if row and row[0] is not None else 0

            records_stored = one("SELECT COALESCE(SUM(seconds), 0) FROM trend_unit")
            # One channel's 10-min rollups count every second once (the other is the same).
            rollup_seconds = one("SELECT COALESCE(SUM(seconds), 0) FROM trend_rollup"
                                 " WHERE span_s = 600 AND channel = 0")
            stored_by_kind = {
                "summary": one("SELECT COUNT(*) FROM trend"),
                "aggregate": one("SELECT COUNT(*) FROM aggregates"),
                "event": one("SELECT COUNT(*) FROM events"),
                "status": one("SELECT COUNT(*) FROM received WHERE type = 'status'")}
                    # The same seconds of a unit under two keys would be a summary stored twice.
            twice = {"trend": one("SELECT COUNT(*) FROM (SELECT 1 FROM trend GROUP BY device,"
                                  " t_utc HAVING COUNT(*) > 1) x")}
        finally:
            store.close()
    finally:
        broker.stop()
    published = {k for i, k in enumerate(flat) if sent[i] > 0}
    published_by_kind = dict.fromkeys(KINDS, 0)
    for i, kind in enumerate(kinds):
        if sent[i] > 0:
            published_by_kind[kind] += 1
    notes_all = [json.loads(f.read_text()) if f.exists() else [] for f in files]
    first_commit: dict[tuple[str, int], float] = {}
    noted = 0
    for notes in notes_all:
        for d, s, at in notes:
            noted += 1
            key = (d, int(s))
            first_commit[key] = min(first_commit.get(key, at), at)
    pos = {k: i for i, k in enumerate(flat)}
    lat = np.array([at - sent[pos[k]] for k, at in first_commit.items()
                    if k in pos and sent[pos[k]] > 0])
    records_published = published_by_kind["summary"] * phase.records
    # Redelivered messages are expected (acknowledged after commit); a duplicate is one
    # stored twice: more rows of a type than were sent, a unit's seconds twice, or rollups
    # that count more seconds than were sent.
    duplicates = {f"{k} rows": max(0, stored_by_kind[k] - published_by_kind[k])
                  for k in KINDS}
    duplicates.update({f"{k} seconds twice": v for k, v in twice.items()})
    duplicates["unit rollup seconds"] = max(0, records_stored - records_published)
    duplicates["10-min rollup seconds"] = max(0, rollup_seconds - records_published)
    duration = max(t_end - t_start.value, 1e-9)
    result = LoadResult(
        agents=phase.agents, collectors=collectors,
        backend="postgresql" if store_url.startswith("postgresql") else "sqlite",
        duration_s=duration, offered_msg_s=phase.rate, published=len(published),
        committed=len(got & published), lost=len(published - got),
        duplicated=sum(duplicates.values()),
        committed_by=[len(n) for n in notes_all],
        cpu_s=[b - a for a, b in zip(cpu0, cpu1, strict=True)],
        broker_cpu_s=broker_cpu, publishers_cpu_s=float(sum(pub_cpu)),
        p50_ms=float(np.percentile(lat, 50) * 1000) if lat.size else float("nan"),
        p99_ms=float(np.percentile(lat, 99) * 1000) if lat.size else float("nan"),
        drained_s=drained, records_published=records_published,
        records_stored=records_stored, published_by_kind=published_by_kind,
        stored_by_kind=stored_by_kind, duplicates=duplicates)
    if noted > len(flat):
        result.notes.append(f"{noted - len(flat)} messages handled more than once "
                            "(redelivered before their ack; stored once)")
    return result
