"""Prometheus metrics of the collector, served as text on a loopback port (prometheus-client).

Each :class:`CollectorMetrics` has its own registry (several collectors may run in one
process, as in the tests and the demo). The writer thread updates counters as it commits;
values only a database query can give (export backlog) are refreshed by the writer at its
stats tick, never from the HTTP thread (a store connection belongs to one thread).

Names follow the Prometheus naming practice (``_total`` counters, base units in the name:
seconds, bytes); all start with ``halfcycle_collector_``.
"""

from __future__ import annotations

import ipaddress
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass
from typing import Any

from prometheus_client import CollectorRegistry, Counter, Gauge, Histogram, start_http_server
from prometheus_client.core import GaugeMetricFamily
from prometheus_client.registry import Collector as _PromCollector

from agent.config import Section

PREFIX = "halfcycle_collector_"
# Commit latency buckets [s]: a batch commit on SQLite with synchronous=FULL takes a few
# milliseconds on a disk that honours fsync; seconds mean a struggling store.
COMMIT_BUCKETS = (0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0)
BATCH_BUCKETS = (1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000, 10000)


@dataclass(frozen=True)
class MetricsSettings:
    host: str
    port: int

    @classmethod
    def from_section(cls, sec: Section) -> MetricsSettings | None:
        """``[metrics] bind = "127.0.0.1:9464"``; None when the table is absent."""
        if not sec.data:
            return None
        sec.reject_unknown({"bind"})
        bind = sec.get("bind", str, required=True)
        host, sep, port_text = bind.rpartition(":")
        host = host.strip("[]")
        if not sep or not host or not port_text.isdigit() or not 0 <= int(port_text) <= 65535:
            raise sec.error("bind", f"expected HOST:PORT such as 127.0.0.1:9464, got {bind!r}")
        try:
            ipaddress.ip_address(host)
        except ValueError:
            raise sec.error("bind", f"{host!r} is not an IP address (use 127.0.0.1 or ::1 "
                            "and let a reverse proxy or SSH tunnel reach it)") from None
        return cls(host, int(port_text))

    @property
    def loopback(self) -> bool:
        return ipaddress.ip_address(self.host).is_loopback


class _LastSeen(_PromCollector):
    """``halfcycle_collector_unit_last_seen_age_seconds{site,device}``, computed at scrape
    time from the newest receive time per unit this collector has seen."""

    def __init__(self, clock: Callable[[], float]) -> None:
        self._clock = clock
        self._lock = threading.Lock()
        self._seen: dict[tuple[str, str], float] = {}

    def touch(self, site: str, device: str, at: float) -> None:
        with self._lock:
            if at > self._seen.get((site, device), 0.0):
                self._seen[(site, device)] = at

    def collect(self) -> Iterator[Any]:
        family = GaugeMetricFamily(
            PREFIX + "unit_last_seen_age_seconds",
            "Seconds since this collector last received a message from the unit",
            labels=["site", "device"])
        now = self._clock()
        with self._lock:
            seen = dict(self._seen)
        for (site, device), at in sorted(seen.items()):
            family.add_metric([site, device], max(0.0, now - at))
        yield family


class CollectorMetrics:
    """The collector's metrics (see the module docstring for who updates what)."""

    def __init__(self, clock: Callable[[], float] = time.time) -> None:
        r = self.registry = CollectorRegistry()
        p = PREFIX
        self.received = Counter(p + "messages_received", "MQTT messages taken from the broker",
                                registry=r)
        self.committed = Counter(p + "messages_committed",
                                 "Messages committed to the recorder store (dead letters "
                                 "included)", registry=r)
        self.dead_letters = Counter(p + "dead_letters", "Messages set aside as dead letters",
                                    ["reason"], registry=r)
        self.commit_seconds = Histogram(p + "commit_seconds",
                                        "Time to commit one batch to the recorder store",
                                        buckets=COMMIT_BUCKETS, registry=r)
        self.batch_size = Histogram(p + "batch_size_messages", "Messages per committed batch",
                                    buckets=BATCH_BUCKETS, registry=r)
        self.queue_depth = Gauge(p + "queue_depth_messages",
                                 "Messages received and waiting for the writer", registry=r)
        self.export_backlog = Gauge(p + "export_backlog_rows",
                                    "Rows waiting in the store's export queue", registry=r)
        self.export_failures = Counter(p + "export_failures",
                                       "Failed writes to the time-series server", registry=r)
        self.alerts_pending = Gauge(p + "alerts_pending",
                                    "Alerts waiting to be delivered", registry=r)
        self.store_errors = Counter(p + "store_errors",
                                    "Failed commits or store reconnects", registry=r)
        self.stepped_aside = Gauge(p + "stepped_aside",
                                   "1 while the store fails and the collector has left the "
                                   "shared subscription group", registry=r)
        self.connected = Gauge(p + "mqtt_connected", "1 while connected to the broker",
                               registry=r)
        self.last_seen = _LastSeen(clock)
        r.register(self.last_seen)
        self._server: Any = None

    def serve(self, settings: MetricsSettings) -> tuple[str, int]:
        """Start the HTTP endpoint (a daemon thread); returns the bound address (port 0 in
        the settings picks a free port). OSError when the address cannot be bound."""
        server, _thread = start_http_server(settings.port, settings.host,
                                            registry=self.registry)
        self._server = server
        host, port = server.server_address[:2]
        return str(host), int(port)

    def close(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None
