"""Alert delivery: MQTT, webhook (HTTP POST of JSON) and e-mail (SMTP), each from its own
rows of the store's alert queue.

Guarantees: at least once per channel. A row leaves the queue only after its channel took the
alert (MQTT: the broker's PUBACK; webhook: a 2xx answer; e-mail: the SMTP server accepted the
message), so a channel that is down loses nothing and holds up no other channel. A crash
between sending and removing the row sends that alert again after the restart; every alert
carries its ``alert_id`` (JSON ``alert_id``, HTTP ``Idempotency-Key`` header, mail
``Message-ID``) so receivers drop the second copy. Within a channel alerts go out in the order
they were raised (a ``cleared`` never overtakes its ``raised``); a failed send is retried with
exponential backoff (``retry_min_s`` doubling up to ``retry_max_s``) and holds the rows behind
it. An answer that can never succeed (HTTP 4xx other than 408 and 429, an SMTP 5xx) marks the
row rejected: kept in the queue for inspection, not retried.

MQTT topics (the broker ACL lets the collector write ``hc/v1/+/alerts/#``):
``hc/v1/{site}/alerts/{device}/{rule}`` for a unit, retained, so a subscriber sees each unit's
current state at once; ``hc/v1/{site}/alerts/_fleet/{rule}`` for fleet notices. Event and
fleet notices are not retained (they are news, not state).
"""

from __future__ import annotations

import email.utils
import json
import smtplib
import ssl
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from email.message import EmailMessage
from typing import Any, Protocol

import structlog

from agent.alerts.config import AlertSettings, EmailSettings, WebhookSettings
from agent.store import alerts as q
from agent.store.db import Database
from agent.wire import topics

log = structlog.get_logger("halfcycle.alerts")


class DeliveryError(Exception):
    """A channel did not take the alert; ``permanent`` when retrying cannot help."""

    def __init__(self, message: str, *, permanent: bool = False) -> None:
        super().__init__(message)
        self.permanent = permanent


class Channel(Protocol):
    name: str

    def send(self, alert: Mapping[str, Any]) -> None: ...


def alert_json(alert: Mapping[str, Any]) -> bytes:
    return json.dumps(alert, sort_keys=True, separators=(",", ":")).encode()


def alert_topic(alert: Mapping[str, Any]) -> str:
    """``hc/v1/{site}/alerts/{device or _fleet}/{rule}``."""
    who = alert.get("device") or "_fleet"
    return f"{topics.PREFIX}/{alert.get('site') or '_fleet'}/alerts/{who}/{alert['rule']}"


class MqttChannel:
    """Publishes on the collector's own MQTT connection (QoS 1; unit alerts retained)."""

    name = "mqtt"

    def __init__(self, client: Any, *, timeout_s: float = 10.0) -> None:
        self.client = client
        self.timeout_s = timeout_s

    def send(self, alert: Mapping[str, Any]) -> None:
        retain = alert.get("change") in ("raised", "cleared")
        try:
            info = self.client.publish(alert_topic(alert), alert_json(alert), qos=1,
                                       retain=retain)
            info.wait_for_publish(self.timeout_s)
        except (RuntimeError, ValueError, OSError) as exc:
            raise DeliveryError(f"mqtt: {exc}") from exc
        if not info.is_published():
            raise DeliveryError(f"mqtt: no PUBACK within {self.timeout_s} s (rc {info.rc})")


class WebhookChannel:
    """HTTP POST of the alert as JSON, with ``Idempotency-Key: <alert_id>``."""

    name = "webhook"

    def __init__(self, cfg: WebhookSettings) -> None:
        self.cfg = cfg

    def send(self, alert: Mapping[str, Any]) -> None:
        headers = {"Content-Type": "application/json", "User-Agent": "halfcycle-alerts",
                   **self.cfg.headers, "Idempotency-Key": str(alert["alert_id"])}
        req = urllib.request.Request(self.cfg.url, data=alert_json(alert), headers=headers,
                                     method="POST")
        try:
            with urllib.request.urlopen(req, timeout=self.cfg.timeout_s) as resp:
                resp.read(65536)
        except urllib.error.HTTPError as exc:
            # RFC 9110: 408 and 429 invite a retry; other 4xx say the request itself is wrong.
            permanent = 400 <= exc.code < 500 and exc.code not in (408, 429)
            raise DeliveryError(f"webhook: HTTP {exc.code}", permanent=permanent) from None
        except (urllib.error.URLError, OSError) as exc:
            raise DeliveryError(f"webhook: {getattr(exc, 'reason', exc)}") from None


