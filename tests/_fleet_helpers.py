"""A small invented fleet on real parts for collector tests: a Mosquitto started with the
project's broker-config, edge agents with simulated sources, collectors in threads or in
subprocesses (so they can be SIGKILLed)."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import threading
from dataclasses import dataclass, field
from pathlib import Path

from _mqtt_helpers import Broker, make_broker

from agent.collect.service import Collector, load_collector_settings

SCENARIO = """
# INVENTED scenario: one home on an imaginary 230 V feeder.
[scenario]
name = "{device}"
seed = {seed}
duration_s = {duration}
sample_rate = 3840.0
block_samples = 3840
[mains]
nominal_v = 230.0
nominal_hz = 50.0
[adc]
bits = 16
full_scale_v = 500.0
noise_lsb = 0.5
{events}
"""

FEEDER_DIP = """
# A feeder-wide dip: every home sees 55 % for 150 ms.
[[events]]
kind = "dip"
start_s = {start}
duration_s = 0.15
level_pu = 0.55
"""

SWELL = """
# Only this home: an invented inverter swell to 115 % for 0.8 s.
[[events]]
kind = "swell"
start_s = {start}
duration_s = 0.8
level_pu = 1.15
"""

EDGE = """
[site]
site = "invented-street"
device = "{device}"
nominal_v = 230.0
nominal_hz = 50.0
service_type = "1ph"
channels = ["L1"]
[source]
kind = "sim"
scenario = "scenario.toml"
[state]
dir = "state"
[summary]
seconds = {summary}
[mqtt]
host = "127.0.0.1"
port = {port}
tls = false
password_file = "password"
keepalive_s = 5
ack_timeout_s = 2.0
ack_timeout_max_s = 4.0
reconnect_min_s = 0.2
reconnect_max_s = 1.0
"""

COLLECTOR = """
[collector]
id = "{cid}"
group = "recorders"
[store]
url = "{url}"
captures_dir = "{captures}"
[mqtt]
host = "127.0.0.1"
port = {port}
tls = false
username = "collector"
password_file = "password"
keepalive_s = 5
reconnect_min_s = 0.2
reconnect_max_s = 1.0
{extra}
"""


# The collector's [export] table for a victoria-metrics test server (InfluxDB v2 write API).
EXPORT = """
[export]
url = "{url}"
token = "unused"
org = "pilot"
bucket = "halfcycle"
precision = "ms"
"""


@dataclass
class Fleet:
    root: Path
    broker: Broker
    devices: list[str]
    edge_configs: dict[str, Path] = field(default_factory=dict)
    procs: list[subprocess.Popen[bytes]] = field(default_factory=list)

    def collector_config(self, cid: str = "collector-1", url: str | None = None,
                         extra: str = "") -> Path:
        cdir = self.root / cid
        cdir.mkdir(exist_ok=True)
        (cdir / "password").write_text(self.broker.collector_password)
        url = url or f"sqlite:///{self.root / 'recorder.db'}"
        path = cdir / "collector.toml"
        path.write_text(COLLECTOR.format(cid=cid, url=url, captures=self.root / "captures",
                                         port=self.broker.port, extra=extra))
        return path

    def spawn(self, *argv: str, log: str) -> subprocess.Popen[bytes]:
        out = open(self.root / log, "ab")  # noqa: SIM115 - handed to the child
        proc = subprocess.Popen([sys.executable, "-m", "agent.cli.main", *argv],
                                stdout=out, stderr=out, cwd=self.root)
        out.close()
        self.procs.append(proc)
        return proc

    def spawn_collector(self, config: Path) -> subprocess.Popen[bytes]:
        return self.spawn("collect", "--config", str(config), log=f"{config.parent.name}.log")

    def spawn_agent(self, device: str, speed: float) -> subprocess.Popen[bytes]:
        return self.spawn("edge", "run", "--config", str(self.edge_configs[device]),
                          "--speed", str(speed), "--drain-timeout", "60", log=f"{device}.log")

    def last_seq(self, device: str) -> tuple[str, int]:
        """(epoch, highest seq issued) read straight from the agent's outbox file."""
        db = sqlite3.connect(self.edge_configs[device].parent / "state" / "outbox.sqlite")
        try:
            meta = dict(db.execute("SELECT key, value FROM meta").fetchall())
        finally:
            db.close()
        return meta["epoch"], int(meta["next_seq"]) - 1

    def stop_all(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in self.procs:
            try:
                proc.wait(20)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
        self.broker.stop()


def make_fleet(tmp_path: Path, n: int = 3, *, duration: float = 12.0, summary: int = 5,
               swell_device: int | None = -1, dip_at: float = 4.0) -> Fleet:
    broker = make_broker(tmp_path)
    devices = [f"home-{i + 1}" for i in range(n)]
    for d in devices:
        broker.add_device(d)
    fleet = Fleet(tmp_path, broker, devices)
    for i, d in enumerate(devices):
        ddir = tmp_path / d
        ddir.mkdir()
        (ddir / "password").write_text(broker.devices[d])
        events = FEEDER_DIP.format(start=dip_at)
        if swell_device is not None and devices[swell_device] == d:
            events += SWELL.format(start=min(duration - 2.0, dip_at + 4.0))
        (ddir / "scenario.toml").write_text(
            SCENARIO.format(device=d, seed=i + 1, duration=duration, events=events))
        (ddir / "edge.toml").write_text(EDGE.format(device=d, port=broker.port, summary=summary))
        fleet.edge_configs[d] = ddir / "edge.toml"
    broker.start()
    return fleet


class CollectorThread:
    """A collector running in this process (its stats can be read)."""

    def __init__(self, config: Path) -> None:
        self.settings = load_collector_settings(config)
        self.collector = Collector(self.settings)
        self.stop = threading.Event()
        self.ready = threading.Event()
        self.thread = threading.Thread(target=self.collector.run, args=(self.stop,),
                                       kwargs={"ready": self.ready}, daemon=True)

    def __enter__(self) -> CollectorThread:
        self.thread.start()
        if not self.ready.wait(20):
            raise RuntimeError("collector did not connect")
        return self

    def __exit__(self, *exc: object) -> None:
        self.stop.set()
        self.thread.join(timeout=60)


def pg_dsn() -> str:
    return os.environ.get("HALFCYCLE_TEST_PG_DSN", "postgresql://postgres@127.0.0.1:5432/postgres")
