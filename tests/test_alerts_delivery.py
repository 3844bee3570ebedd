"""Alert delivery against real receivers: an HTTP server and an SMTP server (aiosmtpd) on
127.0.0.1 that are stopped and started again mid-test, over a real recorder store (SQLite
file and PostgreSQL).

What is checked (the project's delivery contract, agent/alerts/deliver.py): every alert
reaches every channel exactly once once the receivers are back, in the order raised; one
channel being down does not hold up another; a refusal that cannot succeed (HTTP 400, RFC 9110
section 15.5.1) is not retried; the idempotency key travels as the HTTP ``Idempotency-Key``
header and the mail ``Message-ID`` (RFC 5322 section 3.6.4).
"""

from __future__ import annotations

import subprocess
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import pytest
from _alert_helpers import SmtpReceiver, WebhookReceiver, wait_for
from _store_helpers import pg_database, schema_url

from agent.alerts.config import AlertSettings, EmailSettings, WebhookSettings
from agent.alerts.deliver import AlertSender, EmailChannel, WebhookChannel, backoff_s
from agent.alerts.engine import alert_body
from agent.alerts.rules import AlertRule
from agent.store import alerts as q
from agent.store.recorder import RecorderStore

__all__ = ["pg_database"]  # the fixture, imported for pytest
T0 = 1_700_000_000.0
RULE = AlertRule("lost-power", "lost_power")


