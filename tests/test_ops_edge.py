"""Edge agent faults that used to look like weather (issue 9), with a real Mosquitto: a wrong
password or a CA that did not sign the broker's certificate is said once, as an error, while
the agent keeps measuring into its outbox; an edge config without [mqtt] is refused."""

from __future__ import annotations

import json
import sqlite3
import subprocess
import sys
from pathlib import Path

from _fleet_helpers import make_fleet
from _mqtt_helpers import make_broker

from agent.broker.setup import make_test_certificates

ROOT = Path(__file__).resolve().parents[1]


def run_agent(config: Path, cwd: Path, seconds: float = 6.0) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "agent.cli.main", "edge", "run", "--config",
                           str(config), "--speed", "3", "--max-seconds", str(seconds * 3),
                           "--drain-timeout", "3", "--log-level", "debug"], cwd=cwd,
                          capture_output=True, text=True, timeout=90, check=False)


def log_lines(stderr: str) -> list[dict]:
    return [json.loads(x) for x in stderr.splitlines() if x.startswith("{")]


def outbox_rows(config: Path) -> int:
    db = sqlite3.connect(config.parent / "state" / "outbox.sqlite")
    try:
        return int(db.execute("SELECT COUNT(*) FROM outbox").fetchone()[0])
    finally:
        db.close()


def test_wrong_password_is_said_once_and_measuring_goes_on(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 1, duration=30.0, summary=2)
    try:
        cfg = fleet.edge_configs["home-1"]
        (cfg.parent / "password").write_text("not-the-password\n")
        done = run_agent(cfg, tmp_path)
    finally:
        fleet.stop_all()
    lines = log_lines(done.stderr)
    refused = [e for e in lines if e["event"] == "mqtt_connect_refused"
               and e["level"] == "error"]
    retries = [e for e in lines if e["event"] == "mqtt_connect_refused"
               and e["level"] == "debug"]
    assert len(refused) == 1, refused  # said once ...
    assert refused[0]["cause"] == "credentials" and "home-1" in refused[0]["message"]
    assert len(retries) >= 2  # ... while it keeps retrying (quietly, at debug level)
    assert "not-the-password" not in done.stderr
    assert not [e for e in lines if e["level"] == "warning" and e["event"].startswith("mqtt")]
    assert outbox_rows(cfg) > 0  # measured into the outbox all along


def test_untrusted_broker_certificate_is_said_once(tmp_path: Path) -> None:
    broker = make_broker(tmp_path, tls=True)
    password = broker.add_device("home-1")
    other_ca = tmp_path / "other-ca"
    make_test_certificates(other_ca)  # a CA that did not sign the broker's certificate
    broker.start()
    try:
        ddir = tmp_path / "home-1"
        ddir.mkdir()
        (ddir / "password").write_text(password)
        fleet_root = make_fleet.__globals__
        scenario = fleet_root["SCENARIO"].format(device="home-1", seed=1, duration=30.0,
                                                 events="")
        (ddir / "scenario.toml").write_text(scenario)
        edge = fleet_root["EDGE"].format(device="home-1", port=broker.port, summary=2)
        edge = edge.replace("tls = false", f'tls = true\nca_file = "{other_ca / "ca.crt"}"')
        (ddir / "edge.toml").write_text(edge)
        done = run_agent(ddir / "edge.toml", tmp_path)
    finally:
        broker.stop()
    lines = log_lines(done.stderr)
    refused = [e for e in lines if e["event"] == "mqtt_connect_refused"
               and e["level"] == "error"]
    assert len(refused) == 1, done.stderr[-2000:]
    assert refused[0]["cause"] == "certificate"
    assert "certificate" in refused[0]["message"]
    assert refused[0]["ca_file"].endswith("other-ca/ca.crt")
    assert outbox_rows(ddir / "edge.toml") > 0


def test_edge_config_without_mqtt_is_refused(tmp_path: Path) -> None:
    fleet = make_fleet(tmp_path, 1, duration=5.0)
    fleet.broker.stop()
    cfg = fleet.edge_configs["home-1"]
    text = cfg.read_text()
    cfg.write_text(text[:text.index("[mqtt]")])
    done = run_agent(cfg, tmp_path)
    assert done.returncode == 2
    assert done.stderr.strip().splitlines()[-1].endswith(
        "mqtt: required table is missing: the agent needs its broker (host, port, tls, "
        "ca_file, password_file); see deploy/edge.example.toml")
    assert "Traceback" not in done.stderr
