"""Capture chunks through a real MQTT 5 broker that enforces a maximum packet size.

Mosquitto (started here on a free 127.0.0.1 port with its own config) disconnects a client
that sends a packet larger than ``max_packet_size`` (mosquitto.conf(5)); every chunk must
pass and the reassembled capture must be bit-exact.
"""

from __future__ import annotations

import shutil
import socket
import subprocess
import threading
import time
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import paho.mqtt.client as mqtt
import pytest
from _wire_helpers import IDENT, sample_capture
from paho.mqtt.enums import CallbackAPIVersion
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.wire.codec import CaptureAssembler, capture_bodies, decode, encode
from agent.wire.topics import topic

MAX_PACKET = 2048
pytestmark = pytest.mark.skipif(shutil.which("mosquitto") is None, reason="needs mosquitto")


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@pytest.fixture()
def broker(tmp_path: Path) -> Iterator[int]:
    port = _free_port()
    conf = tmp_path / "mosquitto.conf"
    conf.write_text(f"listener {port} 127.0.0.1\nallow_anonymous true\npersistence false\n"
                    f"max_packet_size {MAX_PACKET}\nlog_dest stderr\n")
    proc = subprocess.Popen(["mosquitto", "-c", str(conf)], stdout=subprocess.DEVNULL,
                            stderr=subprocess.PIPE)
    try:
        for _ in range(100):  # bounded: at most 5 s
            try:
                socket.create_connection(("127.0.0.1", port), timeout=0.2).close()
                break
            except OSError:
                time.sleep(0.05)
        else:
            pytest.fail("mosquitto did not start")
        yield port
    finally:
        proc.terminate()
        proc.wait(timeout=5)


def _client(port: int, name: str) -> mqtt.Client:
    c = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=name, protocol=mqtt.MQTTv5)
    c.connect("127.0.0.1", port, keepalive=30)
    c.loop_start()
    return c


def _wait(cond: Any, seconds: float = 10.0) -> bool:
    end = time.monotonic() + seconds
    while time.monotonic() < end:  # bounded wait
        if cond():
            return True
        time.sleep(0.02)
    return bool(cond())


def test_chunks_pass_a_broker_max_packet_size_and_reassemble(broker: int) -> None:
    cap_topic = topic(IDENT.site, IDENT.device, "capture")
    cap = sample_capture()
    payloads = [encode(IDENT.stamp(b, seq=i)) for i, b in
                enumerate(capture_bodies(cap, topic=cap_topic, max_packet=MAX_PACKET))]
    assert len(payloads) >= 9  # 18 kB in 2 kB packets: several times the maximum
    got: list[bytes] = []
    subscribed = threading.Event()
    sub = _client(broker, "sub")
    sub.on_message = lambda c, u, m: got.append(bytes(m.payload))
    sub.on_subscribe = lambda *a: subscribed.set()
    sub.subscribe("hc/v1/+/+/capture", qos=1)
    assert subscribed.wait(5)
    pub = _client(broker, "pub")
    disconnected = threading.Event()
    pub.on_disconnect = lambda *a: disconnected.set()
    props = Properties(PacketTypes.PUBLISH)
    props.MessageExpiryInterval = 86400  # 5 property bytes, inside the 64-byte margin
    infos = [pub.publish(cap_topic, p, qos=1, properties=props) for p in reversed(payloads)]
    assert _wait(lambda: all(i.is_published() for i in infos))
    assert _wait(lambda: len(got) == len(payloads))
    assert not disconnected.is_set()
    asm = CaptureAssembler()
    done = [c for c in (asm.add(decode(p)) for p in got) if c is not None]
    assert len(done) == 1
    np.testing.assert_array_equal(done[0].counts, cap.counts)

    # Control: a packet just over the limit does not get through (the check has teeth).
    before = len(got)
    pub.publish(cap_topic, payloads[0] + b"\x00" * MAX_PACKET, qos=1)
    _wait(disconnected.is_set, 3)
    time.sleep(0.2)
    assert len(got) == before
    pub.loop_stop()
    sub.disconnect()
    sub.loop_stop()
