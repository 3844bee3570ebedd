"""The collector: MQTT → validate → commit to the recorder store → acknowledge.

``on_message`` only queues (committing there would block paho's network loop and with it the
keepalive). A single writer thread takes batches from the queue, decodes and validates each
message against ``schemas/``, commits the batch in one transaction, publishes the retained
per-device commit acknowledgements the agents' outboxes wait for, and only then sends the
MQTT PUBACKs (paho's manual acknowledgement), in the order the messages arrived. A PUBACK for
a message from an earlier connection is dropped: the broker redelivers it on the persistent
session, and the store's idempotency makes the second copy harmless.

Data topics are subscribed through a shared subscription (``$share/{group}/...``) so several
collectors split the load; status topics are subscribed by every collector, since presence
(online/offline) is retained and each collector keeps device state.
"""

from __future__ import annotations

import math
import queue
import ssl
import threading
import time
from collections.abc import Callable
from contextlib import suppress
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import paho.mqtt.client as mqtt
import structlog
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.alerts.config import AlertSettings, load_alert_settings
from agent.alerts.service import CollectorAlerts
from agent.collect.presence import Presence
from agent.config import Section, load_toml
from agent.ops.metrics import CollectorMetrics, MetricsSettings
from agent.ops.retention import Pruner, RetentionSettings
from agent.ops.secrets import read_secret_file, warn_if_exposed
from agent.ops.systemd import Notifier
from agent.publish.mqtt import PublisherConfig
from agent.store import alerts as _alert_queue
from agent.store.db import describe_url, first_line
from agent.store.export import Precision
from agent.store.recorder import Item, RecorderStore
from agent.wire import codec, topics
from agent.wire.errors import WireError

log = structlog.get_logger("halfcycle.collect")

DATA_KINDS = ("summary", "aggregate", "event", "capture", "gap")
# PostgreSQL advisory lock held by the one collector that runs the time-series exporter.
EXPORTER_LOCK_KEY = 0x68630001
STATUS_KIND = "status"
# Time fields checked against the collector's clock (messages from the future are
# quarantined: a device with a wrong clock must not write data into next year).
_TIME_FIELDS = ("t", "t0", "start_utc", "end_utc", "t_utc")


@dataclass
class ExportSettings:
    url: str
    token: str
    org: str
    bucket: str
    precision: Precision = "ms"


@dataclass
class CollectorSettings:
    path: Path | None
    collector_id: str
    group: str
    store_url: str
    captures_dir: Path
    keep_trend: bool
    trend_retention_days: float | None
    mqtt: PublisherConfig
    export: ExportSettings | None = None
    retention: RetentionSettings = field(default_factory=RetentionSettings)
    metrics: MetricsSettings | None = None
    log_level: str | None = None
    stats_interval_s: float = 60.0
    batch_max: int = 500
    batch_wait_s: float = 0.05
    max_payload_bytes: int = 4 * 1024 * 1024
    future_tolerance_s: float = 300.0
    receive_maximum: int = 1000
    alerts: AlertSettings | None = None


