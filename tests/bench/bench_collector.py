"""Collector throughput benchmark (on demand, not part of the test suite).

    python tests/bench/bench_collector.py [--messages 20000] [--devices 20] [--records 10]
                                          [--alerts]

One real Mosquitto (the project's broker-config, loopback). A publisher process sends the
same pre-encoded stream twice: batched summaries (``--records`` per-second records each) with
an event every 50 messages, from ``--devices`` devices, QoS 1.

1. Baseline: a bare paho subscriber that only counts what arrives (and PUBACKs).
2. The collector: decode, validate, store (SQLite, WAL), publish retained acks, PUBACK.

Both are timed from the first publish to the last message handled, in the same run on the
same broker, so the ratio is meaningful on a noisy shared machine. ``--alerts`` adds two more
collector phases on a stream with a status heartbeat (instead of a gap notice) every 50
messages, without and with every alert rule kind configured (MQTT channel), and reports the
cost of judging alerts in the commit as their ratio. Latency is publish-to-
commit per message (p50, p99).
"""

from __future__ import annotations

import argparse
import multiprocessing as mp
import sys
import tempfile
import threading
import time
from pathlib import Path

import msgpack
import numpy as np
import paho.mqtt.client as mqtt

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _mqtt_helpers import make_broker

from agent.collect.service import Collector, CollectorSettings, Received
from agent.publish.mqtt import PublisherConfig
from agent.store.recorder import RecorderStore
from agent.wire import codec
from agent.wire.records import SummaryBatcher

SITE = "bench-street"


def make_stream(
    devices: list[str], n: int, records: int, epoch: str, every50: str = "gap"
) -> list[tuple[str, bytes, int]]:
    """(topic, payload, device index) in publish order; invented values."""
    rng = np.random.default_rng(1)
    out: list[tuple[str, bytes, int]] = []
    seqs = dict.fromkeys(devices, 0)
    t0 = time.time() - n * records
    for i in range(n):
        d = devices[i % len(devices)]
        seqs[d] += 1
        ident = codec.Identity(SITE, d, epoch)
        if i % 50 == 49 and every50 == "status":
            body = codec.status_body("heartbeat", agent_version="bench", uptime_s=60.0,
                                     outbox_depth=0, sync="synced", time_error_s=0.01)
            kind = "status"
        elif i % 50 == 49:
            body = codec.gap_body("bulk", 1, 1, 1, "bench", t=time.time())
            kind = "gap"
        else:
            batcher = SummaryBatcher(["L1", "L2"], k=records)
            t = t0 + (i // len(devices)) * records + np.arange(records)
            v = 230 + rng.normal(0, 0.5, (records, 2))
            bodies = batcher.add_many(t, v - 1, v, v + 1, 50 + rng.normal(0, 0.01, records),
                                      np.full((records, 2), 0.02), np.full(records, 0.001),
                                      np.zeros(records))
            body = bodies[0] if bodies else batcher.flush()
            kind = "summary"
        out.append((f"hc/v1/{SITE}/{d}/{kind}", codec.encode(ident.stamp(body, seqs[d])), 0))
    return out


def publisher(port: int, passwords: dict[str, str], stream: list[tuple[str, bytes, int]],
              start: mp.Event, sent_times: mp.Array, rate: float = 0.0) -> None:
    clients = {}
    for d, pw in passwords.items():
        c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=f"pub-{d}",
                        protocol=mqtt.MQTTv5)
        c.username_pw_set(d, pw)
        c.max_inflight_messages_set(100)
        c.connect("127.0.0.1", port)
        c.loop_start()
        clients[d] = c
    start.wait()
    t_start = time.time()
    for i, (topic, payload, _) in enumerate(stream):
        d = topic.split("/")[3]
        if rate > 0:  # paced: message i leaves at t_start + i / rate
            delay = t_start + i / rate - time.time()
            if delay > 0:
                time.sleep(delay)
        sent_times[i] = time.time()
        info = clients[d].publish(topic, payload, qos=1)
        while info.rc == mqtt.MQTT_ERR_QUEUE_SIZE:
            time.sleep(0.001)
            info = clients[d].publish(topic, payload, qos=1)
    time.sleep(1.0)
    for c in clients.values():
        c.loop_stop()
        c.disconnect()


