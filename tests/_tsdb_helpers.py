"""Test helpers for the time-series export: a real VictoriaMetrics server on a loopback port,
an SQLite export queue that follows :class:`agent.store.export.ExportQueue`, and a small
scripted HTTP server for the error paths.

VictoriaMetrics (Debian package ``victoria-metrics``) accepts the InfluxDB v2 write API at
``/api/v2/write`` and stores each field as the series ``{measurement}_{field}`` with the tags as
labels. It stores string fields as 0 and makes new samples visible after a short delay, so
reads poll (bounded in count and time).
"""

from __future__ import annotations

import json
import shutil
import socket
import sqlite3
import subprocess
import threading
import time
import urllib.error
import urllib.parse
import urllib.request
from collections.abc import Callable, Iterator, Sequence
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from pathlib import Path
from typing import Any

import pytest

from agent.store.recorder import from_json, to_json

VM_BINARY = shutil.which("victoria-metrics") or "/usr/bin/victoria-metrics"


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


class VictoriaMetrics:
    """One VictoriaMetrics process on 127.0.0.1; stop/start keep the port and the data."""

    def __init__(self, data_dir: Path, port: int | None = None) -> None:
        self.data_dir = data_dir
        self.port = port or free_port()
        self.url = f"http://127.0.0.1:{self.port}"
        self.proc: subprocess.Popen[bytes] | None = None
        self.log_path = data_dir.parent / f"vm-{self.port}.log"

    def start(self, timeout_s: float = 20.0) -> None:
        assert self.proc is None, "already running"
        log = self.log_path.open("ab")
        self.proc = subprocess.Popen(
            [VM_BINARY, f"-httpListenAddr=127.0.0.1:{self.port}",
             f"-storageDataPath={self.data_dir}", "-retentionPeriod=100y",
             # keep one sample per series per millisecond: a rewritten point is not a duplicate
             "-dedup.minScrapeInterval=1ms"],
            stdout=log, stderr=subprocess.STDOUT)
        log.close()
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"victoria-metrics exited: see {self.log_path}")
            try:
                with urllib.request.urlopen(self.url + "/health", timeout=1) as r:
                    if r.status == 200:
                        return
            except (urllib.error.URLError, OSError):
                pass
            time.sleep(0.1)
        self.stop()
        raise RuntimeError(f"victoria-metrics did not become healthy in {timeout_s} s")

    def stop(self, timeout_s: float = 20.0) -> None:
        if self.proc is None:
            return
        self.proc.terminate()  # graceful: flushes in-memory samples to disk
        try:
            self.proc.wait(timeout=timeout_s)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait(timeout=5)
        self.proc = None

    def restart(self) -> None:
        self.stop()
        self.start()

    # -- reading back ------------------------------------------------------------------------

    def export(self, match: str) -> list[dict[str, Any]]:
        """All series matching ``match`` via /api/v1/export (JSON lines, one series each)."""
        data = urllib.parse.urlencode({"match[]": match}).encode()
        with urllib.request.urlopen(self.url + "/api/v1/export", data=data, timeout=10) as r:
            text = r.read().decode()
        return [json.loads(line) for line in text.splitlines() if line.strip()]

    def poll_export(self, match: str, done: Callable[[list[dict[str, Any]]], bool],
                    timeout_s: float = 30.0, interval_s: float = 0.25) -> list[dict[str, Any]]:
        """Re-read ``match`` until ``done(series)`` or the timeout; returns the last read."""
        deadline = time.monotonic() + timeout_s
        series = self.export(match)
        while not done(series) and time.monotonic() < deadline:
            time.sleep(interval_s)
            series = self.export(match)
        return series


def sample_count(series: list[dict[str, Any]]) -> int:
    return sum(len(s["timestamps"]) for s in series)


@pytest.fixture
def victoria_metrics(tmp_path: Path) -> Iterator[VictoriaMetrics]:
    if not Path(VM_BINARY).exists():
        pytest.skip("victoria-metrics is not installed (Debian package victoria-metrics)")
    server = VictoriaMetrics(tmp_path / "vmdata")
    server.start()
    try:
        yield server
    finally:
        server.stop()


