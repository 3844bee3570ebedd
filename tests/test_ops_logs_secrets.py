"""Journald-friendly logs and secrets kept out of configurations (issue 9).

Log lines: syslog priority prefix ``<N>`` under systemd (sd-daemon(3); priorities RFC 5424
section 6.2.1), ``event`` first, the logger name, the level from the command line, the
environment or the config. Secrets: ``password_file`` / ``token_file``, systemd credentials
(``$CREDENTIALS_DIRECTORY``, systemd.exec(5)), a warning for a world-readable config that
holds one inline, and a redaction that hides secrets only.
"""

from __future__ import annotations

import io
import json
import os
import subprocess
import sys
from pathlib import Path

import pytest
import structlog
from test_ops_collector import write_config

from agent import logs
from agent.collect.service import load_collector_settings
from agent.config import ConfigError

ROOT = Path(__file__).resolve().parents[1]


def _emit(journald: bool, level: str = "debug") -> list[str]:
    out = io.StringIO()
    logs.configure(level, out, journald=journald)
    try:
        log = structlog.get_logger("halfcycle.test")
        log.debug("d_event", zeta=1, alpha=2)
        log.info("i_event")
        log.warning("w_event")
        log.error("e_event", password="hunter2", key_file="/etc/k.pem",
                  session_present=True, mqtt_password="x", token="t")
    finally:
        structlog.reset_defaults()
    return out.getvalue().splitlines()


def test_journald_priority_prefix_event_first_and_logger_name() -> None:
    lines = _emit(journald=True)
    # RFC 5424 6.2.1: debug 7, informational 6, warning 4, error 3.
    assert [ln[:3] for ln in lines] == ["<7>", "<6>", "<4>", "<3>"]
    first = json.loads(lines[0][3:])
    assert list(first)[:4] == ["event", "level", "logger", "timestamp"]
    assert first["logger"] == "halfcycle.test"
    assert list(first)[4:] == ["alpha", "zeta"]  # the rest in name order


def test_plain_json_without_journald_and_secret_only_redaction() -> None:
    lines = _emit(journald=False, level="warning")
    assert len(lines) == 2 and all(ln.startswith("{") for ln in lines)
    err = json.loads(lines[1])
    assert err["password"] == err["mqtt_password"] == err["token"] == "<redacted>"
    assert err["key_file"] == "/etc/k.pem" and err["session_present"] is True


def test_journald_detected_from_journal_stream(monkeypatch: pytest.MonkeyPatch,
                                               capsys: pytest.CaptureFixture[str]) -> None:
    monkeypatch.setenv("JOURNAL_STREAM", "8:12345")
    logs.configure("info")
    try:
        structlog.get_logger("halfcycle.test").warning("hello")
    finally:
        structlog.reset_defaults()
    assert capsys.readouterr().err.startswith('<4>{"event": "hello"')


def test_level_order_cli_env_config(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.delenv(logs.ENV_LEVEL, raising=False)
    assert logs.resolve_level(None, None) == "info"
    assert logs.resolve_level(None, "warning") == "warning"
    monkeypatch.setenv(logs.ENV_LEVEL, "debug")
    assert logs.resolve_level(None, "warning") == "debug"
    assert logs.resolve_level("error", "warning") == "error"
    monkeypatch.setenv(logs.ENV_LEVEL, "chatty")  # not a level: ignored
    assert logs.resolve_level(None, "warning") == "warning"


def _config(tmp_path: Path, extra: str = "") -> Path:
    cfg = write_config(tmp_path, 1883, "broker-pw", extra=extra)
    return cfg


def test_password_file_from_systemd_credentials(tmp_path: Path,
                                                monkeypatch: pytest.MonkeyPatch) -> None:
    creds = tmp_path / "creds"
    creds.mkdir()
    (creds / "mqtt-password").write_text("from-credential\n")
    (creds / "tsdb-token").write_text("tok-123\n")
    cfg = _config(tmp_path, extra='[export]\nurl = "http://127.0.0.1:1"\n'
                  'token_file = "${CREDENTIALS_DIRECTORY}/tsdb-token"\n')
    cfg.write_text(cfg.read_text().replace(
        'password_file = "password"', 'password_file = "$CREDENTIALS_DIRECTORY/mqtt-password"'))
    monkeypatch.setenv("CREDENTIALS_DIRECTORY", str(creds))
    s = load_collector_settings(cfg)
    assert s.mqtt.password == "from-credential"
    assert s.export is not None and s.export.token == "tok-123"
    monkeypatch.delenv("CREDENTIALS_DIRECTORY")
    with pytest.raises(ConfigError, match=r"token_file: .*CREDENTIALS_DIRECTORY.* not set"):
        load_collector_settings(cfg)


def test_inline_mqtt_password_is_refused(tmp_path: Path) -> None:
    cfg = _config(tmp_path)
    cfg.write_text(cfg.read_text().replace('password_file = "password"', 'password = "pw"'))
    with pytest.raises(ConfigError, match=r"mqtt\.password: unknown key"):
        load_collector_settings(cfg)


def test_world_readable_config_with_a_token_warns(tmp_path: Path) -> None:
    cfg = _config(tmp_path, extra='[export]\nurl = "http://127.0.0.1:1"\ntoken = "s3cr3t"\n')
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    code = ("import sys; from agent import logs; logs.configure('info', journald=False); "
            "from agent.collect.service import load_collector_settings as l; l(sys.argv[1])")
    cfg.chmod(0o644)
    done = subprocess.run([sys.executable, "-c", code, str(cfg)], capture_output=True,
                          text=True, env=env, timeout=30, check=True)
    warned = [json.loads(x) for x in done.stderr.splitlines() if x.startswith("{")]
    assert [w["event"] for w in warned] == ["config_secret_world_readable"]
    assert warned[0]["keys"] == ["export.token"] and "s3cr3t" not in done.stderr
    cfg.chmod(0o640)
    done = subprocess.run([sys.executable, "-c", code, str(cfg)], capture_output=True,
                          text=True, env=env, timeout=30, check=True)
    assert "config_secret_world_readable" not in done.stderr
