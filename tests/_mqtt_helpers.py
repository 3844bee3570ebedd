"""Helpers for the publish/broker tests: a real Mosquitto on loopback, an in-test committer
(collector stand-in), a TCP proxy that can go silent, and a publishing-agent script.

Run as a script (``python tests/_mqtt_helpers.py agent ...``) it is the small publishing loop
the kill test SIGKILLs at random points.
"""

from __future__ import annotations

import argparse
import contextlib
import os
import select
import signal
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import msgpack
import paho.mqtt.client as mqtt
import pytest

ROOT = Path(__file__).resolve().parents[1]
if str(ROOT) not in sys.path:
    sys.path.insert(0, str(ROOT))

from agent.broker import setup  # noqa: E402

SITE = "site-t"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def wait_for(predicate: Callable[[], bool], timeout: float, interval: float = 0.05) -> bool:
    """Poll ``predicate`` until true or ``timeout`` [s]; bounded, returns the last result."""
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(interval)
    return predicate()


def port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.2)
        return s.connect_ex(("127.0.0.1", port)) == 0


@dataclass
class Broker:
    """A Mosquitto started with ``halfcycle broker run`` in a temporary directory."""

    root: Path
    port: int
    tls: bool = False
    max_packet_size: int = setup.DEFAULT_MAX_PACKET
    proc: subprocess.Popen[bytes] | None = None
    devices: dict[str, str] = field(default_factory=dict)

    @property
    def collector_password(self) -> str:
        return setup.BrokerDir(self.root).collector_password()

    @property
    def ca_file(self) -> str:
        return str(self.root / "tls" / "ca.crt")

    def add_device(self, device: str) -> str:
        self.devices[device] = setup.add_device(self.root, device)
        return self.devices[device]

    def start(self) -> None:
        log = open(self.root / "mosquitto.log", "ab")  # noqa: SIM115 - handed to the child
        cmd = [sys.executable, "-m", "agent.cli.broker", "broker", "run", "--dir",
               str(self.root), "--port", str(self.port),
               "--max-packet-size", str(self.max_packet_size)]
        if self.tls:
            cmd.append("--tls")
        self.proc = subprocess.Popen(cmd, stdout=log, stderr=log, cwd=ROOT)
        log.close()
        if not wait_for(lambda: port_open(self.port), 15.0):
            self.stop()
            raise RuntimeError(f"mosquitto did not open port {self.port}: "
                               f"{(self.root / 'mosquitto.log').read_text()[-2000:]}")

    def stop(self, sig: int = signal.SIGTERM) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(sig)
            try:
                self.proc.wait(10)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        self.proc = None

    def kill9(self) -> None:
        self.stop(signal.SIGKILL)

    def restart(self) -> None:
        self.stop()
        self.start()


def make_broker(tmp_path: Path, *, tls: bool = False,
                max_packet_size: int = setup.DEFAULT_MAX_PACKET) -> Broker:
    root = tmp_path / "broker"
    b = Broker(root=root, port=free_port(), tls=tls, max_packet_size=max_packet_size)
    # Render first so devices can be added before the broker starts.
    setup.render(root, port=b.port, tls=tls, max_packet_size=max_packet_size)
    return b


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    """A running Mosquitto on a free loopback port, with devices dev-a and dev-b."""
    b = make_broker(tmp_path)
    b.add_device("dev-a")
    b.add_device("dev-b")
    b.start()
    try:
        yield b
    finally:
        b.stop()


def client(port: int, user: str | None, password: str | None, *, client_id: str = "",
           protocol: mqtt.MQTTProtocolVersion = mqtt.MQTTv5) -> mqtt.Client:
    c = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id, protocol=protocol)
    if user is not None:
        c.username_pw_set(user, password)
    return c


