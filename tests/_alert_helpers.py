"""Real receivers for the alert tests: an HTTP server (http.server in a thread) and an SMTP
server (aiosmtpd), both on 127.0.0.1, that can be stopped and started again on the same port;
and an MQTT subscriber on the test's Mosquitto."""

from __future__ import annotations

import email
import email.policy
import json
import threading
from collections.abc import Callable
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from typing import Any

import paho.mqtt.client as mqtt
from _mqtt_helpers import client, free_port, wait_for
from aiosmtpd.controller import Controller


class WebhookReceiver:
    """Records every POSTed alert (its ``Idempotency-Key`` and JSON body), in order."""

    def __init__(self, port: int | None = None, *,
                 status_for: Callable[[dict[str, Any]], int] | None = None) -> None:
        self.port = port or free_port()
        self.got: list[tuple[str, dict[str, Any]]] = []
        self.status_for = status_for or (lambda _body: 200)
        self._server: ThreadingHTTPServer | None = None
        self._lock = threading.Lock()

    def start(self) -> WebhookReceiver:
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                body = json.loads(self.rfile.read(int(self.headers["Content-Length"])))
                status = outer.status_for(body)
                if status < 300:
                    with outer._lock:
                        outer.got.append((self.headers["Idempotency-Key"], body))
                self.send_response(status)
                self.send_header("Content-Length", "0")
                self.end_headers()

            def log_message(self, *args: Any) -> None:
                pass

        ThreadingHTTPServer.allow_reuse_address = True
        self._server = ThreadingHTTPServer(("127.0.0.1", self.port), Handler)
        threading.Thread(target=self._server.serve_forever, daemon=True).start()
        return self

    def stop(self) -> None:
        if self._server is not None:
            self._server.shutdown()
            self._server.server_close()
            self._server = None

    @property
    def ids(self) -> list[str]:
        with self._lock:
            return [k for k, _ in self.got]


class _Handler:
    def __init__(self, outer: SmtpReceiver) -> None:
        self.outer = outer

    async def handle_DATA(self, server: Any, session: Any, envelope: Any) -> str:
        msg = email.message_from_bytes(envelope.content, policy=email.policy.default)
        with self.outer._lock:
            self.outer.got.append(msg)
        return "250 OK"


class SmtpReceiver:
    """aiosmtpd on 127.0.0.1; ``got`` holds the parsed messages."""

    def __init__(self, port: int | None = None, **controller_kw: Any) -> None:
        self.port = port or free_port()
        self.got: list[email.message.EmailMessage] = []
        self._lock = threading.Lock()
        self._kw = controller_kw
        self._controller: Controller | None = None

    def start(self) -> SmtpReceiver:
        self._controller = Controller(_Handler(self), hostname="127.0.0.1", port=self.port,
                                      **self._kw)
        self._controller.start()
        return self

    def stop(self) -> None:
        if self._controller is not None:
            self._controller.stop()
            self._controller = None

    @property
    def ids(self) -> list[str]:
        with self._lock:
            return [str(m["X-Halfcycle-Alert-Id"]) for m in self.got]


class AlertSubscriber:
    """Subscribes to ``hc/v1/+/alerts/#`` with the collector's credentials (the ACL lets the
    collector read all of hc/v1)."""

    def __init__(self, port: int, password: str) -> None:
        self.got: list[tuple[str, dict[str, Any], bool]] = []
        self._lock = threading.Lock()
        self.c = client(port, "collector", password, client_id="alert-watcher")
        self.c.on_message = self._on_message
        self.c.connect("127.0.0.1", port)
        self.c.subscribe("hc/v1/+/alerts/#", qos=1)
        self.c.loop_start()

    def _on_message(self, _c: mqtt.Client, _u: Any, m: mqtt.MQTTMessage) -> None:
        with self._lock:
            self.got.append((m.topic, json.loads(m.payload), bool(m.retain)))

    def ids(self) -> list[str]:
        with self._lock:
            return [body["alert_id"] for _, body, _ in self.got]

    def close(self) -> None:
        self.c.loop_stop()
        self.c.disconnect()


__all__ = ["AlertSubscriber", "SmtpReceiver", "WebhookReceiver", "wait_for"]
