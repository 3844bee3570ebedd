# ruff: noqa: F811  (pytest fixtures imported from _mqtt_helpers shadow their name)
"""Publisher settings from TOML, reconnect backoff, and credentials kept out of the logs."""

from __future__ import annotations

import json
import random
import threading
from pathlib import Path

import pytest
import structlog
from _mqtt_helpers import SITE, Broker, broker, publisher_config, wait_for  # noqa: F401

from agent.config import ConfigError, Section
from agent.logs import configure as configure_json_logging
from agent.publish.mqtt import Publisher, PublisherConfig
from agent.publish.outbox import Outbox


def test_from_section_reads_values_and_password_file(tmp_path: Path) -> None:
    pw = tmp_path / "pw"
    pw.write_text("hunter2-not-real\n")
    cfg = PublisherConfig.from_section(Section(
        {"host": "broker.example", "port": 8883, "keepalive_s": 20, "protocol": "3.1.1",
         "password_file": str(pw), "ack_timeout_s": 30}, "agent.toml", "mqtt"))
    assert (cfg.host, cfg.port, cfg.keepalive_s, cfg.protocol) == ("broker.example", 8883, 20,
                                                                   "3.1.1")
    assert cfg.password == "hunter2-not-real" and cfg.ack_timeout_s == 30.0
    assert "hunter2" not in repr(cfg)  # repr=False on the password
    assert cfg.effective_max_attempts() == 20  # 3.1.1: bounded resends (module contract)
    assert PublisherConfig().effective_max_attempts() == 0  # MQTT 5: reason codes decide


@pytest.mark.parametrize("table, key", [
    ({"port": 0}, "mqtt.port"),
    ({"protocol": "4"}, "mqtt.protocol"),
    ({"keepalive_s": 1}, "mqtt.keepalive_s"),
    ({"bogus": 1}, "mqtt.bogus"),
    ({"password_file": "/nonexistent/pw"}, "mqtt.password_file"),
    ({"ack_timeout_s": -1.0}, "mqtt.ack_timeout_s"),
    ({"ca_file": "/nonexistent/ca.crt"}, "mqtt.ca_file"),
])
def test_from_section_errors_name_the_key(table: dict[str, object], key: str) -> None:
    with pytest.raises(ConfigError) as err:
        PublisherConfig.from_section(Section(table, "agent.toml", "mqtt"))
    assert err.value.key == key and "agent.toml" in str(err.value)


def test_backoff_grows_with_jitter_and_stays_bounded(tmp_path: Path) -> None:
    outbox = Outbox(tmp_path / "o.db", "dev-a", SITE)
    cfg = PublisherConfig(port=1, tls=False, reconnect_min_s=1.0, reconnect_max_s=8.0)
    pub = Publisher(outbox, cfg, rng=random.Random(1))
    delays = []
    for _ in range(8):
        pub._connect_failed(100.0, "test")
        delays.append(pub._next_attempt - 100.0)
    # equal jitter: delay in [d/2, d], d = min(max, min * 2**n) (common practice)
    bounds = [min(8.0, 2.0 ** n) for n in range(8)]
    assert all(d / 2 <= x <= d for x, d in zip(delays, bounds, strict=True))
    assert len({round(x, 6) for x in delays[4:]}) > 1  # jittered, not lock-step


def test_wrong_password_retries_and_never_logs_it(broker: Broker, tmp_path: Path,
                                                  capsys: pytest.CaptureFixture[str]) -> None:
    secret = "wrong-" + broker.devices["dev-a"]
    configure_json_logging()
    try:
        outbox = Outbox(tmp_path / "o.db", "dev-a", SITE)
        pub = Publisher(outbox, publisher_config(broker.port, secret))
        stop = threading.Event()
        t = threading.Thread(target=pub.run, args=(stop,), kwargs={"max_seconds": 20.0})
        t.start()
        try:
            assert wait_for(lambda: pub._failures >= 2, 15)  # refused, and tried again
            assert not pub.connected
        finally:
            stop.set()
            t.join(10)
    finally:
        structlog.reset_defaults()
    err = capsys.readouterr().err
    lines = [json.loads(line) for line in err.splitlines() if line.startswith("{")]
    assert any(e["event"] == "mqtt_connect_refused" for e in lines)
    assert secret not in err and broker.devices["dev-a"] not in err
