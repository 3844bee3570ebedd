"""Stores and servers for the page tests: a small invented demo run (real Mosquitto,
collector and SQLite store), a live page served by uvicorn on a free loopback port."""

from __future__ import annotations

import shutil
import socket
import subprocess
import sys
import threading
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[1]
URL = "sqlite:///{}"


def needs_mosquitto() -> None:
    if shutil.which("mosquitto") is None and not Path("/usr/sbin/mosquitto").exists():
        pytest.skip("needs Debian's mosquitto package")


@pytest.fixture(scope="session")
def demo_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """One reduced demo run (3 invented homes, 12 s) shared by the page tests: its store,
    captures and static HTML report in ``report/``."""
    needs_mosquitto()
    root = tmp_path_factory.mktemp("pages") / "demo"
    done = subprocess.run(
        [sys.executable, "-m", "agent.cli.main", "demo", "--homes", "3", "--seconds", "12",
         "--dir", str(root), "--tz", "Europe/Berlin"],
        capture_output=True, text=True, timeout=240, check=False, cwd=ROOT)
    assert done.returncode == 0, done.stderr[-3000:]
    return root


def copy_store(demo: Path, dest: Path) -> tuple[str, Path]:
    """A private copy of the demo's store (URL, captures folder) a test may change."""
    dest.mkdir(parents=True, exist_ok=True)
    src = sqlite3_backup(demo / "recorder.db", dest / "recorder.db")
    shutil.copytree(demo / "captures", dest / "captures")
    return URL.format(src), dest / "captures"


def sqlite3_backup(src: Path, dst: Path) -> Path:
    import sqlite3

    with sqlite3.connect(src) as a, sqlite3.connect(dst) as b:
        a.backup(b)
    return dst


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@contextmanager
def live_server(app: Any) -> Iterator[str]:
    """Serve an ASGI app with uvicorn on 127.0.0.1 in a thread; yields its base URL."""
    import uvicorn

    port = free_port()
    server = uvicorn.Server(uvicorn.Config(app, host="127.0.0.1", port=port,
                                           log_level="warning", access_log=False))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        assert time.monotonic() < deadline and thread.is_alive(), "uvicorn did not start"
        time.sleep(0.05)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=20)