@pytest.fixture(params=["sqlite", "postgresql"])
def store(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[RecorderStore]:
    """A real SQLite file, or a fresh schema of the test PostgreSQL database."""
    if request.param == "sqlite":
        url = f"sqlite:///{tmp_path / 'recorder.db'}"
    else:
        url = schema_url(request.getfixturevalue("pg_database"))
    s = RecorderStore(url, tmp_path / "captures")
    yield s
    s.close()


def settings(web: WebhookReceiver | None, smtp: SmtpReceiver | None, **kw: Any) -> AlertSettings:
    return AlertSettings(
        rules=(RULE,), mqtt=False,
        webhook=WebhookSettings(f"http://127.0.0.1:{web.port}/hook", timeout_s=2.0,
                                headers={"X-Site-Key": "invented"}) if web else None,
        email=EmailSettings("127.0.0.1", smtp.port, "collector@invented.example",
                            ("manager@invented.example",), starttls=False,
                            timeout_s=2.0) if smtp else None,
        retry_min_s=0.05, retry_max_s=0.4, **kw)


def raise_alerts(store: RecorderStore, cfg: AlertSettings, first: int, n: int) -> list[str]:
    """Queue ``n`` alerts (units u<first>..) in one transaction, as the engine does."""
    ids = []

    def work(db: Any) -> None:
        for i in range(first, first + n):
            alert = alert_body(RULE, "raised", f"u{i}", "invented-street", f"u{i}", T0 + i,
                               n=1, reason="invented")
            q.enqueue(db, alert, cfg.channels, T0 + i)
            ids.append(alert["alert_id"])

    store.db.run_in_transaction(work)
    return ids


class SenderThread:
    """The sender in a thread with its own store connection, as in the collector."""

    def __init__(self, store: RecorderStore, cfg: AlertSettings) -> None:
        channels: list[Any] = []
        if cfg.webhook:
            channels.append(WebhookChannel(cfg.webhook))
        if cfg.email:
            channels.append(EmailChannel(cfg.email))
        self.url, self.channels, self.cfg = store.db.url, channels, cfg
        self.sender: AlertSender | None = None
        self.ready = threading.Event()
        self.stop = threading.Event()
        self.thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        own = RecorderStore(self.url, "captures", migrate=False)
        try:
            self.sender = AlertSender(own.db, self.channels, self.cfg)
            self.ready.set()
            self.sender.run(self.stop, poll_s=0.05)
        finally:
            own.close()

    def __enter__(self) -> AlertSender:
        self.thread.start()
        assert self.ready.wait(10) and self.sender is not None
        return self.sender

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        self.thread.join(10)


def test_backoff_doubles_to_a_cap() -> None:
    assert [backoff_s(n, 5.0, 60.0) for n in range(1, 7)] == [5, 10, 20, 40, 60, 60]


def test_every_alert_exactly_once_across_server_restarts(store: RecorderStore,
                                                        tmp_path: Path) -> None:
    web, smtp = WebhookReceiver().start(), SmtpReceiver().start()
    cfg = settings(web, smtp)
    try:
        with SenderThread(store, cfg) as sender:
            ids = raise_alerts(store, cfg, 0, 5)
            assert wait_for(lambda: len(web.ids) == 5 and len(smtp.ids) == 5, 20)
            # Both receivers go away; alerts keep being raised meanwhile.
            web.stop()
            smtp.stop()
            ids += raise_alerts(store, cfg, 5, 10)
            assert wait_for(lambda: sender.stats.failures.get("webhook", 0) >= 2
                            and sender.stats.failures.get("email", 0) >= 2, 20)
            assert q.backlog(store.db) == {"webhook": 10, "email": 10}
            # Back on the same ports; more alerts arrive while the retries catch up.
            web.start()
            smtp.start()
            ids += raise_alerts(store, cfg, 15, 5)
            assert wait_for(lambda: len(web.ids) >= 20 and len(smtp.ids) >= 20, 30)
            assert wait_for(lambda: q.backlog(store.db) == {}, 10)
        # Exactly once each, in the order raised, on both channels.
        assert web.ids == ids and smtp.ids == ids
        assert [body["alert_id"] for _, body in web.got] == ids
        assert sender.stats.sent == {"webhook": 20, "email": 20}
        mail = smtp.got[0]
        assert mail["Message-ID"] == "<lost-power.u0.1.raised@halfcycle.alerts>"
        assert "lost-power raised: u0" in mail["Subject"]
    finally:
        web.stop()
        smtp.stop()


def test_one_channel_down_does_not_block_another(store: RecorderStore, tmp_path: Path) -> None:
    web, smtp = WebhookReceiver(), SmtpReceiver().start()  # the webhook is not up yet
    cfg = settings(web, smtp)
    try:
        with SenderThread(store, cfg):
            ids = raise_alerts(store, cfg, 0, 8)
            assert wait_for(lambda: len(smtp.ids) == 8, 20)
            assert web.ids == [] and q.backlog(store.db) == {"webhook": 8}
            web.start()
            assert wait_for(lambda: len(web.ids) == 8, 20)
        assert web.ids == ids and smtp.ids == ids
    finally:
        web.stop()
        smtp.stop()


def test_a_refused_alert_is_not_retried_and_holds_nothing(store: RecorderStore) -> None:
    # The receiver refuses u2 with 400 Bad Request (RFC 9110: do not repeat unchanged).
    web = WebhookReceiver(status_for=lambda b: 400 if b["device"] == "u2" else 200).start()
    cfg = settings(web, None)
    try:
        with SenderThread(store, cfg) as sender:
            ids = raise_alerts(store, cfg, 0, 5)
            assert wait_for(lambda: len(web.ids) == 4, 20)
        assert web.ids == [i for i in ids if ":u2:" not in i]
        assert sender.stats.rejected == {"webhook": 1}
        row = store.db.query_one("SELECT alert_id, rejected, last_error FROM alert_queue")
        assert row == ("lost-power:u2:1:raised", 1, "webhook: HTTP 400")
        assert q.backlog(store.db) == {}
    finally:
        web.stop()


def test_smtp_starttls_and_login(store: RecorderStore, tmp_path: Path) -> None:
    """STARTTLS (RFC 3207) and AUTH LOGIN against aiosmtpd with a self-signed certificate;
    the password comes from a file, as the config's ``password_file`` gives it."""
    import ssl

    key, cert = tmp_path / "key.pem", tmp_path / "cert.pem"
    subprocess.run(["openssl", "req", "-x509", "-newkey", "rsa:2048", "-nodes", "-days", "1",
                    "-subj", "/CN=127.0.0.1", "-addext", "subjectAltName=IP:127.0.0.1",
                    "-keyout", str(key), "-out", str(cert)], check=True, capture_output=True)
    server_tls = ssl.create_default_context(ssl.Purpose.CLIENT_AUTH)
    server_tls.load_cert_chain(cert, key)
    logins: list[tuple[bytes, bytes]] = []

    def authenticator(_server: Any, _session: Any, _env: Any, mechanism: str,
                      data: Any) -> Any:
        from aiosmtpd.smtp import AuthResult, LoginPassword

        ok = isinstance(data, LoginPassword) and data.password == b"s3cret-invented"
        if isinstance(data, LoginPassword):
            logins.append((data.login, data.password))
        return AuthResult(success=ok)

    smtp = SmtpReceiver(tls_context=server_tls, require_starttls=True,
                        authenticator=authenticator, auth_require_tls=True).start()
    client_tls = ssl.create_default_context(cafile=str(cert))
    try:
        cfg = EmailSettings("127.0.0.1", smtp.port, "collector@invented.example",
                            ("manager@invented.example",), starttls=True,
                            username="collector", password="s3cret-invented", timeout_s=5.0)
        channel = EmailChannel(cfg, tls_context=client_tls)
        alert = alert_body(RULE, "raised", "u1", "invented-street", "u1", T0, n=1)
        channel.send(alert)
        assert smtp.ids == ["lost-power:u1:1:raised"]
        assert logins == [(b"collector", b"s3cret-invented")]
        bad = EmailChannel(EmailSettings(**{**cfg.__dict__, "password": "wrong"}),
                           tls_context=client_tls)
        from agent.alerts.deliver import DeliveryError

        with pytest.raises(DeliveryError):
            bad.send(alert)
        assert len(smtp.ids) == 1  # a refused login delivers nothing
    finally:
        smtp.stop()
