# ruff: noqa: F811  (pytest fixtures imported from _mqtt_helpers shadow their name)
"""The publisher against a real Mosquitto on loopback: delivery until the collector's ack,
broker SIGKILL, silent network, size bound, refused messages, TLS, MQTT 3.1.1."""

from __future__ import annotations

import shutil
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

import msgpack
import paho.mqtt.client as mqtt
import pytest
from _mqtt_helpers import (  # noqa: F401
    SITE,
    Broker,
    Committer,
    SilentProxy,
    body_factory,
    broker,
    make_broker,
    publisher_config,
    wait_for,
)

from agent.publish.mqtt import Publisher
from agent.publish.outbox import Lane, Outbox, OutboxLimits
from agent.wire import codec

DEV = "dev-a"
BULK = f"hc/v1/{SITE}/{DEV}/summary"
EVENT = f"hc/v1/{SITE}/{DEV}/event"


@contextmanager
def running(pub: Publisher) -> Iterator[threading.Event]:
    stop = threading.Event()
    t = threading.Thread(target=pub.run, args=(stop,), kwargs={"max_seconds": 120.0},
                         daemon=True)
    t.start()
    try:
        yield stop
    finally:
        stop.set()
        t.join(15)


def _produce(outbox: Outbox, n: int, *, every_s: float = 0.0) -> list[int]:
    seqs = []
    for i in range(n):
        lane = Lane.PRIORITY if i % 5 == 0 else Lane.BULK
        seqs.append(outbox.put(EVENT if lane == Lane.PRIORITY else BULK,
                               body_factory("event" if lane == Lane.PRIORITY else "summary"),
                               lane).seq)
        if every_s:
            time.sleep(every_s)
    return seqs


def _contiguous_and_drained(committer: Committer, outbox: Outbox, n: int) -> bool:
    return (committer.ack_of(DEV, outbox.epoch) >= n and outbox.pending_count() == 0)


def test_delivers_until_acknowledged(broker: Broker, tmp_path: Path) -> None:
    committer = Committer(broker.port, broker.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV]))
    try:
        _produce(outbox, 200)
        with running(pub):
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, 200), 30)
    finally:
        committer.stop()
    assert committer.seqs(DEV) == {outbox.epoch: set(range(1, 201))}
    assert pub.stats.connects >= 1 and pub.stats.rows_acknowledged == 200
    assert outbox.last_run() is not None  # heartbeat written


def test_presence_online_retained_and_will(broker: Broker, tmp_path: Path) -> None:
    got: dict[str, dict[str, object]] = {}
    col = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
    col.username_pw_set("collector", broker.collector_password)
    col.on_message = lambda c, u, m: got.__setitem__(m.topic, codec.decode(bytes(m.payload)))
    col.connect("127.0.0.1", broker.port)
    col.subscribe(f"hc/v1/{SITE}/{DEV}/status", qos=1)
    col.loop_start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV]))
    topic = f"hc/v1/{SITE}/{DEV}/status"
    try:
        with running(pub):
            # validated against schemas/status.schema.json by codec.decode
            assert wait_for(lambda: got.get(topic, {}).get("state") == "online", 10)
        assert wait_for(lambda: got.get(topic, {}).get("state") == "offline", 10)
        assert got[topic]["seq"] == 0  # presence is outside the outbox sequence
    finally:
        col.disconnect()
        col.loop_stop()


@pytest.mark.parametrize("kills", [1, pytest.param(5, marks=pytest.mark.slow)])
def test_broker_sigkill_and_restart_loses_nothing(tmp_path: Path, kills: int) -> None:
    b = make_broker(tmp_path)
    b.add_device(DEV)
    b.start()
    committer = Committer(b.port, b.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(b.port, b.devices[DEV]))
    total = 300 * kills
    producer = threading.Thread(target=_produce, args=(outbox, total), kwargs={"every_s": 0.004})
    try:
        with running(pub):
            producer.start()
            for k in range(kills):
                # kill once the collector has committed part of this round's share
                share = 100 * (k + 1)
                wait_for(lambda s=share: committer.ack_of(DEV, outbox.epoch) >= s, 30)  # type: ignore[misc]
                b.kill9()
                time.sleep(0.3)
                b.start()
            producer.join(60)
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, total), 60), (
                committer.ack_of(DEV, outbox.epoch), outbox.stats())
    finally:
        committer.stop()
        b.stop()
    seqs = committer.seqs(DEV)[outbox.epoch]
    assert seqs == set(range(1, total + 1))  # every seq committed, contiguous, none missing
    assert pub.stats.connects >= 2  # it did reconnect (two kills may share one outage)
    assert outbox.integrity_check() == "ok"


