"""The example configurations in deploy/ load, and the simulated-source example makes a dry
run without hardware (the broker it names is replaced by a closed loopback port: the agent
measures into its outbox and says it cannot connect)."""

from __future__ import annotations

import json
import shutil
import sqlite3
import subprocess
import sys
from pathlib import Path

import pytest
from _mqtt_helpers import free_port

from agent.collect.service import load_collector_settings

ROOT = Path(__file__).resolve().parents[1]


def test_sim_example_dry_run(tmp_path: Path) -> None:
    for name in ("edge.sim.example.toml", "sim-scenario.example.toml"):
        shutil.copy(ROOT / "deploy" / name, tmp_path / name)
    cfg = tmp_path / "edge.sim.example.toml"
    cfg.write_text(cfg.read_text().replace("port = 1883", f"port = {free_port()}"))
    (tmp_path / "sim-unit-1.password").write_text("invented-password\n")
    done = subprocess.run([sys.executable, "-m", "agent.cli.main", "edge", "run", "--config",
                           str(cfg), "--fast", "--max-seconds", "700", "--drain-timeout", "0"],
                          cwd=tmp_path, capture_output=True, text=True, timeout=300,
                          check=False)
    assert done.returncode == 0, done.stderr[-2000:]
    lines = [json.loads(x) for x in done.stderr.splitlines() if x.startswith("{")]
    assert any(e["event"] == "mqtt_connect_failed" for e in lines)
    db = sqlite3.connect(tmp_path / "state" / "outbox.sqlite")
    try:
        topics = [r[0] for r in db.execute("SELECT topic FROM outbox")]
    finally:
        db.close()
    # The scenario's invented dip at 600 s was detected and queued, with the summaries.
    assert "hc/v1/dry-run-street/sim-unit-1/event" in topics
    assert "hc/v1/dry-run-street/sim-unit-1/summary" in topics


def test_collector_example_loads(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    creds = tmp_path / "creds"
    creds.mkdir()
    (creds / "collector.password").write_text("pw\n")
    (tmp_path / "tsdb.token").write_text("tok\n")
    (tmp_path / "smtp.password").write_text("mail\n")
    (tmp_path / "ca.crt").write_text("not read at load time\n")
    text = (ROOT / "deploy" / "collector.example.toml").read_text()
    text = text.replace("/etc/halfcycle/", f"{tmp_path}/").replace("/var/lib/halfcycle",
                                                                   str(tmp_path))
    cfg = tmp_path / "collector.toml"
    cfg.write_text(text)
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(creds))
    s = load_collector_settings(cfg)
    assert s.mqtt.password == "pw" and s.export is not None and s.export.token == "tok"
    assert s.metrics is not None and s.metrics.loopback and s.metrics.port == 9464
    assert s.alerts is not None and s.alerts.email is not None
    assert s.alerts.email.password == "mail"
    assert s.retention.trend_days == 90 and s.retention.capture_days == 365
