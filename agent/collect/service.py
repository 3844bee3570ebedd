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
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, cast

import paho.mqtt.client as mqtt
import structlog
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent.alerts.config import AlertSettings, load_alert_settings
from agent.alerts.service import CollectorAlerts
from agent.config import Section, load_toml
from agent.publish.mqtt import PublisherConfig
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
    batch_max: int = 500
    batch_wait_s: float = 0.05
    max_payload_bytes: int = 4 * 1024 * 1024
    future_tolerance_s: float = 300.0
    receive_maximum: int = 1000
    alerts: AlertSettings | None = None


def load_collector_settings(path: str | Path) -> CollectorSettings:
    p = Path(path)
    doc = Section(load_toml(p), p)
    doc.reject_unknown({"collector", "store", "mqtt", "export", "ingest", "alerts"})
    col = doc.section("collector")
    col.reject_unknown({"id", "group"})
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
        ex.reject_unknown({"url", "token", "org", "bucket", "precision"})
        export = ExportSettings(
            url=ex.get("url", str, required=True),
            token=ex.get("token", str, ""),
            org=ex.get("org", str, "halfcycle"),
            bucket=ex.get("bucket", str, "halfcycle"),
            precision=cast(Precision, ex.choice("precision", ("s", "ms", "us", "ns"), "ms")),
        )
    retention = store.optional("trend_retention_days", float)
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
        mqtt=PublisherConfig.from_section(doc.section("mqtt")),
        export=export,
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
        self._queue: queue.Queue[Received] = queue.Queue()
        self._generation = 0
        self._connected = threading.Event()
        self._client = self._make_client()
        self.store: RecorderStore | None = None
        self.is_exporter = False
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
        client.on_connect = self._on_connect
        client.on_message = self._on_message
        client.on_disconnect = self._on_disconnect
        return client

    def _on_connect(
        self, client: mqtt.Client, _u: Any, flags: Any, reason: Any, _props: Any
    ) -> None:
        if reason.is_failure:
            log.warning("collector_connect_refused", reason=str(reason))
            return
        self._generation += 1
        self.stats.connects += 1
        subs = [(topics.shared_filter(self.settings.group, kind), 1) for kind in DATA_KINDS]
        subs.append((f"{topics.PREFIX}/+/+/{STATUS_KIND}", 1))
        client.subscribe(subs)
        self._connected.set()
        log.info(
            "collector_connected",
            generation=self._generation,
            session_present=bool(getattr(flags, "session_present", False)),
        )

    def _on_disconnect(
        self, _c: mqtt.Client, _u: Any, _flags: Any, reason: Any, _props: Any
    ) -> None:
        self._connected.clear()
        log.warning("collector_disconnected", reason=str(reason))

    def _on_message(self, _c: mqtt.Client, _u: Any, msg: mqtt.MQTTMessage) -> None:
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
        self.stats.dead_letters += 1
        self.stats.by_reason[code] = self.stats.by_reason.get(code, 0) + 1

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
                    self.stats.dead_letters += 1
                    self.stats.by_reason[exc.code] = self.stats.by_reason.get(exc.code, 0) + 1
                continue
            sites[device] = site
            items.append(Item(message=msg, topic=rec.topic, raw=rec.payload,
                              raw_size=len(rec.payload), received_at=rec.at))
        upto = store.commit_batch(items) if items else {}
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

    def _trusted_envelope(self, rec: Received, exc: WireError) -> dict[str, Any] | None:
        """The envelope of a message that failed validation, if it can be trusted.

        Trusted means: it unpacks to a map whose device, site and type match the topic (the
        broker's ACL lets a device write only its own topics), with a valid epoch and a
        sequence number. A mismatch ("identity") or bytes that are not msgpack are not.
        """
        if exc.code in ("identity", "not_msgpack", "oversized"):
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

    def _writer(self, stop: threading.Event) -> None:
        s = self.settings
        store = RecorderStore(s.store_url, s.captures_dir, keep_trend=s.keep_trend)
        self.store = store
        if self.alerts is not None:
            self.alerts.attach(store)
        last_prune = 0.0
        try:
            while not stop.is_set() or not self._queue.empty():
                if self.alerts is not None:
                    self.alerts.maybe_tick(store)
                batch = self._take_batch(stop)
                if not batch:
                    if stop.is_set():
                        break
                    continue
                self.stats.received += len(batch)
                try:
                    self.process_batch(store, batch)
                except Exception as exc:  # the store is down: keep running, do not ack
                    self.stats.commit_errors += 1
                    log.error("collector_commit_failed", error=str(exc), batch=len(batch))
                    time.sleep(1.0)
                    continue  # unacked: the broker redelivers after our reconnect
                self._acknowledge(batch)
                if s.trend_retention_days and time.monotonic() - last_prune > 3600:
                    store.prune_trend(self.clock() - s.trend_retention_days * 86400)
                    last_prune = time.monotonic()
        finally:
            store.close()

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
        cfg = self.settings.mqtt
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = cfg.session_expiry_s
        props.ReceiveMaximum = self.settings.receive_maximum
        writer_stop = threading.Event()
        writer = threading.Thread(target=self._writer, args=(writer_stop,), name="writer")
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
            store=self.settings.store_url.split("@")[-1],
            host=cfg.host,
            port=cfg.port,
        )
        try:
            if ready is not None:
                while not stop.is_set() and not self._connected.wait(0.1):
                    pass
                ready.set()
            stop.wait()
        finally:
            # Commit and acknowledge what is queued, then leave; unacked messages stay in
            # the broker's session for the next start.
            writer_stop.set()
            writer.join(timeout=30)
            if exporter is not None:
                exporter.join(timeout=30)
            if sender is not None:
                sender.join(timeout=30)
            self._client.disconnect()
            self._client.loop_stop()
            log.info(
                "collector_stop",
                **{k: v for k, v in vars(self.stats).items() if not isinstance(v, dict)},
            )