def run_phase(name: str, port: int, passwords: dict[str, str], stream, consumer_ready,
              done_count, rate: float = 0.0) -> tuple[float, np.ndarray]:
    start = mp.Event()
    sent = mp.Array("d", len(stream), lock=False)
    proc = mp.Process(target=publisher, args=(port, passwords, stream, start, sent, rate))
    proc.start()
    consumer_ready()
    time.sleep(1.0)
    t0 = time.time()
    start.set()
    deadline = t0 + 300
    while done_count() < len(stream) and time.time() < deadline:
        time.sleep(0.01)
    elapsed = time.time() - t0
    proc.join(30)
    got = done_count()
    if got < len(stream):
        print(f"{name}: only {got} of {len(stream)} messages within the time limit")
    return elapsed, np.frombuffer(sent, dtype=np.float64).copy()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--messages", type=int, default=20000)
    ap.add_argument("--devices", type=int, default=20)
    ap.add_argument("--records", type=int, default=10)
    ap.add_argument("--alerts", action="store_true",
                    help="also measure the collector with alert rules against without")
    ap.add_argument("--latency-rate", type=float, default=2000.0,
                    help="paced publish rate [msg/s] of the latency phase")
    args = ap.parse_args()
    root = Path(tempfile.mkdtemp(prefix="hc-bench-"))
    broker = make_broker(root)
    devices = [f"meter-{i:03d}" for i in range(args.devices)]
    passwords = {d: broker.add_device(d) for d in devices}
    broker.start()
    try:
        # --- baseline: a bare paho subscriber on the same stream and broker
        stream = make_stream(devices, args.messages, args.records, "benchbare")
        count = [0]
        bare = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id="bare",
                           protocol=mqtt.MQTTv5)
        bare.username_pw_set("collector", broker.collector_password)
        ready = threading.Event()
        bare.on_connect = lambda c, *a: (c.subscribe(f"hc/v1/{SITE}/+/+", qos=1), ready.set())

        def on_msg(_c, _u, _m) -> None:
            count[0] += 1

        bare.on_message = on_msg
        bare.connect("127.0.0.1", broker.port)
        bare.loop_start()
        bare_s, _ = run_phase("bare", broker.port, passwords, stream, lambda: ready.wait(10),
                              lambda: count[0])
        bare.loop_stop()
        bare.disconnect()

        # --- the collector
        stream = make_stream(devices, args.messages, args.records, "benchcol")
        settings = CollectorSettings(
            path=None, collector_id="bench", group="bench", store_url=f"sqlite:///{root / 'r.db'}",
            captures_dir=root / "captures", keep_trend=True, trend_retention_days=None,
            mqtt=PublisherConfig(host="127.0.0.1", port=broker.port, tls=False,
                                 username="collector", password=broker.collector_password),
        )
        committed_at: dict[tuple[str, int], float] = {}
        collector = Collector(settings)
        original = collector.process_batch
        timing = [False]

        def timed(store: RecorderStore, batch: list[Received]):
            upto = original(store, batch)
            if timing[0]:  # latency phase only: who was committed when
                now = time.time()
                for rec in batch:
                    m = msgpack.unpackb(rec.payload, raw=False)
                    committed_at[(m["device"], m["seq"])] = now
            return upto

        collector.process_batch = timed  # type: ignore[method-assign]
        stop, cready = threading.Event(), threading.Event()
        th = threading.Thread(target=collector.run, args=(stop,), kwargs={"ready": cready})
        th.start()
        col_s, _ = run_phase("collector", broker.port, passwords, stream,
                             lambda: cready.wait(20), lambda: collector.stats.committed)
        # --- latency at a paced load: the same kind of stream at --latency-rate msg/s
        lat_stream = make_stream(devices, args.messages, args.records, "benchlat")
        timing[0] = True
        base = collector.stats.committed
        _, sent = run_phase("latency", broker.port, passwords, lat_stream, lambda: True,
                            lambda: collector.stats.committed - base, rate=args.latency_rate)
        stop.set()
        th.join(60)
        order: dict[tuple[str, int], int] = {}
        per_device: dict[str, int] = {}
        for i, (topic, _p, _) in enumerate(lat_stream):
            d = topic.split("/")[3]
            per_device[d] = per_device.get(d, 0) + 1
            order[(d, per_device[d])] = i
        lat = np.array([committed_at[k] - sent[i] for k, i in order.items() if k in committed_at])
    finally:
        broker.stop()

    n, r = args.messages, args.records
    summaries = n - n // 50
    print(f"stream: {n} messages from {args.devices} devices ({summaries} summaries x {r} "
          f"records, {n // 50} gap notices), QoS 1")
    print(f"bare paho subscriber : {n / bare_s:9.0f} msg/s  ({bare_s:.2f} s)")
    print(f"collector            : {n / col_s:9.0f} msg/s  ({col_s:.2f} s), "
          f"{summaries * r / col_s:,.0f} per-second records/s")
    print(f"collector / bare     : {bare_s / col_s:.2f}")
    print(f"publish-to-commit latency at {args.latency_rate:.0f} msg/s paced: "
          f"p50 {np.percentile(lat, 50) * 1000:.1f} ms, p99 {np.percentile(lat, 99) * 1000:.1f} ms "
          f"({lat.size} messages)")
    print(f"dead letters {collector.stats.dead_letters}, batches {collector.stats.batches}")
    if args.alerts:
        alerts_phases(args, devices)


