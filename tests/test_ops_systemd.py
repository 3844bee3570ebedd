"""systemd notification over a real AF_UNIX datagram socket (sd_notify(3) protocol): READY
once the collector is subscribed with its store open, WATCHDOG pings from the writer loop
that stop when the writer hangs; the edge agent likewise."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import threading
import time
import uuid
from collections.abc import Iterator
from pathlib import Path

import pytest
from _fleet_helpers import CollectorThread, make_fleet
from _mqtt_helpers import Broker, make_broker, wait_for
from test_ops_collector import publish_gaps, write_config

from agent.ops.systemd import Notifier, watchdog_interval

ROOT = Path(__file__).resolve().parents[1]


class NotifySocket:
    """What systemd listens on: collects every datagram with its arrival time."""

    def __init__(self, path: Path) -> None:
        self.path = path
        self.sock = socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM)
        self.sock.bind(str(path))
        self.sock.settimeout(0.1)
        self.messages: list[tuple[float, str]] = []
        self.lock = threading.Lock()
        self.stopping = threading.Event()
        self.thread = threading.Thread(target=self._recv, daemon=True)
        self.thread.start()

    def _recv(self) -> None:
        while not self.stopping.is_set():
            try:
                data = self.sock.recv(4096)
            except TimeoutError:
                continue
            except OSError:
                return
            with self.lock:
                self.messages.append((time.monotonic(), data.decode()))

    def has(self, line: str) -> bool:
        with self.lock:
            return any(line in m.splitlines() for _, m in self.messages)

    def count(self, line: str, since: float = 0.0) -> int:
        with self.lock:
            return sum(line in m.splitlines() for t, m in self.messages if t >= since)

    def close(self) -> None:
        self.stopping.set()
        self.sock.close()
        self.thread.join(2)


@pytest.fixture
def notify_socket(tmp_path: Path) -> Iterator[NotifySocket]:
    # AF_UNIX paths are limited to 108 bytes: keep it short.
    path = Path("/tmp") / f"hc-notify-{uuid.uuid4().hex[:8]}"
    s = NotifySocket(path)
    try:
        yield s
    finally:
        s.close()
        path.unlink(missing_ok=True)


def test_notifier_sends_datagrams_and_rate_limits_pings(notify_socket: NotifySocket) -> None:
    clock = [100.0]
    n = Notifier({"NOTIFY_SOCKET": str(notify_socket.path), "WATCHDOG_USEC": "2000000"},
                 monotonic=lambda: clock[0])
    assert n.enabled and n.watchdog_s == 2.0
    assert n.ready("collecting")
    assert n.watchdog() and not n.watchdog()  # at most one ping per half interval
    clock[0] += 1.0
    assert n.watchdog()
    assert wait_for(lambda: notify_socket.count("WATCHDOG=1") == 2, 5)
    assert notify_socket.has("READY=1") and notify_socket.has("STATUS=collecting")


def test_notifier_is_a_no_op_outside_systemd() -> None:
    n = Notifier({})
    assert not n.enabled and not n.ready("x") and not n.watchdog()
    # WATCHDOG_PID names another process: the watchdog is not ours (sd_watchdog_enabled(3)).
    assert watchdog_interval({"WATCHDOG_USEC": "1000000", "WATCHDOG_PID": "1"}) is None
    assert watchdog_interval({"WATCHDOG_USEC": "1000000", "WATCHDOG_PID": str(os.getpid())}) \
        == 1.0


def test_abstract_socket_address() -> None:
    name = f"hc-abstract-{uuid.uuid4().hex[:8]}"
    with socket.socket(socket.AF_UNIX, socket.SOCK_DGRAM) as server:
        server.bind("\0" + name)
        server.settimeout(5)
        assert Notifier({"NOTIFY_SOCKET": "@" + name}).notify(STATUS="hello")
        assert server.recv(100) == b"STATUS=hello"


@pytest.fixture
def broker(tmp_path: Path) -> Iterator[Broker]:
    b = make_broker(tmp_path)
    b.add_device("unit-1")
    b.start()
    try:
        yield b
    finally:
        b.stop()


def test_collector_ready_then_watchdog_pings_stop_when_the_writer_hangs(
        broker: Broker, tmp_path: Path, notify_socket: NotifySocket,
        monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("NOTIFY_SOCKET", str(notify_socket.path))
    monkeypatch.setenv("WATCHDOG_USEC", "400000")  # ping at most every 0.2 s
    monkeypatch.delenv("WATCHDOG_PID", raising=False)
    col = CollectorThread(write_config(tmp_path, broker.port, broker.collector_password))
    release = threading.Event()
    real = col.collector.process_batch

    def hanging(store, batch):  # type: ignore[no-untyped-def]
        release.wait(60)
        return real(store, batch)

    with col:
        assert wait_for(lambda: notify_socket.has("READY=1"), 10)
        t0 = time.monotonic()
        assert wait_for(lambda: notify_socket.count("WATCHDOG=1", t0) >= 3, 10)
        # The writer hangs inside a commit: the pings stop, so systemd would restart it.
        col.collector.process_batch = hanging  # type: ignore[method-assign]
        publish_gaps(broker, "unit-1", range(1, 2))
        time.sleep(1.0)  # let a ping already under way arrive
        hung_at = time.monotonic()
        time.sleep(1.5)  # > 3 watchdog half-intervals
        assert notify_socket.count("WATCHDOG=1", hung_at) == 0
        release.set()
        resumed = time.monotonic()
        assert wait_for(lambda: notify_socket.count("WATCHDOG=1", resumed) >= 2, 10)
    assert notify_socket.has("STOPPING=1")


def test_edge_agent_ready_and_pings_while_the_broker_is_down(
        tmp_path: Path, notify_socket: NotifySocket) -> None:
    fleet = make_fleet(tmp_path, 1, duration=20.0)
    fleet.broker.stop()  # the agent keeps measuring into its outbox
    env = {**os.environ, "PYTHONPATH": str(ROOT), "NOTIFY_SOCKET": str(notify_socket.path),
           "WATCHDOG_USEC": "1000000"}
    proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", "edge", "run", "--config",
                             str(fleet.edge_configs["home-1"]), "--drain-timeout", "0"],
                            cwd=tmp_path, env=env, stderr=subprocess.DEVNULL)
    try:
        assert wait_for(lambda: notify_socket.has("READY=1"), 20)
        t0 = time.monotonic()
        assert wait_for(lambda: notify_socket.count("WATCHDOG=1", t0) >= 2, 10)
    finally:
        proc.terminate()
        proc.wait(30)
    assert notify_socket.has("STOPPING=1")
