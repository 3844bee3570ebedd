"""Publish the outbox over MQTT (paho-mqtt 2.x) until the collector acknowledges each message.

Design
------
* The outbox, not paho's memory, is the queue. Only as many messages as the in-flight window
  allows (``max_inflight``, default 10) are handed to paho at a time; paho's own queue is
  bounded (``max_queued_messages_set``) so it can never grow without limit.
* QoS 1 with a persistent session: ``clean_start=False`` plus an explicit Session Expiry
  Interval (MQTT 5 discards the session at disconnect without one); ``clean_session=False`` on
  MQTT 3.1.1.
* A PUBACK only means the broker took the message. A row leaves the outbox when the
  collector's retained acknowledgement on ``hc/v1/{site}/{device}/ack`` covers it. Whatever is
  not covered is sent again after every reconnect and after ``ack_timeout_s`` (doubling per
  attempt up to ``ack_timeout_max_s``), so a collector that dies with messages in its session
  cannot strand them.
* MQTT 5 PUBACK reason codes >= 0x80 mean refused (not authorised, too large, ...): the row is
  quarantined with the reason and announced by a gap notice. 0x10 "no matching subscribers" is
  a success. Server busy (0x89), packet id in use (0x91) and quota exceeded (0x97) are
  transient: the ack timeout retries them. A message larger than the broker's Maximum Packet
  Size (CONNACK property, or ``max_packet_bytes``) is quarantined before it is sent: Mosquitto
  disconnects a client that sends an oversized packet, which would otherwise repeat forever.
* MQTT 3.1.1 has no PUBACK reason codes: an ACL-denied publish is acknowledged as a success
  and silently discarded. On 3.1.1 the ack-timeout resends are therefore bounded by
  ``max_attempts`` (default 20) and the row is then quarantined.
* Reconnects use our own loop with exponential backoff and "equal jitter"
  (delay = d/2 + uniform(0, d/2), d = min(max, min * 2**n)). paho's ``reconnect_delay_set``
  doubles the delay without jitter, so a fleet that lost its broker would reconnect in
  lock-step; our loop also keeps every SQLite call on the thread that runs the loop.
* A silent network (no FIN, no RST) is detected by paho's keepalive: a PINGREQ is sent once
  nothing has been received for ``keepalive_s`` and the connection is closed when no PINGRESP
  arrives within another ``keepalive_s`` -- detection within 2 x keepalive at worst.
* A retained "online" presence message is published on every connect and a Last Will
  publishes a retained "offline" when the broker loses the connection.
* Logs are structured (structlog); the password is never logged (``repr=False``).
"""

from __future__ import annotations

import os
import random
import ssl
import threading
import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import msgpack
import paho.mqtt.client as mqtt
import structlog
from paho.mqtt.packettypes import PacketTypes
from paho.mqtt.properties import Properties

from agent import __version__
from agent.config import Section
from agent.publish import topics
from agent.publish.outbox import Outbox
from agent.wire import codec

log = structlog.get_logger("halfcycle.publish")

# MQTT 5 reason codes that mean "try again later", not "never" (MQTT 5.0 section 2.4).
TRANSIENT_REASONS = frozenset({0x89, 0x91, 0x97})
# CONNACK: bad user name or password, not authorized (MQTT 5.0 section 3.2.2.2; paho maps the
# MQTT 3.1.1 return codes 4 and 5 onto these).
CREDENTIAL_REASONS = frozenset({0x86, 0x87})