def load_collector_settings(path: str | Path) -> CollectorSettings:
    p = Path(path)
    doc = Section(load_toml(p), p)
    doc.reject_unknown({"collector", "store", "mqtt", "export", "ingest", "retention", "metrics",
                        "log", "alerts"})
    col = doc.section("collector")
    col.reject_unknown({"id", "group", "stats_interval_s"})
    store = doc.section("store", required=True)
    store.reject_unknown({"url", "captures_dir", "keep_trend", "trend_retention_days"})
    ingest = doc.section("ingest")
    ingest.reject_unknown(
        {"batch_max", "batch_wait_s", "max_payload_bytes", "future_tolerance_s", "receive_maximum"}
    )

    def resolve(value: str) -> Path:
        q = Path(value)
        return q if q.is_absolute() else p.parent / q

    url = store.get("url", str, required=True)
    if url.startswith("sqlite:///") and not url.startswith("sqlite:////"):
        url = "sqlite:///" + str(resolve(url[len("sqlite:///") :]))
    elif not url.startswith(("sqlite:///", "postgresql://", "postgres://")):
        raise store.error("url", "must start with sqlite:/// or postgresql://")
    cid = col.get("id", str, "collector-1")
    group = col.get("group", str, "recorders")
    for key, value in (("id", cid), ("group", group)):
        if not topics.valid_id(value):
            raise col.error(key, f"{value!r} is not a valid id")
    export = None
    if doc.has("export"):
        ex = doc.section("export")
        ex.reject_unknown({"url", "token", "token_file", "org", "bucket", "precision"})
        if ex.has("token") and ex.has("token_file"):
            raise ex.error("token", "give token or token_file, not both")
        export = ExportSettings(
            url=ex.get("url", str, required=True),
            token=read_secret_file(ex, "token_file") if ex.has("token_file")
            else ex.get("token", str, ""),
            org=ex.get("org", str, "halfcycle"),
            bucket=ex.get("bucket", str, "halfcycle"),
            precision=cast(Precision, ex.choice("precision", ("s", "ms", "us", "ns"), "ms")),
        )
    retention = store.optional("trend_retention_days", float)
    log_sec = doc.section("log")
    log_sec.reject_unknown({"level"})
    log_level = (log_sec.choice("level", ("debug", "info", "warning", "error"))
                 if log_sec.has("level") else None)
    stats_interval = col.get("stats_interval_s", float, 60.0)
    if stats_interval <= 0:
        raise col.error("stats_interval_s", "must be > 0")
    mqtt_sec = doc.section("mqtt")
    # The one secret a collector configuration may hold inline (the broker password may not).
    warn_if_exposed(p, ["export.token"] if doc.section("export").has("token") else [])
    batch_max = ingest.get("batch_max", int, 500)
    if not 1 <= batch_max <= 10000:
        raise ingest.error("batch_max", "must be 1..10000")
    return CollectorSettings(
        path=p,
        collector_id=cid,
        group=group,
        store_url=url,
        captures_dir=resolve(store.get("captures_dir", str, "captures")),
        keep_trend=store.get("keep_trend", bool, True),
        trend_retention_days=retention,
        mqtt=PublisherConfig.from_section(mqtt_sec),
        export=export,
        retention=RetentionSettings.from_section(doc.section("retention"),
                                                 trend_days=retention),
        metrics=MetricsSettings.from_section(doc.section("metrics")),
        log_level=log_level,
        stats_interval_s=stats_interval,
        batch_max=batch_max,
        batch_wait_s=ingest.get("batch_wait_s", float, 0.05),
        max_payload_bytes=ingest.get("max_payload_bytes", int, 4 * 1024 * 1024),
        future_tolerance_s=ingest.get("future_tolerance_s", float, 300.0),
        receive_maximum=ingest.get("receive_maximum", int, 1000),
        alerts=load_alert_settings(doc.section("alerts")) if doc.has("alerts") else None,
    )


@dataclass
class Received:
    mid: int
    qos: int
    topic: str
    payload: bytes
    generation: int
    at: float


@dataclass
class CollectorStats:
    received: int = 0
    committed: int = 0
    batches: int = 0
    dead_letters: int = 0
    acks_published: int = 0
    pubacks: int = 0
    stale_pubacks_dropped: int = 0
    commit_errors: int = 0
    connects: int = 0
    by_reason: dict[str, int] = field(default_factory=dict)


def check_message(msg: dict[str, Any], topic: str, now: float, future_tolerance_s: float) -> None:
    """Checks beyond the schema: the topic names the sender; no times from the future."""
    site, device, kind = topics.parse_topic(topic)
    if msg.get("device") != device or msg.get("site") != site:
        raise WireError(
            f"payload says {msg.get('site')}/{msg.get('device')}, topic says {site}/{device}",
            "identity",
        )
    if msg.get("type") != kind:
        raise WireError(f"a {msg.get('type')!r} message on a {kind!r} topic", "identity")
    for name in _TIME_FIELDS:
        value = msg.get(name)
        if (
            isinstance(value, int | float)
            and not isinstance(value, bool)
            and math.isfinite(value)
            and value > now + future_tolerance_s
        ):
            raise WireError(
                f"{name} = {value:.0f} is {value - now:.0f} s in the future", "future_timestamp"
            )