class SqliteExportQueue:
    """An export queue in SQLite with the protocol of agent.store.export.ExportQueue; payloads
    are stored as the recorder store stores them (``agent.store.recorder.to_json``).

    ``claim_exports`` returns the oldest uncompleted rows; ``complete_exports`` deletes them;
    ``reject_exports`` moves them to a dead-letter table with the reason.
    """

    def __init__(self, path: Path | str = ":memory:") -> None:
        self.db = sqlite3.connect(str(path), check_same_thread=False)
        self.db.executescript(
            "CREATE TABLE IF NOT EXISTS export_queue (id INTEGER PRIMARY KEY AUTOINCREMENT,"
            " kind TEXT NOT NULL, payload TEXT NOT NULL);"
            "CREATE TABLE IF NOT EXISTS export_rejected (id INTEGER PRIMARY KEY, kind TEXT,"
            " payload TEXT, reason TEXT);")
        self.claims = 0
        self.fail_next_complete = 0  # simulate a crash between write and complete

    def enqueue(self, kind: str, payload: dict[str, Any]) -> int:
        with self.db:
            cur = self.db.execute("INSERT INTO export_queue (kind, payload) VALUES (?, ?)",
                                  (kind, to_json(payload)))
        return int(cur.lastrowid or 0)

    def claim_exports(self, limit: int) -> list[tuple[int, str, dict[str, Any]]]:
        self.claims += 1
        rows = self.db.execute("SELECT id, kind, payload FROM export_queue ORDER BY id LIMIT ?",
                               (limit,)).fetchall()
        return [(int(i), str(k), from_json(p)) for i, k, p in rows]

    def complete_exports(self, ids: Sequence[int]) -> None:
        if self.fail_next_complete:
            self.fail_next_complete -= 1
            raise RuntimeError("simulated crash before complete")
        with self.db:
            self.db.executemany("DELETE FROM export_queue WHERE id = ?", [(i,) for i in ids])

    def reject_exports(self, ids: Sequence[int], reason: str) -> None:
        with self.db:
            for i in ids:
                row = self.db.execute("SELECT kind, payload FROM export_queue WHERE id = ?",
                                      (i,)).fetchone()
                assert row is not None, f"rejecting unknown row {i}"
                self.db.execute("INSERT INTO export_rejected VALUES (?, ?, ?, ?)",
                                (i, row[0], row[1], reason))
                self.db.execute("DELETE FROM export_queue WHERE id = ?", (i,))

    def pending(self) -> int:
        return int(self.db.execute("SELECT count(*) FROM export_queue").fetchone()[0])

    def rejected(self) -> list[tuple[int, str, str]]:
        return [(int(i), k, r) for i, k, r in
                self.db.execute("SELECT id, kind, reason FROM export_rejected ORDER BY id")]


class PlainSqliteQueue:
    """The same queue without reject_exports (the exporter must use a dead-letter file)."""

    def __init__(self) -> None:
        self.inner = SqliteExportQueue()

    def claim_exports(self, limit: int) -> list[tuple[int, str, dict[str, Any]]]:
        return self.inner.claim_exports(limit)

    def complete_exports(self, ids: Sequence[int]) -> None:
        self.inner.complete_exports(ids)


class ScriptedWriteServer:
    """A loopback HTTP server for /api/v2/write whose answer a test decides per request.

    ``respond(body) -> (status, text)``; every request's path (with query), Authorization
    header and body are recorded.
    """

    def __init__(self, respond: Callable[[str], tuple[int, str]]) -> None:
        self.respond = respond
        self.requests: list[tuple[str, str, str]] = []
        outer = self

        class Handler(BaseHTTPRequestHandler):
            def do_POST(self) -> None:
                n = int(self.headers.get("Content-Length", "0"))
                body = self.rfile.read(n).decode()
                outer.requests.append((self.path, self.headers.get("Authorization", ""), body))
                status, text = outer.respond(body)
                payload = text.encode()
                self.send_response(status)
                self.send_header("Content-Type", "application/json")
                self.send_header("Content-Length", str(len(payload)))
                self.end_headers()
                self.wfile.write(payload)

            def log_message(self, *args: Any) -> None:
                pass

        self.httpd = ThreadingHTTPServer(("127.0.0.1", 0), Handler)
        self.url = f"http://127.0.0.1:{self.httpd.server_address[1]}"
        self.thread = threading.Thread(target=self.httpd.serve_forever, daemon=True)

    def __enter__(self) -> ScriptedWriteServer:
        self.thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self.httpd.shutdown()
        self.httpd.server_close()
        self.thread.join(timeout=5)