@dataclass(frozen=True)
class PublisherConfig:
    """Connection and delivery settings of the publisher (``[mqtt]`` table of the agent)."""

    host: str = "127.0.0.1"
    port: int = 8883
    client_id: str | None = None  # default: the device id
    username: str | None = None  # default: the device id
    password: str | None = field(default=None, repr=False)
    tls: bool = True
    ca_file: str | None = None
    cert_file: str | None = None
    key_file: str | None = None
    protocol: str = "5"  # "5" or "3.1.1"
    keepalive_s: int = 30
    session_expiry_s: int = 7 * 24 * 3600
    max_inflight: int = 10
    ack_timeout_s: float = 60.0
    ack_timeout_max_s: float = 3600.0
    max_attempts: int | None = None  # None: unlimited on MQTT 5, 20 on 3.1.1; 0: unlimited
    max_packet_bytes: int = 256 * 1024
    reconnect_min_s: float = 1.0
    reconnect_max_s: float = 120.0
    connect_timeout_s: float = 10.0
    heartbeat_s: float = 30.0
    resend_check_s: float = 1.0

    def effective_max_attempts(self) -> int:
        if self.max_attempts is not None:
            return self.max_attempts
        return 0 if self.protocol == "5" else 20

    @classmethod
    def from_section(cls, sec: Section) -> PublisherConfig:
        """Read the ``[mqtt]`` table; unknown keys and bad values raise ConfigError."""
        from agent.ops.secrets import read_secret_file, resolve_secret_path

        # No inline password: it belongs in a file of its own or a systemd credential.
        sec.reject_unknown(set(cls.__dataclass_fields__) - {"password"} | {"password_file"})
        kw: dict[str, Any] = {}
        for name in ("host", "client_id", "username", "ca_file", "cert_file", "key_file"):
            if sec.has(name):
                kw[name] = sec.get(name, str, required=True)
                if name.endswith("_file"):  # relative to the config's folder, or a credential
                    kw[name] = resolve_secret_path(sec, name, kw[name])
                    if not os.path.isfile(kw[name]):
                        raise sec.error(name, f"file not found: {kw[name]}")
        for name in ("port", "keepalive_s", "session_expiry_s", "max_inflight", "max_attempts",
                     "max_packet_bytes"):
            if sec.has(name):
                kw[name] = sec.get(name, int, required=True)
        for name in ("ack_timeout_s", "ack_timeout_max_s", "reconnect_min_s", "reconnect_max_s",
                     "connect_timeout_s", "heartbeat_s", "resend_check_s"):
            if sec.has(name):
                value = sec.get(name, float, required=True)
                if value <= 0:
                    raise sec.error(name, "must be > 0")
                kw[name] = value
        if sec.has("tls"):
            kw["tls"] = sec.get("tls", bool, required=True)
        if sec.has("protocol"):
            kw["protocol"] = sec.choice("protocol", ("5", "3.1.1"))
        if sec.has("password_file"):
            kw["password"] = read_secret_file(sec, "password_file")
        port = kw.get("port", 8883)
        if not 1 <= port <= 65535:
            raise sec.error("port", "must be 1..65535")
        if kw.get("max_inflight", 10) < 1:
            raise sec.error("max_inflight", "must be >= 1")
        keepalive = kw.get("keepalive_s", 30)
        if not 5 <= keepalive <= 65535:
            raise sec.error("keepalive_s", "must be 5..65535 s")
        return cls(**kw)


@dataclass
class PublisherStats:
    connects: int = 0
    disconnects: int = 0
    published: int = 0
    acks: int = 0
    rows_acknowledged: int = 0
    quarantined: int = 0
    last_disconnect_reason: str = ""
    last_disconnect_at: float | None = None  # monotonic [s]
    last_connect_at: float | None = None  # monotonic [s]


PresenceBody = Callable[[str], Mapping[str, Any]]


def default_presence_body(outbox: Outbox, started: float) -> PresenceBody:
    """Status bodies for presence when the caller supplies none. The publisher knows nothing
    of the clock, so it claims ``unsynced`` with an unknown error rather than guess."""

    def body(state: str) -> Mapping[str, Any]:
        return codec.status_body(state, agent_version=__version__,
                                 uptime_s=max(0.0, time.monotonic() - started),
                                 outbox_depth=outbox.pending_count(), sync="unsynced",
                                 time_error_s=None, last_ran=outbox.previous_run)

    return body