class Collector:
    """One collector process (see the module docstring). ``run(stop)`` blocks."""

    def __init__(
        self, settings: CollectorSettings, *, clock: Callable[[], float] = time.time
    ) -> None:
        self.settings = settings
        self.clock = clock
        self.stats = CollectorStats()
        self.metrics = CollectorMetrics(clock)
        self.notifier = Notifier()
        self.pruner = Pruner(settings.retention, exporting=settings.export is not None,
                             clock=clock)
        self._queue: queue.Queue[Received] = queue.Queue()
        self._generation = 0
        self._connected = threading.Event()
        self._subscribed = threading.Event()
        # Retained presence with a Last Will; also how a client-id clash shows.
        self.presence = Presence(settings.collector_id, settings.group,
                                 settings.mqtt.client_id or settings.collector_id, clock)
        self._data_sub_mid: int | None = None
        self._sites: dict[str, str] = {}  # device -> its site (see _check_site)
        self._client = self._make_client()
        self.store: RecorderStore | None = None
        self.is_exporter = False
        self._exporter_obj: Any = None
        # True while the store fails: the collector has left the shared group (see _step_aside).
        self.aside = False
        self._connect_failures = 0
        self.metrics_address: tuple[str, int] | None = None
        self._last_stats = time.monotonic()
        self._export_failures_seen = 0
        self._rejoin_delay = 1.0
        self._next_rejoin = 0.0
        self._healthy = True  # no commit failed since the last one that went through
        # Alerts (agent/alerts): judged in the commit transaction and on a tick, sent apart.
        self.alerts = (CollectorAlerts(settings.alerts, clock=clock)
                       if settings.alerts is not None else None)

    # --- MQTT side (paho's thread) ----------------------------------------------------------
    def _make_client(self) -> mqtt.Client:
        cfg = self.settings.mqtt
        client = mqtt.Client(
            mqtt.CallbackAPIVersion.VERSION2,
            client_id=cfg.client_id or self.settings.collector_id,
            protocol=mqtt.MQTTv5,
            manual_ack=True,
        )
        client.username_pw_set(cfg.username or "collector", cfg.password)
        if cfg.tls:
            client.tls_set(
                ca_certs=cfg.ca_file,
                certfile=cfg.cert_file,
                keyfile=cfg.key_file,
                cert_reqs=ssl.CERT_REQUIRED,
                tls_version=ssl.PROTOCOL_TLS_CLIENT,
            )
        client.reconnect_delay_set(
            min_delay=int(max(1, cfg.reconnect_min_s)),
            max_delay=int(max(cfg.reconnect_min_s, cfg.reconnect_max_s)),
        )
        client.will_set(self.presence.topic, self.presence.body("offline"), qos=1, retain=True)
        client.on_connect = self._on_connect
        client.on_connect_fail = self._on_connect_fail
        client.on_message = self._on_message
        client.on_disconnect = self._on_disconnect
        client.on_subscribe = self._on_subscribe
        return client

    def _subscriptions(self) -> list[tuple[str, int]]:
        subs = [(topics.shared_filter(self.settings.group, kind), 1) for kind in DATA_KINDS]
        subs.append((f"{topics.PREFIX}/+/+/{STATUS_KIND}", 1))
        return subs

    def _on_connect(
        self, client: mqtt.Client, _u: Any, flags: Any, reason: Any, _props: Any
    ) -> None:
        if reason.is_failure:
            self._connect_failures += 1
            log.error("collector_connect_refused", reason=str(reason),
                      user=self.settings.mqtt.username or "collector",
                      hint="check [mqtt] username and password_file against the broker's "
                           "password file" if getattr(reason, "value", 0) in (0x86, 0x87)
                      else None)
            return
        self._generation += 1
        self.stats.connects += 1
        self._connect_failures = 0
        # Subscribe first: the retained presence then shows who held this id before us.
        client.subscribe(self.presence.topic, qos=1)
        client.publish(self.presence.topic, self.presence.body("online"), qos=1, retain=True)
        if not self.aside:  # a collector whose store fails stays out of the group
            self._data_sub_mid = client.subscribe(self._subscriptions())[1]
        self._connected.set()
        self.metrics.connected.set(1)
        log.info(
            "collector_connected",
            generation=self._generation,
            session_present=bool(getattr(flags, "session_present", False)),
        )

    def _on_connect_fail(self, _c: mqtt.Client, _u: Any) -> None:
        # paho retries by itself, doubling its delay from reconnect_min_s to reconnect_max_s.
        self._connect_failures += 1
        cfg = self.settings.mqtt
        delay = min(max(1.0, cfg.reconnect_max_s),
                    max(1.0, cfg.reconnect_min_s) * 2 ** min(self._connect_failures - 1, 20))
        log.warning("collector_connect_failed", host=cfg.host, port=cfg.port,
                    failures=self._connect_failures, retry_in_s=round(delay, 1))

    def _on_subscribe(self, _c: mqtt.Client, _u: Any, mid: int, codes: Any,
                      _props: Any) -> None:
        refused = [str(c) for c in codes if getattr(c, "is_failure", False)]
        if refused:
            log.error("collector_subscription_refused", reasons=refused)
        elif mid == self._data_sub_mid:
            self._subscribed.set()

    def _client_id_clash(self) -> None:
        # Say so, and wait longer before taking the session back so the flapping slows down.
        self.presence.report_clash()
        cfg = self.settings.mqtt
        self._client.reconnect_delay_set(min_delay=int(max(10, cfg.reconnect_max_s)),
                                         max_delay=int(max(60, cfg.reconnect_max_s)))

    def _on_disconnect(
        self, _c: mqtt.Client, _u: Any, _flags: Any, reason: Any, _props: Any
    ) -> None:
        self._connected.clear()
        self._subscribed.clear()
        self.metrics.connected.set(0)
        if self.presence.disconnected(getattr(reason, "value", None)):
            self._client_id_clash()
            return
        log.warning("collector_disconnected", reason=str(reason))

    def _on_message(self, c: mqtt.Client, _u: Any, msg: mqtt.MQTTMessage) -> None:
        if msg.topic == self.presence.topic:
            if msg.qos:
                c.ack(msg.mid, msg.qos)  # manual acknowledgement: nothing to commit here
            if self.presence.seen(bytes(msg.payload)):
                self._client_id_clash()
            return
        self._queue.put(
            Received(
                msg.mid, msg.qos, msg.topic, bytes(msg.payload), self._generation, self.clock()
            )
        )

    # --- writer side -------------------------------------------------------------------------
    def _take_batch(self, stop: threading.Event) -> list[Received]:
        try:
            first = self._queue.get(timeout=0.2)
        except queue.Empty:
            return []
        batch = [first]
        deadline = time.monotonic() + self.settings.batch_wait_s
        while len(batch) < self.settings.batch_max:
            left = deadline - time.monotonic()
            try:
                batch.append(
                    self._queue.get(timeout=max(0.0, left))
                    if left > 0
                    else self._queue.get_nowait()
                )
            except queue.Empty:
                break
        return batch

    def _dead(
        self, store: RecorderStore, rec: Received, reason: str, code: str, device: str | None
    ) -> None:
        store.dead_letter(
            rec.topic, rec.payload, f"{code}: {reason}", device=device, received_at=rec.at
        )
        self._count_dead(code)

    def _count_dead(self, code: str) -> None:
        self.stats.dead_letters += 1
        self.stats.by_reason[code] = self.stats.by_reason.get(code, 0) + 1
        self.metrics.dead_letters.labels(code).inc()

    def process_batch(
        self, store: RecorderStore, batch: list[Received]
    ) -> dict[tuple[str, str], int]:
        """Decode, validate, commit; returns committed_upto per touched (device, epoch)."""
        items: list[Item] = []
        sites: dict[str, str] = {}
        now = self.clock()
        for rec in batch:
            device: str | None = None
            try:
                site, device, _kind = topics.parse_topic(rec.topic)
                msg = codec.decode(rec.payload, max_bytes=self.settings.max_payload_bytes)
                check_message(msg, rec.topic, now, self.settings.future_tolerance_s)
                self._check_site(store, site, device)
            except WireError as exc:
                reason = f"{exc.code}: {exc.reason}"
                trusted = self._trusted_envelope(rec, exc) if device is not None else None
                if trusted is None:
                    self._dead(store, rec, exc.reason, exc.code, device)
                else:
                    # Quarantined per device, and its seq accounted for (see Item.reject).
                    assert device is not None
                    sites[device] = site
                    items.append(Item(message=trusted, topic=rec.topic, raw=rec.payload,
                                      raw_size=len(rec.payload), received_at=rec.at,
                                      reject=reason))
                    self._count_dead(exc.code)
                continue
            sites[device] = site
            self.metrics.last_seen.touch(site, device, rec.at)
            items.append(Item(message=msg, topic=rec.topic, raw=rec.payload,
                              raw_size=len(rec.payload), received_at=rec.at))
        t0 = time.perf_counter()
        upto = store.commit_batch(items) if items else {}
        self.metrics.commit_seconds.observe(time.perf_counter() - t0)
        self.metrics.batch_size.observe(len(batch))
        self.metrics.committed.inc(len(batch))
        self.stats.committed += len(items)
        self.stats.batches += 1
        for (dev, epoch), seq in upto.items():
            ack_site = sites.get(dev)
            if ack_site is None or seq < 1:
                continue
            body = codec.ack_message(ack_site, dev, epoch, seq, self.settings.collector_id)
            self._client.publish(
                topics.ack_topic(ack_site, dev), codec.encode(body), qos=1, retain=True
            )
            self.stats.acks_published += 1
        return upto

    def _check_site(self, store: RecorderStore, site: str, device: str) -> None:
        """A device belongs to one site: the first it was stored under (the broker's ACL binds
        it at provisioning too). A message under another site is a dead letter."""
        bound = self._sites.get(device)
        if bound is None:
            bound = self._sites[device] = store.device_site(device) or site
        if bound != site:
            raise WireError(f"device {device} belongs to site {bound}, not {site}",
                            "wrong_site")

    def _trusted_envelope(self, rec: Received, exc: WireError) -> dict[str, Any] | None:
        """The envelope of a message that failed validation, if it can be trusted.

        Trusted means: it unpacks to a map whose device, site and type match the topic (the
        broker's ACL lets a device write only its own topics), with a valid epoch and a
        sequence number. A mismatch ("identity") or bytes that are not msgpack are not.
        """
        if exc.code in ("identity", "not_msgpack", "oversized", "wrong_site"):
            return None
        try:
            raw = codec.unpack(rec.payload, max_bytes=self.settings.max_payload_bytes)
            site, device, kind = topics.parse_topic(rec.topic)
        except WireError:
            return None
        if not isinstance(raw, dict):
            return None
        seq, epoch = raw.get("seq"), raw.get("epoch")
        if (raw.get("device") != device or raw.get("site") != site or raw.get("type") != kind
                or not topics.valid_id(epoch) or isinstance(seq, bool)
                or not isinstance(seq, int) or not 1 <= seq < 2**53):
            return None
        return {"v": raw.get("v"), "type": kind, "device": device, "site": site,
                "epoch": epoch, "seq": seq}

    def _acknowledge(self, batch: list[Received]) -> None:
        for rec in batch:  # in arrival order
            if rec.qos == 0:
                continue
            if rec.generation != self._generation:
                self.stats.stale_pubacks_dropped += 1
                continue
            self._client.ack(rec.mid, rec.qos)
            self.stats.pubacks += 1

    def open_store(self) -> RecorderStore:
        """Open (and migrate) the recorder store; StoreError, one line, when it cannot be.
        Called before the collector connects: one that cannot commit must not take a share
        of the fleet's messages."""
        s = self.settings
        return RecorderStore(s.store_url, s.captures_dir, keep_trend=s.keep_trend,
                             export=s.export is not None)

    def _writer(self, stop: threading.Event, store: RecorderStore) -> None:
        self.store = store
        if self.alerts is not None:
            self.alerts.attach(store)
        try:
            while not stop.is_set() or (not self._queue.empty() and not self.aside):
                self._tick(store)
                if self.alerts is not None:
                    self.alerts.maybe_tick(store)
                if self.aside:
                    self._try_rejoin(store, stop)
                    continue
                batch = self._take_batch(stop)
                if not batch:
                    if stop.is_set():
                        break
                    continue
                self.stats.received += len(batch)
                self.metrics.received.inc(len(batch))
                try:
                    self.process_batch(store, batch)
                except Exception as exc:  # the store is down: leave the group, do not ack
                    self._step_aside(exc, len(batch))
                    continue  # unacked: redelivered after a reconnect, or resent by the edge
                self._healthy = True
                self._acknowledge(batch)
                self._retention(store)
        finally:
            store.close()

    # --- operator concerns on the writer's thread ----------------------------------------
    def _tick(self, store: RecorderStore) -> None:
        """Each writer pass: the watchdog ping (a hung writer stops them), gauges, and the
        stats line every ``stats_interval_s``."""
        self.notifier.watchdog()
        self.metrics.queue_depth.set(self._queue.qsize())
        now = time.monotonic()
        if now - self._last_stats < self.settings.stats_interval_s:
            return
        self._last_stats = now
        backlog = None
        if self.settings.export is not None and not self.aside:
            try:
                backlog = store.export_backlog()
                self.metrics.export_backlog.set(backlog)
            except Exception:  # counted and reported by the next commit
                backlog = None
        if self.alerts is not None and not self.aside:
            # A failing store is counted and reported by the next commit.
            with suppress(Exception):
                self.metrics.alerts_pending.set(sum(_alert_queue.backlog(store.db).values()))
        if self._exporter_obj is not None:
            self.metrics.export_failures.inc(
                self._exporter_obj.failures_total - self._export_failures_seen)
            self._export_failures_seen = self._exporter_obj.failures_total
        st = self.stats
        log.info("collector_stats", received=st.received, committed=st.committed,
                 dead_letters=st.dead_letters, commit_errors=st.commit_errors,
                 queue=self._queue.qsize(), connected=self._connected.is_set(),
                 aside=self.aside, export_backlog=backlog)

    def _retention(self, store: RecorderStore) -> None:
        if not self.pruner.due():
            return
        try:
            self.pruner.prune(store)
        except Exception as exc:  # retried at the next interval; the data path goes on
            self.metrics.store_errors.inc()
            log.error("retention_failed", error=first_line(exc))

    def _step_aside(self, exc: Exception, batch: int) -> None:
        """The store failed a commit: unsubscribe, so the broker hands this collector's share
        of the fleet to the collectors that can commit, and drop what is queued here
        unacknowledged (the broker or the edge outbox sends it again)."""
        self.stats.commit_errors += 1
        self.metrics.store_errors.inc()
        self.aside = True
        self.metrics.stepped_aside.set(1)
        self._client.unsubscribe([f for f, _qos in self._subscriptions()])
        dropped = self._drain_unacked()
        # A store that passes the probe but fails the next commit again (a full disk) keeps
        # the backoff growing: it restarts at 1 s only after a commit went through.
        self._rejoin_delay = 1.0 if self._healthy else min(60.0, self._rejoin_delay * 2)
        self._healthy = False
        self._next_rejoin = time.monotonic() + self._rejoin_delay
        log.error("collector_store_failed", error=first_line(exc), batch=batch,
                  dropped_unacked=dropped, action="left the shared group until the store "
                  "commits again")
        self.notifier.status("store failing: out of the shared group, retrying")

    def _drain_unacked(self) -> int:
        n = 0
        while True:
            try:
                self._queue.get_nowait()
            except queue.Empty:
                return n
            n += 1

    def _try_rejoin(self, store: RecorderStore, stop: threading.Event) -> None:
        """While aside: drop what still arrives, probe the store with backoff (1 s doubling
        to 60 s), resubscribe once it takes a transaction again."""
        self._drain_unacked()
        wait = self._next_rejoin - time.monotonic()
        if wait > 0:
            stop.wait(min(wait, 0.5))
            return
        try:
            store.probe()
        except Exception as exc:
            self.metrics.store_errors.inc()
            self._rejoin_delay = min(60.0, self._rejoin_delay * 2)
            self._next_rejoin = time.monotonic() + self._rejoin_delay
            log.warning("collector_store_still_failing", error=first_line(exc),
                        retry_in_s=self._rejoin_delay)
            return
        self.aside = False
        self.metrics.stepped_aside.set(0)
        self._data_sub_mid = self._client.subscribe(self._subscriptions())[1]
        log.info("collector_store_back", action="rejoined the shared group")
        self.notifier.status(self._status_text())

    def _status_text(self) -> str:
        return (f"collecting for group {self.settings.group} into "
                f"{describe_url(self.settings.store_url)}")

    def _exporter(self, stop: threading.Event) -> None:
        ex = self.settings.export
        assert ex is not None
        from agent.store.export import TimeSeriesExporter

        store = RecorderStore(
            self.settings.store_url, self.settings.captures_dir, keep_trend=self.settings.keep_trend
        )
        try:
            if not self._become_the_exporter(store, stop):
                return
            exporter = TimeSeriesExporter(
                store, ex.url, ex.token, ex.org, ex.bucket, ex.precision
            )
            self._exporter_obj = exporter
            with exporter:
                exporter.run(stop)
        finally:
            store.close()

    def _become_the_exporter(self, store: RecorderStore, stop: threading.Event) -> bool:
        """One exporter per store: with several collectors on one PostgreSQL database, the
        one holding a session advisory lock exports and the others stand by until it goes
        away (its connection closes and the lock is released). SQLite has one collector."""
        if store.db.dialect != "postgresql":
            return True
        while not stop.is_set():
            row = store.db.query_one("SELECT pg_try_advisory_lock(?)", (EXPORTER_LOCK_KEY,))
            if row and row[0]:
                self.is_exporter = True
                log.info("exporter_active", collector=self.settings.collector_id)
                return True
            stop.wait(5.0)
        return False

    def run(self, stop: threading.Event, *, ready: threading.Event | None = None) -> None:
        """Open the store (StoreError at once if it cannot be), serve metrics, connect,
        subscribe; tell systemd READY once subscribed; run until ``stop``."""
        cfg = self.settings.mqtt
        store = self.open_store()
        try:
            if self.settings.metrics is not None:
                self.metrics_address = self._serve_metrics(self.settings.metrics)
        except BaseException:
            store.close()
            raise
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = cfg.session_expiry_s
        props.ReceiveMaximum = self.settings.receive_maximum
        writer_stop = threading.Event()
        writer = threading.Thread(target=self._writer, args=(writer_stop, store), name="writer")
        writer.start()
        exporter = None
        if self.settings.export is not None:
            exporter = threading.Thread(target=self._exporter, args=(writer_stop,), name="exporter")
            exporter.start()
        sender = None
        if self.alerts is not None:
            sender = threading.Thread(
                target=self.alerts.run_sender, name="alerts",
                args=(self.settings.store_url, self.settings.captures_dir, self._client,
                      writer_stop))
            sender.start()
        self._client.connect_async(
            cfg.host, cfg.port, keepalive=cfg.keepalive_s, clean_start=False, properties=props
        )
        self._client.loop_start()
        log.info(
            "collector_start",
            id=self.settings.collector_id,
            group=self.settings.group,
            store=describe_url(self.settings.store_url),
            host=cfg.host,
            port=cfg.port,
            metrics=f"{self.metrics_address[0]}:{self.metrics_address[1]}"
            if self.metrics_address else None,
            exporting=self.settings.export is not None,
        )
        try:
            while not stop.is_set() and not self._subscribed.wait(0.1):
                pass
            if not stop.is_set():
                self.notifier.ready(self._status_text())
            if ready is not None:
                ready.set()
            stop.wait()
        finally:
            # Commit and acknowledge what is queued, then leave; unacked messages stay in
            # the broker's session for the next start.
            self.notifier.stopping()
            writer_stop.set()
            writer.join(timeout=30)
            if exporter is not None:
                exporter.join(timeout=30)
            if self._connected.is_set():  # a clean DISCONNECT suppresses the Will
                with suppress(RuntimeError, ValueError):
                    self._client.publish(self.presence.topic, self.presence.body("offline"),
                                         qos=1, retain=True).wait_for_publish(2.0)
            if sender is not None:
                sender.join(timeout=30)
            self._client.disconnect()
            self._client.loop_stop()
            self.metrics.close()
            log.info(
                "collector_stop",
                **{k: v for k, v in vars(self.stats).items() if not isinstance(v, dict)},
            )

    def _serve_metrics(self, m: MetricsSettings) -> tuple[str, int]:
        from agent.config import ConfigError

        try:
            address = self.metrics.serve(m)
        except OSError as exc:
            raise ConfigError(self.settings.path, "metrics.bind",
                              f"cannot listen on {m.host}:{m.port}: {exc.strerror}") from None
        if not m.loopback:
            log.warning("metrics_not_loopback", bind=f"{m.host}:{m.port}",
                        hint="the metrics page has no authentication")
        return address