class EmailChannel:
    """One mail per alert through an SMTP server (STARTTLS or implicit TLS, optional login)."""

    name = "email"

    def __init__(self, cfg: EmailSettings, *, tls_context: ssl.SSLContext | None = None) -> None:
        self.cfg = cfg
        self.tls_context = tls_context or ssl.create_default_context()

    def message(self, alert: Mapping[str, Any]) -> EmailMessage:
        msg = EmailMessage()
        who = alert.get("device") or f"{alert.get('site')} (fleet)"
        msg["Subject"] = f"[halfcycle] {alert['rule']} {alert['change']}: {who}"
        msg["From"] = self.cfg.sender
        msg["To"] = ", ".join(self.cfg.to)
        msg["Date"] = email.utils.formatdate(float(alert["t_utc"]), usegmt=True)
        # RFC 5322 3.6.4: the same alert is the same Message-ID, so duplicates can be dropped.
        msg["Message-ID"] = f"<{_msgid(str(alert['alert_id']))}@halfcycle.alerts>"
        msg["X-Halfcycle-Alert-Id"] = str(alert["alert_id"])
        lines = [f"{k}: {alert.get(k)}" for k in ("rule", "change", "site", "device", "reason",
                                                  "since_utc", "t_utc")]
        msg.set_content("\n".join(lines) + "\n\n" + json.dumps(alert, indent=1, sort_keys=True)
                        + "\n")
        return msg

    def send(self, alert: Mapping[str, Any]) -> None:
        c = self.cfg
        try:
            if c.ssl:
                server: smtplib.SMTP = smtplib.SMTP_SSL(c.host, c.port, timeout=c.timeout_s,
                                                        context=self.tls_context)
            else:
                server = smtplib.SMTP(c.host, c.port, timeout=c.timeout_s)
            with server:
                if c.starttls:
                    server.starttls(context=self.tls_context)
                if c.username is not None and c.password is not None:
                    server.login(c.username, c.password)
                server.send_message(self.message(alert))
        except smtplib.SMTPResponseException as exc:
            raise DeliveryError(f"email: SMTP {exc.smtp_code} {exc.smtp_error!r}",
                                permanent=500 <= exc.smtp_code < 600) from None
        except smtplib.SMTPRecipientsRefused as exc:
            raise DeliveryError(f"email: recipients refused {exc.recipients}",
                                permanent=True) from None
        except (smtplib.SMTPException, OSError) as exc:
            raise DeliveryError(f"email: {exc}") from None


def _msgid(alert_id: str) -> str:
    """The alert id with the characters a Message-ID left part cannot hold replaced."""
    return "".join(ch if ch.isalnum() or ch in "-._" else "." for ch in alert_id)


def backoff_s(attempts: int, low: float, high: float) -> float:
    """Wait before retry number ``attempts`` (1-based) [s]: ``low`` doubling to ``high``."""
    return min(high, low * 2.0 ** max(0, attempts - 1))


@dataclass
class SendStats:
    sent: dict[str, int] = field(default_factory=dict)
    failures: dict[str, int] = field(default_factory=dict)
    rejected: dict[str, int] = field(default_factory=dict)


class AlertSender:
    """Drains the alert queue, channel by channel (see the module docstring)."""

    def __init__(self, db: Database, channels: list[Channel], settings: AlertSettings, *,
                 clock: Callable[[], float] = time.time) -> None:
        self.db = db
        self.channels = channels
        self.settings = settings
        self.clock = clock
        self.stats = SendStats()

    def pass_once(self) -> int:
        """One pass over every channel; returns the number of alerts delivered."""
        done = 0
        for channel in self.channels:
            done += self._drain(channel)
        return done

    def _drain(self, channel: Channel) -> int:
        rows = q.claim(self.db, channel.name, self.clock())
        done = 0
        for i, row in enumerate(rows):
            try:
                channel.send(row.alert)
            except DeliveryError as exc:
                if exc.permanent:
                    q.reject(self.db, row.id, str(exc))
                    self.stats.rejected[channel.name] = self.stats.rejected.get(channel.name, 0) + 1
                    log.error("alert_rejected", channel=channel.name, alert_id=row.alert_id,
                              error=str(exc))
                    continue
                wait = backoff_s(row.attempts + 1, self.settings.retry_min_s,
                                 self.settings.retry_max_s)
                q.retry_later(self.db, row.id, str(exc), self.clock() + wait)
                q.release(self.db, [r.id for r in rows[i + 1:]])
                self.stats.failures[channel.name] = self.stats.failures.get(channel.name, 0) + 1
                log.warning("alert_delivery_failed", channel=channel.name,
                            alert_id=row.alert_id, attempts=row.attempts + 1,
                            retry_in_s=round(wait, 1), error=str(exc))
                break
            q.delivered(self.db, row.id)
            self.stats.sent[channel.name] = self.stats.sent.get(channel.name, 0) + 1
            done += 1
        return done

    def run(self, stop: threading.Event, *, poll_s: float = 0.5) -> None:
        """Deliver until ``stop``; a store error is logged and retried after a pause."""
        released = False
        while not stop.is_set():
            try:
                if not released:  # claims left by a process that died hold nothing back
                    q.release(self.db)
                    released = True
                busy = self.pass_once()
            except Exception as exc:  # the store is away: wait and retry
                log.error("alert_sender_failed", error=str(exc))
                busy = 0
                stop.wait(2.0)
            if not busy:
                stop.wait(poll_s)


def make_channels(settings: AlertSettings, mqtt_client: Any | None) -> list[Channel]:
    channels: list[Channel] = []
    if settings.mqtt and mqtt_client is not None:
        channels.append(MqttChannel(mqtt_client))
    if settings.webhook is not None:
        channels.append(WebhookChannel(settings.webhook))
    if settings.email is not None:
        channels.append(EmailChannel(settings.email))
    return channels