class Publisher:
    """Drains an :class:`Outbox` to an MQTT broker; call :meth:`run` on one thread.

    All paho callbacks and outbox calls happen on the thread that calls :meth:`run` /
    :meth:`step`; a producer may keep calling ``put`` on the same or another :class:`Outbox`
    of the same file from its own thread.
    """

    def __init__(self, outbox: Outbox, config: PublisherConfig, *,
                 presence_body: PresenceBody | None = None,
                 rng: random.Random | None = None,
                 monotonic: Callable[[], float] = time.monotonic) -> None:
        self.outbox = outbox
        self._presence_body = presence_body or default_presence_body(outbox, monotonic())
        self._identity = codec.Identity(site=outbox.site, device=outbox.device,
                                        epoch=outbox.epoch)
        self.config = config
        self.stats = PublisherStats()
        self._rng = rng or random.Random()
        self._now = monotonic
        self._inflight: dict[int, int] = {}  # paho mid -> outbox seq
        self._connected = False
        self._connecting_since: float | None = None
        self._next_attempt = 0.0
        self._failures = 0
        self._refusal: str | None = None  # cause already reported (see _refused)
        self._server_max_packet: int | None = None
        self._last_resend_check = 0.0
        self._overdue_backlog = False
        self._closing = False
        self._window = config.max_inflight
        self._last_heartbeat = 0.0
        self._ack_topic = topics.ack_topic(outbox.site, outbox.device)
        self._presence_topic = topics.topic(outbox.site, outbox.device, topics.PRESENCE_KIND)
        self._max_attempts = config.effective_max_attempts()
        # Set before stopping run() to say why in the retained offline presence (a clean
        # stop: "planned_stop"); the Last Will carries no reason.
        self.stop_reason: str | None = None
        self._client = self._make_client()

    # ----------------------------------------------------------------- client
    def _make_client(self) -> mqtt.Client:
        cfg = self.config
        v5 = cfg.protocol == "5"
        client_id = cfg.client_id or self.outbox.device
        if v5:
            client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id,
                                 protocol=mqtt.MQTTv5)
        else:
            client = mqtt.Client(mqtt.CallbackAPIVersion.VERSION2, client_id=client_id,
                                 protocol=mqtt.MQTTv311, clean_session=False)
        client.username_pw_set(cfg.username or self.outbox.device, cfg.password)
        if cfg.tls:
            client.tls_set(ca_certs=cfg.ca_file, certfile=cfg.cert_file, keyfile=cfg.key_file,
                           cert_reqs=ssl.CERT_REQUIRED, tls_version=ssl.PROTOCOL_TLS_CLIENT)
        client.connect_timeout = cfg.connect_timeout_s
        client.max_inflight_messages_set(cfg.max_inflight)
        # paho counts in-flight messages in its queue: room for one window being resent by
        # paho after a reconnect plus one window of ours; beyond that publish() says QUEUE_SIZE.
        client.max_queued_messages_set(2 * cfg.max_inflight)
        client.will_set(self._presence_topic, self._presence("offline"), qos=1, retain=True)
        client.on_connect = self._on_connect
        client.on_disconnect = self._on_disconnect
        client.on_publish = self._on_publish
        client.on_message = self._on_message
        client.on_subscribe = self._on_subscribe
        return client

    def _presence(self, state: str, reason: str | None = None) -> bytes:
        """Retained status message outside the sequence (seq 0, see agent.publish.topics)."""
        body = dict(self._presence_body(state))
        if reason is not None:
            body["reason"] = reason
        return codec.encode(self._identity.stamp(body, topics.PRESENCE_SEQ))

    @property
    def connected(self) -> bool:
        return self._connected

    def _connect_properties(self) -> Properties | None:
        if self.config.protocol != "5":
            return None
        props = Properties(PacketTypes.CONNECT)
        props.SessionExpiryInterval = self.config.session_expiry_s
        return props

    def _try_connect(self, now: float) -> None:
        cfg = self.config
        self._connecting_since = now
        try:
            if self.stats.connects == 0 and self.stats.disconnects == 0 and \
                    self._failures == 0:
                if cfg.protocol == "5":
                    self._client.connect(cfg.host, cfg.port, cfg.keepalive_s,
                                         clean_start=False,
                                         properties=self._connect_properties())
                else:
                    self._client.connect(cfg.host, cfg.port, cfg.keepalive_s)
            else:
                self._client.reconnect()
        except ssl.SSLCertVerificationError as exc:
            self._refused("certificate", f"the broker's certificate was not accepted: "
                          f"{exc.verify_message or exc}", ca_file=cfg.ca_file,
                          hint="check [mqtt] ca_file (the CA that signed the broker's "
                               "certificate) and that host matches the certificate's name")
            self._connect_failed(now, f"certificate: {exc.verify_message or exc}")
        except (OSError, ValueError, ssl.SSLError) as exc:
            self._connect_failed(now, f"{type(exc).__name__}: {exc}")

    def _refused(self, cause: str, message: str, **fields: Any) -> None:
        """Say once, as an error, that the broker refused us for a reason that retrying will
        not cure (credentials, certificate); repeats go to debug until a connect succeeds.
        The agent keeps measuring into the outbox meanwhile and keeps retrying with backoff
        (an operator may be fixing the password file right now)."""
        if self._refusal == cause:
            log.debug("mqtt_connect_refused", cause=cause)
            return
        self._refusal = cause
        log.error("mqtt_connect_refused", cause=cause, message=message, host=self.config.host,
                  port=self.config.port, user=self.config.username or self.outbox.device,
                  **fields)

    def _connect_failed(self, now: float, reason: str) -> None:
        self._connecting_since = None
        self._failures += 1
        d = min(self.config.reconnect_max_s,
                self.config.reconnect_min_s * 2 ** min(self._failures - 1, 30))
        delay = d / 2 + self._rng.uniform(0, d / 2)
        self._next_attempt = now + delay
        (log.debug if self._refusal else log.warning)(
            "mqtt_connect_failed", host=self.config.host, port=self.config.port,
            reason=reason, retry_in_s=round(delay, 2), failures=self._failures)

    # -------------------------------------------------------------- callbacks
    def _on_connect(self, client: mqtt.Client, userdata: Any, flags: Any,
                    reason_code: Any, properties: Any) -> None:
        now = self._now()
        if reason_code.is_failure:
            # paho closes the socket; on_disconnect follows. Retried with backoff.
            if int(getattr(reason_code, "value", 0)) in CREDENTIAL_REASONS:
                self._refused("credentials", f"the broker refused user "
                              f"{self.config.username or self.outbox.device!r}: {reason_code}",
                              hint="check [mqtt] username and password_file against the "
                                   "broker's device list (halfcycle broker devices list)")
            else:
                log.error("mqtt_connect_refused", cause="broker", reason=str(reason_code))
            self._connect_failed(now, f"CONNACK {reason_code}")
            return
        self._refusal = None
        self._connected = True
        self._connecting_since = None
        self.stats.connects += 1
        self.stats.last_connect_at = now
        self._server_max_packet = None
        if properties is not None and hasattr(properties, "MaximumPacketSize"):
            self._server_max_packet = int(properties.MaximumPacketSize)
        # MQTT 5.0 cl. 3.2.2.3.3: never more unacknowledged QoS 1 PUBLISHes than the server's
        # Receive Maximum (paho does not enforce it).
        self._window = self.config.max_inflight
        if properties is not None and hasattr(properties, "ReceiveMaximum"):
            self._window = max(1, min(self._window, int(properties.ReceiveMaximum)))
        self._inflight.clear()
        client.subscribe(self._ack_topic, qos=1)
        client.publish(self._presence_topic, self._presence("online"), qos=1, retain=True)
        requeued = self.outbox.requeue_unacknowledged()
        log.info("mqtt_connected", host=self.config.host, port=self.config.port,
                 window=self._window,
                 session_present=bool(getattr(flags, "session_present", False)),
                 server_max_packet=self._server_max_packet, requeued=requeued)

    def _on_disconnect(self, client: mqtt.Client, userdata: Any, flags: Any,
                       reason_code: Any, properties: Any) -> None:
        now = self._now()
        was_connected = self._connected
        self._connected = False
        inflight = len(self._inflight)
        self._inflight.clear()
        self.stats.disconnects += 1
        self.stats.last_disconnect_reason = str(reason_code)
        self.stats.last_disconnect_at = now
        up_for = now - (self.stats.last_connect_at or now)
        if was_connected and up_for >= max(30.0, 2 * self.config.keepalive_s):
            self._failures = 0  # a connection that held resets the backoff
        (log.info if self._closing else log.debug if self._refusal else log.warning)(
            "mqtt_disconnected", reason=str(reason_code), was_connected=was_connected,
            up_for_s=round(up_for, 2), inflight_dropped=inflight)
        if self._closing:
            return
        if self._connecting_since is not None or was_connected:
            self._connect_failed(now, f"disconnected: {reason_code}")

    def _on_publish(self, client: mqtt.Client, userdata: Any, mid: int,
                    reason_code: Any, properties: Any) -> None:
        seq = self._inflight.pop(mid, None)
        if seq is None:
            return  # presence message, or a paho resend from before a reconnect
        code = int(getattr(reason_code, "value", 0))
        if code >= 0x80 and code not in TRANSIENT_REASONS:
            if self.outbox.quarantine(seq, f"broker refused: {reason_code} (0x{code:02x})",
                                      "oversized" if code == 0x95 else "refused"):
                self.stats.quarantined += 1
        elif code >= 0x80:
            log.warning("mqtt_publish_deferred", seq=seq, reason=str(reason_code))

    def _on_subscribe(self, client: mqtt.Client, userdata: Any, mid: int,
                      reason_codes: Any, properties: Any) -> None:
        for rc in reason_codes:
            if getattr(rc, "is_failure", False):
                log.error("mqtt_ack_subscription_refused", topic=self._ack_topic,
                          reason=str(rc))

    def _on_message(self, client: mqtt.Client, userdata: Any, msg: mqtt.MQTTMessage) -> None:
        if msg.topic != self._ack_topic:
            return
        try:
            ack = msgpack.unpackb(msg.payload, raw=False)
            if not (isinstance(ack, dict) and ack.get("type") == "ack"
                    and ack.get("device") == self.outbox.device
                    and isinstance(ack.get("epoch"), str) and isinstance(ack.get("seq"), int)
                    and not isinstance(ack.get("seq"), bool)):
                raise ValueError("not an ack for this device")
        except (ValueError, msgpack.ExtraData, msgpack.FormatError, msgpack.StackError) as exc:
            log.warning("mqtt_bad_ack", topic=msg.topic, error=str(exc), size=len(msg.payload))
            return
        self.stats.acks += 1
        removed = self.outbox.acknowledge(ack["epoch"], ack["seq"])
        self.stats.rows_acknowledged += removed
        log.debug("mqtt_ack", epoch=ack["epoch"], seq=ack["seq"], removed=removed)

    # ------------------------------------------------------------------- loop
    def _packet_limit(self) -> int:
        limit = self.config.max_packet_bytes
        if self._server_max_packet:
            limit = min(limit, self._server_max_packet)
        return limit

    def _pump(self, now: float) -> None:
        room = self._window - len(self._inflight)
        if room <= 0:
            return
        # The overdue scan walks every unacknowledged row, so it runs at most every
        # resend_check_s -- unless the last scan found overdue rows: then a backlog is being
        # resent and the window is refilled at once (otherwise a collector that missed a large
        # backlog would get it back at one window per resend_check_s).
        include_overdue = (self._overdue_backlog
                           or now - self._last_resend_check >= self.config.resend_check_s)
        if include_overdue:
            self._last_resend_check = now
        rows = self.outbox.due(room, skip=tuple(self._inflight.values()),
                               include_overdue=include_overdue)
        if include_overdue:
            self._overdue_backlog = any(r.published_at is not None for r in rows)
        published: list[int] = []
        limit = self._packet_limit()
        for row in rows:
            if self._max_attempts and row.attempts >= self._max_attempts:
                if self.outbox.quarantine(row.seq, "no collector acknowledgement after "
                                          f"{row.attempts} attempts", "unacknowledged"):
                    self.stats.quarantined += 1
                continue
            size = codec.publish_packet_size(len(row.topic.encode()), len(row.payload))
            if size > limit:
                if self.outbox.quarantine(row.seq, f"packet too large for the broker "
                                          f"({size} > {limit} bytes)", "oversized"):
                    self.stats.quarantined += 1
                continue
            info = self._client.publish(row.topic, row.payload, qos=1)
            if info.rc == mqtt.MQTT_ERR_SUCCESS:
                self._inflight[info.mid] = row.seq
                published.append(row.seq)
            else:
                break  # queue full or connection gone: the row stays due
        if published:
            self.outbox.mark_published(published, ack_timeout_s=self.config.ack_timeout_s,
                                       ack_timeout_max_s=self.config.ack_timeout_max_s)
            self.stats.published += len(published)

    def step(self, timeout: float = 0.05) -> None:
        """One iteration: connect if due, run paho's network loop, publish what fits."""
        now = self._now()
        if not self._connected:
            if self._connecting_since is None:
                if now >= self._next_attempt:
                    self._try_connect(now)
            elif now - self._connecting_since > self.config.connect_timeout_s:
                self._connect_failed(now, "no CONNACK within connect timeout")
                self._client.disconnect()
        rc = self._client.loop(timeout=timeout)
        if rc == mqtt.MQTT_ERR_NO_CONN and not self._connected:
            time.sleep(min(timeout, max(0.0, self._next_attempt - self._now())))
        if self._connected:
            self._pump(self._now())
        if now - self._last_heartbeat >= self.config.heartbeat_s:
            self._last_heartbeat = now
            self.outbox.heartbeat()

    def run(self, stop: threading.Event, *, max_seconds: float | None = None) -> None:
        """Loop until ``stop`` is set (or ``max_seconds`` passed), then close cleanly."""
        log.info("publisher_start", device=self.outbox.device, epoch=self.outbox.epoch,
                 previous_run=self.outbox.previous_run, host=self.config.host,
                 port=self.config.port, protocol=self.config.protocol, tls=self.config.tls)
        self._closing = False
        deadline = None if max_seconds is None else self._now() + max_seconds
        try:
            while not stop.is_set() and (deadline is None or self._now() < deadline):
                try:
                    self.step()
                except Exception:  # the publisher thread must not die
                    # e.g. a full disk under the outbox: loud in the log, retried each second;
                    # nothing is lost, the rows stay in the outbox.
                    log.exception("publisher_step_failed")
                    stop.wait(1.0)
        finally:
            self.close()

    def close(self, timeout: float = 2.0) -> None:
        """Publish the retained "offline" presence (a clean DISCONNECT suppresses the Will)."""
        self._closing = True
        if self._connected:
            info = self._client.publish(self._presence_topic,
                                        self._presence("offline", self.stop_reason),
                                        qos=1, retain=True)
            end = self._now() + timeout
            while not info.is_published() and self._connected and self._now() < end:
                self._client.loop(timeout=0.05)
            self._client.disconnect()
            self._client.loop(timeout=0.05)
        self._connected = False
        self.outbox.heartbeat()