def alerts_phases(args: argparse.Namespace, devices: list[str]) -> None:
    """Collector throughput without and with alert rules, on one broker, in this run."""
    from agent.alerts.config import AlertSettings
    from agent.alerts.rules import AlertRule

    root = Path(tempfile.mkdtemp(prefix="hc-bench-alerts-"))
    broker = make_broker(root)
    passwords = {d: broker.add_device(d) for d in devices}
    broker.start()
    rules = tuple(AlertRule(k, k) for k in ("lost_power", "supply_out", "offline",
                                            "out_of_range", "event", "fleet_event"))
    took = {}
    judge_s = 0.0
    try:
        for label, alerts in (("plain", None), ("alerts", AlertSettings(rules=rules))):
            settings = CollectorSettings(
                path=None, collector_id=f"bench-{label}", group=f"bench{label}",
                store_url=f"sqlite:///{root / (label + '.db')}", captures_dir=root / "caps",
                keep_trend=True, trend_retention_days=None,
                mqtt=PublisherConfig(host="127.0.0.1", port=broker.port, tls=False,
                                     username="collector", password=broker.collector_password),
                alerts=alerts)
            collector = Collector(settings)
            stop, ready = threading.Event(), threading.Event()
            th = threading.Thread(target=collector.run, args=(stop,), kwargs={"ready": ready})
            th.start()
            stream = make_stream(devices, args.messages, args.records, f"bench{label}",
                                 every50="status")
            took[label], _ = run_phase(label, broker.port, passwords, stream,
                                       lambda r=ready: r.wait(20),
                                       lambda c=collector: c.stats.committed)
            stop.set()
            th.join(60)
            if collector.alerts is not None:
                judge_s = collector.alerts.engine.stats.judge_s
    finally:
        broker.stop()
    n = args.messages
    print(f"judging alerts took {judge_s:.2f} s of the {took['alerts']:.2f} s phase "
          f"({100 * judge_s / took['alerts']:.1f} %)")
    print(f"collector, heartbeat stream: {n / took['plain']:9.0f} msg/s without alerts, "
          f"{n / took['alerts']:9.0f} msg/s with 6 alert rules")
    print(f"with alerts / without    : {took['plain'] / took['alerts']:.2f}")


if __name__ == "__main__":
    main()