class Committer:
    """Collector stand-in: commits every message with a seq to a set and publishes the
    retained ack with the highest contiguous committed seq per (device, epoch).

    Gap notices mark their whole [first_seq, last_seq] range as accounted for (the gap
    schema's meaning: those seqs will never arrive), which lets the ack move past drops.
    """

    def __init__(self, port: int, password: str, *,
                 protocol: mqtt.MQTTProtocolVersion = mqtt.MQTTv5,
                 tls_ca: str | None = None) -> None:
        self.port = port
        self.lock = threading.Lock()
        self.committed: dict[tuple[str, str], set[int]] = {}
        self.accounted: dict[tuple[str, str], set[int]] = {}
        self.sites: dict[str, str] = {}
        self.acked: dict[tuple[str, str], int] = {}
        self.messages: list[tuple[str, dict[str, Any]]] = []
        self.duplicates = 0
        self.undecodable = 0
        self.c = client(port, "collector", password, client_id="test-committer",
                        protocol=protocol)
        if tls_ca:
            self.c.tls_set(ca_certs=tls_ca)
        self.c.on_connect = self._on_connect
        self.c.on_message = self._on_message
        self.c.reconnect_delay_set(1, 2)

    def _on_connect(self, c: mqtt.Client, userdata: Any, flags: Any, rc: Any,
                    props: Any) -> None:
        c.subscribe("hc/v1/+/+/#", qos=1)

    def _on_message(self, c: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        if msg.topic.endswith("/ack"):
            return
        try:
            body = msgpack.unpackb(msg.payload, raw=False)
        except (ValueError, msgpack.ExtraData):
            with self.lock:
                self.undecodable += 1
            return
        seq = body.get("seq") if isinstance(body, dict) else None
        if not isinstance(seq, int) or seq == 0:  # seq 0: presence, outside the sequence
            return
        key = (body["device"], body["epoch"])
        with self.lock:
            self.messages.append((msg.topic, body))
            self.sites[body["device"]] = msg.topic.split("/")[2]
            done = self.committed.setdefault(key, set())
            acc = self.accounted.setdefault(key, set())
            if seq in done:
                self.duplicates += 1
            done.add(seq)
            acc.add(seq)
            if body.get("type") == "gap":
                acc.update(range(body["first_seq"], body["last_seq"] + 1))
            top = self.acked.get(key, 0)
            while top + 1 in acc:
                top += 1
            self.acked[key] = top
        ack = {"v": 1, "type": "ack", "device": key[0], "site": self.sites[key[0]],
               "epoch": key[1], "seq": top, "collector": "test-committer", "t": time.time()}
        c.publish(f"hc/v1/{self.sites[key[0]]}/{key[0]}/ack", msgpack.packb(ack), qos=1,
                  retain=True)

    def start(self) -> Committer:
        self.c.connect("127.0.0.1", self.port, keepalive=10)
        self.c.loop_start()
        return self

    def stop(self) -> None:
        self.c.disconnect()
        self.c.loop_stop()

    def seqs(self, device: str) -> dict[str, set[int]]:
        with self.lock:
            return {e: set(s) for (d, e), s in self.committed.items() if d == device}

    def ack_of(self, device: str, epoch: str) -> int:
        with self.lock:
            return self.acked.get((device, epoch), 0)


class SilentProxy:
    """TCP proxy on loopback that can stop forwarding without closing any socket."""

    def __init__(self, upstream_port: int) -> None:
        self.upstream = upstream_port
        self.listener = socket.create_server(("127.0.0.1", 0))
        self.port = int(self.listener.getsockname()[1])
        self.frozen = threading.Event()
        self.stopping = threading.Event()
        self.pairs: list[tuple[socket.socket, socket.socket]] = []
        self.lock = threading.Lock()
        self.thread = threading.Thread(target=self._serve, daemon=True)
        self.thread.start()

    def _serve(self) -> None:
        self.listener.settimeout(0.1)
        while not self.stopping.is_set():
            try:
                down, _ = self.listener.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            up = socket.create_connection(("127.0.0.1", self.upstream))
            with self.lock:
                self.pairs.append((down, up))
            threading.Thread(target=self._pump, args=(down, up), daemon=True).start()

    def _pump(self, a: socket.socket, b: socket.socket) -> None:
        try:
            while not self.stopping.is_set():
                if self.frozen.is_set():
                    time.sleep(0.05)  # silence: read nothing, send nothing, close nothing
                    continue
                ready, _, _ = select.select([a, b], [], [], 0.1)
                for s in ready:
                    data = s.recv(65536)
                    if not data:
                        return
                    (b if s is a else a).sendall(data)
        except (OSError, ValueError):
            return
        finally:
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.close()

    def freeze(self) -> None:
        self.frozen.set()

    def thaw(self) -> None:
        """Resume forwarding; connections that went silent are closed (as a NAT would)."""
        with self.lock:
            stale, self.pairs = self.pairs, []
        for a, b in stale:
            for s in (a, b):
                with contextlib.suppress(OSError):
                    s.shutdown(socket.SHUT_RDWR)
                    s.close()
        self.frozen.clear()

    def close(self) -> None:
        self.stopping.set()
        self.listener.close()
        self.thaw()


def publisher_config(port: int, password: str, **kw: Any) -> Any:
    from agent.publish.mqtt import PublisherConfig

    base: dict[str, Any] = dict(host="127.0.0.1", port=port, password=password, tls=False,
                                keepalive_s=5, reconnect_min_s=0.1, reconnect_max_s=1.0,
                                ack_timeout_s=2.0, ack_timeout_max_s=4.0,
                                connect_timeout_s=3.0, heartbeat_s=1.0, resend_check_s=0.2)
    base.update(kw)
    return PublisherConfig(**base)


def body_factory(kind: str, pad: int = 0) -> Callable[[Any], bytes]:
    """Payload factory: a msgpack body carrying its own identity (``pad`` extra bytes)."""

    def make(mid: Any) -> bytes:
        return msgpack.packb({"v": 1, "type": kind, "device": mid.device, "site": SITE,
                              "epoch": mid.epoch, "seq": mid.seq, "t": time.time(),
                              "pad": b"x" * pad})

    return make


# ---------------------------------------------------------------- agent script (kill test)

def _agent_main(argv: list[str]) -> int:
    """Produce until ``--total`` sequence numbers exist, publish until drained, exit 0."""
    from agent.logs import configure as configure_json_logging
    from agent.publish.mqtt import Publisher
    from agent.publish.outbox import Lane, Outbox

    configure_json_logging(stream=sys.stderr)  # stdout carries "ready"/"drained" for the test

    ap = argparse.ArgumentParser()
    ap.add_argument("--db", required=True)
    ap.add_argument("--device", required=True)
    ap.add_argument("--port", type=int, required=True)
    ap.add_argument("--password-file", required=True)
    ap.add_argument("--total", type=int, required=True)
    ap.add_argument("--batch", type=int, default=4)
    args = ap.parse_args(argv)
    password = Path(args.password_file).read_text().strip()
    outbox = Outbox(args.db, args.device, SITE)
    pub = Publisher(outbox, publisher_config(args.port, password, client_id=args.device))
    topic_bulk = f"hc/v1/{SITE}/{args.device}/summary"
    topic_event = f"hc/v1/{SITE}/{args.device}/event"
    print("ready", flush=True)
    end = time.monotonic() + 120.0  # bounded even if something goes wrong
    n = 0
    while time.monotonic() < end:
        left = args.total - (outbox.stats().next_seq - 1)
        if left > 0:
            items = []
            for _ in range(min(args.batch, left)):
                n += 1
                lane = Lane.PRIORITY if n % 4 == 0 else Lane.BULK
                items.append((topic_event if lane == Lane.PRIORITY else topic_bulk,
                              body_factory("event" if lane == Lane.PRIORITY else "summary"),
                              lane))
            outbox.put_many(items)
        pub.step(timeout=0.01)
        if left <= 0 and outbox.pending_count() == 0:
            pub.close()
            print("drained", flush=True)
            return 0
    return 3


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "agent":
        os.chdir(ROOT)
        sys.exit(_agent_main(sys.argv[2:]))
    print("usage: _mqtt_helpers.py agent --db ... --device ... --port ... "
          "--password-file ... --total N", file=sys.stderr)
    sys.exit(2)