@pytest.mark.parametrize("keepalive_s", [2])
def test_silent_network_detected_within_keepalive(broker: Broker, tmp_path: Path,
                                                  keepalive_s: int) -> None:
    proxy = SilentProxy(broker.port)
    committer = Committer(broker.port, broker.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(proxy.port, broker.devices[DEV],
                                             keepalive_s=keepalive_s, connect_timeout_s=2.0))
    try:
        with running(pub):
            _produce(outbox, 50)
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, 50), 20)
            disconnects = pub.stats.disconnects
            proxy.freeze()
            frozen_at = time.monotonic()
            _produce(outbox, 50)  # written while the network is silent
            # paho: PINGREQ after keepalive without traffic, disconnect after another
            # keepalive without PINGRESP (MQTT 5.0 cl. 3.1.2.10 lets the server wait 1.5x)
            assert wait_for(lambda: pub.stats.disconnects > disconnects,
                            2 * keepalive_s + 3.0)
            detected_after = time.monotonic() - frozen_at
            assert not pub.connected
            proxy.thaw()
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, 100), 30)
    finally:
        committer.stop()
        proxy.close()
    assert committer.seqs(DEV)[outbox.epoch] == set(range(1, 101))
    print(f"silent network detected after {detected_after:.1f} s (keepalive {keepalive_s} s)")


def test_outbox_bound_drops_bulk_first_and_publishes_gap_notices(broker: Broker,
                                                                 tmp_path: Path) -> None:
    # The collector is down while the device produces more than its outbox holds.
    outbox = Outbox(tmp_path / "o.db", DEV, SITE,
                    limits=OutboxLimits(max_rows=60, max_bytes=10**7, low_water=0.7))
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV]))
    kinds: dict[int, Lane] = {}
    with running(pub):
        for i in range(200):
            lane = Lane.PRIORITY if i % 10 == 0 else Lane.BULK
            kinds[outbox.put(EVENT if lane == Lane.PRIORITY else BULK, body_factory("x"),
                             lane).seq] = lane
        assert outbox.stats().dropped_rows > 0
        committer = Committer(broker.port, broker.collector_password).start()
        try:
            issued = outbox.stats().next_seq - 1
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, issued), 30)
        finally:
            committer.stop()
    with committer.lock:
        received = {body["seq"]: body for _, body in committer.messages}
    gaps = [b for b in received.values() if b["type"] == "gap"]
    assert gaps and all(g["reason"] == "outbox_full" for g in gaps)
    events = {s for s, lane in kinds.items() if lane == Lane.PRIORITY}
    assert events <= set(received)  # every event delivered
    dropped_bulk = set(kinds) - set(received)
    assert dropped_bulk and all(kinds[s] == Lane.BULK for s in dropped_bulk)
    covered = {s for g in gaps for s in range(g["first_seq"], g["last_seq"] + 1)}
    assert dropped_bulk <= covered  # "dropped at the edge", not "lost"


def test_oversized_message_quarantined_with_reason(tmp_path: Path) -> None:
    b = make_broker(tmp_path, max_packet_size=4096)
    b.add_device(DEV)
    b.start()
    committer = Committer(b.port, b.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    # the client's own limit is larger: the 4096 must come from the broker's CONNACK
    pub = Publisher(outbox, publisher_config(b.port, b.devices[DEV],
                                             max_packet_bytes=1 << 20))
    try:
        outbox.put(BULK, body_factory("summary"))
        big = outbox.put(BULK, body_factory("summary", pad=10_000)).seq
        outbox.put(BULK, body_factory("summary"))
        with running(pub):
            assert wait_for(lambda: outbox.pending_count() == 0, 20), outbox.stats()
    finally:
        committer.stop()
        b.stop()
    [(seq, _topic, reason)] = outbox.quarantined()
    assert seq == big and "4096" in reason and "too large" in reason
    got = {body["seq"]: body for _, body in committer.messages}
    assert got[4]["type"] == "gap" and got[4]["reason"] == "oversized"
    assert (got[4]["first_seq"], got[4]["last_seq"]) == (big, big)
    assert {1, 3} <= set(got)  # the neighbours were delivered


def test_acl_refused_message_quarantined_mqtt5(broker: Broker, tmp_path: Path) -> None:
    committer = Committer(broker.port, broker.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV]))
    try:
        outbox.put(BULK, body_factory("summary"))
        outbox.put(f"hc/v1/{SITE}/dev-b/summary", body_factory("summary"))  # not ours
        outbox.put(BULK, body_factory("summary"))
        with running(pub):
            assert wait_for(lambda: outbox.pending_count() == 0, 20), outbox.stats()
    finally:
        committer.stop()
    [(seq, _topic, reason)] = outbox.quarantined()
    # MQTT 5.0 cl. 3.4.2.1: 0x87 Not authorized
    assert seq == 2 and "0x87" in reason
    assert committer.ack_of(DEV, outbox.epoch) == 4  # gap notice let the ack move past


def test_mqtt311_acl_denied_bounded_by_max_attempts(broker: Broker, tmp_path: Path) -> None:
    # MQTT 3.1.1 has no PUBACK reason codes: the denied message looks delivered; only the
    # missing collector ack shows it, and max_attempts bounds the resends.
    committer = Committer(broker.port, broker.collector_password).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV],
                                             protocol="3.1.1", max_attempts=3,
                                             ack_timeout_s=0.3, ack_timeout_max_s=0.6))
    try:
        outbox.put(BULK, body_factory("summary"))
        outbox.put(f"hc/v1/{SITE}/dev-b/summary", body_factory("summary"))
        with running(pub):
            assert wait_for(lambda: outbox.pending_count() == 0, 30), outbox.stats()
    finally:
        committer.stop()
    [(seq, _topic, reason)] = outbox.quarantined()
    assert seq == 2 and "after 3 attempts" in reason
    assert committer.ack_of(DEV, outbox.epoch) == 3


def test_tls_listener(tmp_path: Path) -> None:
    if shutil.which("openssl") is None:
        pytest.skip("openssl command not available")
    b = make_broker(tmp_path, tls=True)
    b.add_device(DEV)
    b.start()
    committer = Committer(b.port, b.collector_password, tls_ca=b.ca_file).start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(b.port, b.devices[DEV], tls=True,
                                             ca_file=b.ca_file))
    try:
        _produce(outbox, 20)
        with running(pub):
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, 20), 30)
    finally:
        committer.stop()
        b.stop()
    assert committer.seqs(DEV)[outbox.epoch] == set(range(1, 21))


def test_collector_death_with_messages_in_session_is_resent(broker: Broker,
                                                            tmp_path: Path) -> None:
    # A collector that takes messages (PUBACKed by the broker) and dies before committing:
    # the publisher resends after its ack timeout, and a new collector commits them all.
    swallowed: list[int] = []
    eater = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, protocol=mqtt.MQTTv5)
    eater.username_pw_set("collector", broker.collector_password)
    eater.on_message = lambda c, u, m: swallowed.append(msgpack.unpackb(m.payload)["seq"])
    eater.connect("127.0.0.1", broker.port)
    eater.subscribe("hc/v1/+/+/summary", qos=1)
    eater.loop_start()
    outbox = Outbox(tmp_path / "o.db", DEV, SITE)
    pub = Publisher(outbox, publisher_config(broker.port, broker.devices[DEV],
                                             ack_timeout_s=1.0, ack_timeout_max_s=2.0))
    with running(pub):
        for _ in range(20):
            outbox.put(BULK, body_factory("summary"))
        assert wait_for(lambda: len(swallowed) >= 20, 15)
        eater.disconnect()
        eater.loop_stop()
        assert outbox.pending_count() == 20  # delivered to a collector, but not committed
        committer = Committer(broker.port, broker.collector_password).start()
        try:
            assert wait_for(lambda: _contiguous_and_drained(committer, outbox, 20), 30)
        finally:
            committer.stop()
    assert committer.seqs(DEV)[outbox.epoch] == set(range(1, 21))
