"""``halfcycle demo``: the whole chain on an INVENTED street, on loopback, in well under a minute.

Mosquitto (through ``halfcycle broker run``) on a free 127.0.0.1 port, victoria-metrics when
``/usr/bin/victoria-metrics`` is installed, a collector with an SQLite recorder store, and one
edge agent per invented home (simulated source, agent/examples/demo/). One home's monitor
"loses power": its agent is SIGKILLed while an interruption is open and restarted on a short
"power restored" recording. The demo waits until every outbox has drained, stops everything
and prints the fleet report. All data is invented.

Each home runs in its own process (``python -m agent.cli.demo home ...``) that loads its
configuration, says ``ready`` and starts only on ``go``, so every home's simulated signal is
stamped from the same moment and the feeder-wide sag lands at the same UTC time everywhere.
"""

from __future__ import annotations

import argparse
import contextlib
import json
import math
import os
import shutil
import signal
import socket
import string
import subprocess
import sys
import tempfile
import threading
import time
import urllib.error
import urllib.request
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import IO, Any

from agent.cli.main import UserError
from agent.config import Section, load_toml
from agent.resources import examples_dir

INVENTED_BANNER = ("INVENTED DATA: a made-up demo street, not measurements of any real home, "
                   "feeder or utility.")
VM_BINARY = Path("/usr/bin/victoria-metrics")
MOSQUITTO_HINT = ("mosquitto not found: install Debian's mosquitto package "
                  "(sudo apt-get install mosquitto) and run halfcycle demo again")
#: The folder holding this process's ``agent`` package.
PACKAGE_ROOT = Path(__file__).resolve().parents[2]
ROLES = ("solar", "leg_loss", "lost_power", "interruption", "plain")
OPTIONAL_ROLE_KEYS = {"other_leg_pu"}


def demo_dir() -> Path:
    return examples_dir() / "demo"


# --- the invented street ------------------------------------------------------------------


@dataclass(frozen=True)
class Street:
    """agent/examples/demo/street.toml, checked key by key."""

    site: str
    feeder: str
    nominal_v: float
    nominal_hz: float
    sample_rate: float
    block_samples: int
    measurement_point: str
    sag_at: float
    sag_duration_s: float
    sag_level_pu: float
    roles: tuple[dict[str, Any], ...]


def load_street(path: Path | None = None) -> Street:
    p = path or demo_dir() / "street.toml"
    doc = Section(load_toml(p), p)
    doc.reject_unknown({"street", "feeder_sag", "roles"})
    st = doc.section("street", required=True)
    st.reject_unknown({"site", "feeder", "nominal_v", "nominal_hz", "sample_rate",
                       "block_samples", "measurement_point"})
    sag = doc.section("feeder_sag", required=True)
    sag.reject_unknown({"at", "duration_s", "level_pu"})
    roles = []
    allowed = {"solar": {"level_pu", "swell_at", "swell_for", "swell_pu"},
               "leg_loss": {"at", "for", "other_leg_pu"}, "lost_power": {"at", "restored_s"},
               "interruption": {"at", "duration_s"}, "plain": {"level_pu"}}
    for r in doc.sections("roles"):
        name = r.choice("role", ROLES)
        r.reject_unknown({"role"} | allowed[name])
        spec: dict[str, Any] = {"role": name}
        for key in sorted(allowed[name]):
            if key in OPTIONAL_ROLE_KEYS and not r.has(key):
                continue
            value = r.get(key, float, required=True)
            if key in ("at", "swell_at", "swell_for", "for") and not 0.0 < value < 1.0:
                raise r.error(key, f"a fraction of the run between 0 and 1, got {value}")
            spec[key] = value
        roles.append(spec)
    return Street(
        site=st.get("site", str, required=True), feeder=st.get("feeder", str, required=True),
        nominal_v=st.get("nominal_v", float, required=True),
        nominal_hz=st.get("nominal_hz", float, required=True),
        sample_rate=st.get("sample_rate", float, 3840.0),
        block_samples=st.get("block_samples", int, 768),
        measurement_point=st.choice("measurement_point", ("service", "outlet"), "service"),
        sag_at=sag.get("at", float, required=True),
        sag_duration_s=sag.get("duration_s", float, required=True),
        sag_level_pu=sag.get("level_pu", float, required=True),
        roles=tuple(roles),
    )


def role_of(street: Street, index: int) -> dict[str, Any]:
    """Role of home ``index`` (0-based): the street's list in order, then plain homes."""
    if index < len(street.roles):
        return street.roles[index]
    # Plain homes differ a little in steady level (invented: 0.995-1.015 pu).
    return {"role": "plain", "level_pu": 1.0 + 0.005 * ((index * 3) % 5 - 1)}


def _event(kind: str, start: float, duration: float | None, level: float | None = None,
           channels: list[str] | None = None, note: str = "") -> str:
    lines = [f"\n# {note}" if note else "", "[[events]]", f'kind = "{kind}"',
             f"start_s = {start:.4f}"]
    if duration is not None:
        lines.append(f"duration_s = {duration:.4f}")
    if level is not None:
        lines.append(f"level_pu = {level}")
    if channels:
        lines.append("channels = [" + ", ".join(f'"{c}"' for c in channels) + "]")
    return "\n".join(lines) + "\n"


def scenario_text(street: Street, device: str, index: int, seconds: float,
                  *, restored: bool = False) -> str:
    """The rendered scenario of one home (``restored``: the short power-back recording)."""
    role = role_of(street, index)
    events = ""
    duration = seconds
    if restored:
        duration = float(role.get("restored_s", 3.0))
        events = "\n# Power is back: a short, undisturbed recording after the restart.\n"
    else:
        events += _event("dip", street.sag_at * seconds, street.sag_duration_s,
                         street.sag_level_pu, note="Feeder-wide sag: every home at once.")
        kind = role["role"]
        if kind == "solar":
            events += _event("swell", role["swell_at"] * seconds, role["swell_for"] * seconds,
                             role["swell_pu"], note="Inverter-induced swell (rooftop solar).")
        elif kind == "leg_loss":
            events += _event("leg_loss", role["at"] * seconds, role["for"] * seconds,
                             channels=["L2"], note="Leg L2 lost: a partial outage.")
            if "other_leg_pu" in role:
                events += _event("dip", role["at"] * seconds, role["for"] * seconds,
                                 role["other_leg_pu"], channels=["L1"],
                                 note="The same fault drags leg L1 down a little.")
        elif kind == "lost_power":
            events += _event("interruption", role["at"] * seconds, seconds, 0.0,
                             note="Supply lost until the end; the monitor dies with it.")
        elif kind == "interruption":
            events += _event("interruption", role["at"] * seconds, role["duration_s"], 0.0,
                             note="A brief interruption at this unit only.")
    template = string.Template((demo_dir() / "home.template.toml").read_text(encoding="utf-8"))
    return template.substitute(
        device=device, role=role["role"] + (" (power restored)" if restored else ""),
        seed=1000 + index + (500 if restored else 0), duration_s=f"{duration:.4f}",
        sample_rate=street.sample_rate, block_samples=street.block_samples,
        nominal_v=street.nominal_v, nominal_hz=street.nominal_hz,
        level_pu=role.get("level_pu", 1.0), events=events)


def edge_text(street: Street, device: str, port: int, scenario: str) -> str:
    template = string.Template((demo_dir() / "edge.template.toml").read_text(encoding="utf-8"))
    return template.substitute(site=street.site, device=device, nominal_v=street.nominal_v,
                               nominal_hz=street.nominal_hz,
                               measurement_point=street.measurement_point,
                               feeder=street.feeder, scenario=scenario, port=port)


COLLECTOR_TEMPLATE = """# INVENTED demo: collector of `halfcycle demo`.
[collector]
id = "demo-collector"
group = "recorders"
[store]
url = "sqlite:///{db}"
captures_dir = "{captures}"
[mqtt]
host = "127.0.0.1"
port = {port}
tls = false
username = "collector"
password_file = "{password_file}"
keepalive_s = 5
reconnect_min_s = 0.2
reconnect_max_s = 1.0
"""
EXPORT_TEMPLATE = """[export]
url = "{url}"
token = "unused"
org = "demo"
bucket = "halfcycle"
precision = "ms"
"""


# --- the run --------------------------------------------------------------------------------


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _wait(predicate: Callable[[], bool], timeout_s: float, interval_s: float = 0.05) -> bool:
    end = time.monotonic() + timeout_s
    while time.monotonic() < end:
        if predicate():
            return True
        time.sleep(interval_s)
    return predicate()


def _port_open(port: int) -> bool:
    with socket.socket() as s:
        s.settimeout(0.2)
        return s.connect_ex(("127.0.0.1", port)) == 0


def mosquitto_available() -> bool:
    return shutil.which("mosquitto") is not None or Path("/usr/sbin/mosquitto").exists()


@dataclass
class HomeProc:
    device: str
    role: str
    proc: subprocess.Popen[str]
    result: dict[str, Any] | None = None


@dataclass
class DemoRun:
    """One demo run in ``root``; :meth:`run` returns the report and stops everything."""

    root: Path
    homes: int
    seconds: float
    speed: float
    say: Callable[[str], None]
    street: Street = field(default_factory=load_street)
    procs: list[subprocess.Popen[Any]] = field(default_factory=list)
    timings: dict[str, float] = field(default_factory=dict)
    notes: list[str] = field(default_factory=list)
    homes_run: list[HomeProc] = field(default_factory=list)
    #: UTC time the simulated signal ended: agents going offline after it stopped as planned.
    stopped_after: float | None = None
    #: Every home ran and its outbox drained.
    complete: bool = False
    #: Where the static HTML report goes, and the time zone of its times.
    html_dir: Path | None = None
    tz: str = "UTC"
    #: Days of INVENTED quiet history committed before the run (0: none).
    history_days: float = 7.0

    def _spawn(self, argv: list[str], log: str, **kw: Any) -> subprocess.Popen[Any]:
        logs = self.root / "logs"
        logs.mkdir(exist_ok=True)
        # Children import the same halfcycle as this process, whatever else is installed.
        env = dict(os.environ)
        env["PYTHONPATH"] = os.pathsep.join(
            [str(PACKAGE_ROOT), *filter(None, [env.get("PYTHONPATH")])])
        with (logs / log).open("ab") as err:
            proc: subprocess.Popen[Any] = subprocess.Popen(
                argv, stderr=err, cwd=self.root, env=env, **kw)
        self.procs.append(proc)
        return proc

    def _home_proc(self, config: Path, *, wait: bool, speed: float,
                   log: str) -> subprocess.Popen[str]:
        argv = [sys.executable, "-m", "agent.cli.demo", "home", "--config", str(config),
                "--speed", repr(speed)]
        if wait:
            argv.append("--wait")
        return self._spawn(argv, log, stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)

    def _stop_all(self) -> None:
        """SIGTERM every process still running (homes, victoria-metrics, broker), then kill."""
        for proc in reversed(self.procs):
            if proc.stdin is not None and not proc.stdin.closed:
                with contextlib.suppress(OSError):
                    proc.stdin.close()  # a home still waiting for "go" gives up at once
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in reversed(self.procs):
            try:
                proc.wait(10)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait(5)
            for stream in (proc.stdin, proc.stdout):
                if stream is not None:
                    stream.close()

    def run(self) -> dict[str, Any]:
        from agent.broker import setup

        t_start = time.monotonic()
        (self.root / "INVENTED.txt").write_text(
            INVENTED_BANNER + "\nEverything in this folder was produced by `halfcycle demo` from "
            "agent/examples/demo/ (invented scenario files).\n", encoding="utf-8")
        devices = [f"home-{i + 1}" for i in range(self.homes)]
        port = free_port()
        broker_dir = self.root / "broker"
        setup.render(broker_dir, port=port)
        passwords = {d: setup.add_device(broker_dir, d, self.street.site) for d in devices}
        collector_thread: threading.Thread | None = None
        collector_stop = threading.Event()
        try:
            self._spawn([sys.executable, "-m", "agent.cli.broker", "broker", "run", "--dir",
                         str(broker_dir), "--port", str(port)], "mosquitto.log",
                        stdout=subprocess.DEVNULL)
            broker = self.procs[-1]
            if not _wait(lambda: _port_open(port) or broker.poll() is not None, 15.0) \
                    or broker.poll() is not None:
                tail = (self.root / "logs" / "mosquitto.log").read_text(errors="replace")[-800:]
                raise UserError(f"Mosquitto did not start on 127.0.0.1:{port}: {tail.strip()}")
            self.say(f"broker: Mosquitto on 127.0.0.1:{port} ({broker_dir})")
            export_url = self._start_victoria_metrics()
            collector_thread = self._start_collector(port, export_url, collector_stop)
            self._set_models(devices)
            if self.history_days > 0:
                self._commit_history(devices)
            self.timings["setup_s"] = time.monotonic() - t_start
            self._run_homes(devices, port, passwords)
            if export_url:
                self._drain_export(export_url)
        finally:
            collector_stop.set()
            if collector_thread is not None:
                collector_thread.join(timeout=60)
            self._stop_all()
        self.timings["total_s"] = time.monotonic() - t_start
        return self._report()

    def _start_victoria_metrics(self) -> str | None:
        if not VM_BINARY.exists():
            self.notes.append(f"time-series export skipped: {VM_BINARY} is not installed "
                              "(Debian package victoria-metrics)")
            self.say(self.notes[-1])
            return None
        port = free_port()
        url = f"http://127.0.0.1:{port}"
        vm = self._spawn([str(VM_BINARY), f"-httpListenAddr=127.0.0.1:{port}",
                          f"-storageDataPath={self.root / 'victoria-metrics'}",
                          "-dedup.minScrapeInterval=1ms"], "victoria-metrics.log",
                         stdout=subprocess.DEVNULL)

        def healthy() -> bool:
            if vm.poll() is not None:
                return True
            try:
                with urllib.request.urlopen(url + "/health", timeout=1) as r:
                    return bool(r.status == 200)
            except (urllib.error.URLError, OSError):
                return False

        if not _wait(healthy, 20.0, 0.1) or vm.poll() is not None:
            self.notes.append("time-series export skipped: victoria-metrics did not start "
                              f"(see {self.root / 'logs' / 'victoria-metrics.log'})")
            self.say(self.notes[-1])
            return None
        self.say(f"time series: victoria-metrics on {url}")
        return url

    def _start_collector(self, port: int, export_url: str | None,
                         stop: threading.Event) -> threading.Thread:
        from agent.broker.setup import BrokerDir
        from agent.collect.service import Collector, load_collector_settings

        cdir = self.root / "collector"
        cdir.mkdir(exist_ok=True)
        text = COLLECTOR_TEMPLATE.format(
            db=self.root / "recorder.db", captures=self.root / "captures", port=port,
            password_file=BrokerDir(self.root / "broker").collector_password_file)
        if export_url:
            text += EXPORT_TEMPLATE.format(url=export_url)
        (cdir / "collector.toml").write_text(text, encoding="utf-8")
        collector = Collector(load_collector_settings(cdir / "collector.toml"))
        ready = threading.Event()
        thread = threading.Thread(target=collector.run, args=(stop,), kwargs={"ready": ready},
                                  name="demo-collector", daemon=True)
        thread.start()
        if not ready.wait(20):
            raise UserError("the collector did not connect to the demo broker within 20 s")
        self.say(f"collector: recorder store sqlite:///{self.root / 'recorder.db'}")
        return thread

    def _store(self) -> Any:
        from agent.store.recorder import RecorderStore

        return RecorderStore(f"sqlite:///{self.root / 'recorder.db'}", self.root / "captures")

    def _set_models(self, devices: list[str]) -> None:
        """Provisioning: the site model of each home as the utility knows it."""
        with self._store() as store:
            for d in devices:
                store.update_device_model(d, self.street.site, {
                    "nominal_v": self.street.nominal_v, "nominal_hz": self.street.nominal_hz,
                    "service_type": "120/240", "channel_names": ["L1", "L2"],
                    "measurement_point": self.street.measurement_point,
                    "feeder": self.street.feeder})

    def _commit_history(self, devices: list[str]) -> None:
        """INVENTED quiet days before the run (agent/cli/demo_history.py), committed in
        batches through the store's own commit path."""
        from agent.cli.demo_history import EPOCH, history_messages
        from agent.render.pages import zone

        t0 = time.monotonic()
        messages = history_messages(devices, [role_of(self.street, i) for i in
                                              range(len(devices))],
                                    self.street.site, self.street.nominal_v, time.time(),
                                    self.history_days, zone(self.tz))
        count = 0
        with self._store() as store:
            batch: list[dict[str, Any]] = []
            for msg in messages:
                batch.append(msg)
                if len(batch) == 500:
                    store.commit_batch(batch)
                    count, batch = count + len(batch), []
            if batch:
                store.commit_batch(batch)
                count += len(batch)
        self.timings["history_s"] = time.monotonic() - t0
        self.notes.append(f"INVENTED history: {count} synthesised 10-min aggregates over "
                          f"{self.history_days:g} days before the run (epoch {EPOCH}); every "
                          "event came from samples through the real pipeline")

    def _write_home(self, device: str, index: int, port: int, password: str,
                    *, restored: bool = False) -> Path:
        hdir = self.root / "homes" / device
        hdir.mkdir(parents=True, exist_ok=True)
        pw = hdir / "password"
        fd = os.open(pw, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
        with os.fdopen(fd, "w", encoding="utf-8") as fh:
            fh.write(password + "\n")
        name = "scenario-restored.toml" if restored else "scenario.toml"
        (hdir / name).write_text(scenario_text(self.street, device, index, self.seconds,
                                               restored=restored), encoding="utf-8")
        config = hdir / ("edge-restored.toml" if restored else "edge.toml")
        config.write_text(edge_text(self.street, device, port, name), encoding="utf-8")
        return config

    def _run_homes(self, devices: list[str], port: int, passwords: dict[str, str]) -> None:
        homes: list[HomeProc] = []
        for i, d in enumerate(devices):
            config = self._write_home(d, i, port, passwords[d])
            proc = self._home_proc(config, wait=True, speed=self.speed, log=f"{d}.log")
            homes.append(HomeProc(d, role_of(self.street, i)["role"], proc))
        t0 = time.monotonic()
        for h in homes:
            assert h.proc.stdout is not None
            line = _readline(h.proc.stdout, 60.0)
            if line.strip() != "ready":
                raise UserError(f"{h.device}: the agent did not start (see "
                                f"{self.root / 'logs' / (h.device + '.log')})")
        self.timings["homes_ready_s"] = time.monotonic() - t0
        go = time.monotonic()
        self.stopped_after = time.time() + self.seconds / self.speed
        for h in homes:
            assert h.proc.stdin is not None
            h.proc.stdin.write("go\n")
            h.proc.stdin.flush()
        signal_s = self.seconds / self.speed
        self.say(f"{len(homes)} invented homes running: {self.seconds:g} s of signal at "
                 f"{self.speed:g}x ({signal_s:.1f} s)")
        lost = [h for h in homes if h.role == "lost_power"]
        for h in lost:
            self._lose_power(h, go, devices.index(h.device), port, passwords[h.device])
        for h in homes:
            if h in lost:
                continue
            h.result = self._finish(h, signal_s + 60.0)
        self.timings["homes_s"] = time.monotonic() - go
        self.homes_run = homes
        pending = {h.device: (h.result or {}).get("outbox_pending") for h in homes}
        undrained = {d: n for d, n in pending.items() if n != 0}
        self.complete = not undrained
        if undrained:
            self.notes.append(f"outboxes NOT drained: {undrained} (kept in each home's "
                              "state/outbox.sqlite)")
        else:
            self.notes.append("every outbox drained: the collector acknowledged every message")
        self.say(self.notes[-1])

    def _lose_power(self, h: HomeProc, go: float, index: int, port: int,
                    password: str) -> None:
        """SIGKILL the agent while its interruption is open, then restart it (power back)."""
        journal = self.root / "homes" / h.device / "state" / "open-events.json"
        signal_end = go + self.seconds / self.speed

        def open_interruption() -> tuple[float, float] | None:
            """(start UTC, last-alive UTC) of the open interruption in the journal."""
            try:
                doc = json.loads(journal.read_text(encoding="utf-8"))
                for e in doc.get("open") or []:
                    if e.get("kind") == "interruption":
                        alive = (doc.get("last_alive") or {}).get("utc", e["start_utc"])
                        return float(e["start_utc"]), float(alive)
            except (OSError, ValueError, TypeError, KeyError, AttributeError):
                pass
            return None

        if not _wait(lambda: open_interruption() is not None,
                     max(5.0, signal_end - time.monotonic() + 5.0), 0.01):
            self.notes.append(f"{h.device}: the interruption never opened; not killed")
            h.result = self._finish(h, 60.0)
            return
        # Let the journal stamp "last alive" once more (about once a second of wall time), so
        # the lost event keeps a duration, but kill before the recording would end.
        def stamped() -> bool:
            got = open_interruption()
            return got is not None and got[1] > got[0]

        # The agent stamps its last sample with the moment its recording ends, so that moment
        # is the interruption's start UTC plus the rest of the recording.
        found = open_interruption()
        assert found is not None
        ends_at = found[0] + self.seconds * (1.0 - role_of(self.street, index)["at"])
        _wait(stamped, max(0.0, min(ends_at - time.time(), signal_end + 2.0 - time.monotonic())
                           - 0.15), 0.01)
        h.proc.send_signal(signal.SIGKILL)
        h.proc.wait(10)
        # Keep the journal as the dead monitor left it (the restart rewrites it).
        shutil.copyfile(journal, self.root / "logs" / f"{h.device}-journal-at-power-loss.json")
        self.timings["power_lost_after_s"] = time.monotonic() - go
        self.say(f"{h.device}: monitor lost power (agent SIGKILLed during the interruption)")
        time.sleep(0.5)  # the supply is off for a moment
        config = self._write_home(h.device, index, port, password, restored=True)
        again = self._home_proc(config, wait=False, speed=math.inf, log=f"{h.device}.log")
        h.proc = again
        h.result = self._finish(h, 90.0)
        self.say(f"{h.device}: power restored, agent restarted and reported the lost event")

    def _finish(self, h: HomeProc, timeout_s: float) -> dict[str, Any]:
        assert h.proc.stdout is not None
        line = _readline(h.proc.stdout, timeout_s)
        try:
            h.proc.wait(max(1.0, timeout_s))
        except subprocess.TimeoutExpired:
            h.proc.kill()
            h.proc.wait(5)
        try:
            result = json.loads(line) if line.strip() else {}
        except ValueError:
            result = {}
        if not result:
            self.notes.append(f"{h.device}: agent ended without a result (exit "
                              f"{h.proc.returncode}); see logs/{h.device}.log")
        return dict(result)

    def _drain_export(self, url: str) -> None:
        with self._store() as store:
            drained = _wait(lambda: store.export_backlog() == 0, 20.0, 0.2)
            left = store.export_backlog()
        self.notes.append(f"time-series export to victoria-metrics at {url}: "
                          + ("queue drained" if drained else f"{left} rows still queued"))
        self.say(self.notes[-1])

    def _report(self) -> dict[str, Any]:
        from agent.report.fleet import fleet_report

        with self._store() as store:
            report = fleet_report(store, planned_stop_after=self.stopped_after)
            from agent.render.cli import write_html_for_store

            t_html = time.monotonic()
            html = write_html_for_store(store, str(self.html_dir or self.root / "report"),
                                        self.tz, report=report,
                                        invented=True)
            self.timings["html_s"] = time.monotonic() - t_html
        if self.stopped_after is not None:
            self.notes.append("the demo stopped every agent at the end of its recording: "
                              "those units read offline, as planned")
        report["invented"] = True
        report["demo"] = {
            "notice": INVENTED_BANNER,
            "homes": [{"device": h.device, "role": h.role, "result": h.result}
                      for h in self.homes_run],
            "seconds": self.seconds, "speed": self.speed, "dir": str(self.root),
            "timings_s": {k: round(v, 2) for k, v in self.timings.items()},
            "notes": self.notes, "complete": self.complete, "html": str(html.resolve()),
        }
        return report


def _readline(stream: IO[str], timeout_s: float) -> str:
    """One line from a child's stdout, or "" after ``timeout_s`` (bounded wait)."""
    got: list[str] = []
    t = threading.Thread(target=lambda: got.append(stream.readline()), daemon=True)
    t.start()
    t.join(timeout_s)
    return got[0] if got else ""


# --- commands -------------------------------------------------------------------------------


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "demo",
        help="the whole chain on an invented street (loopback only), then the fleet report",
        description="Runs Mosquitto, a collector (SQLite store), victoria-metrics if installed, "
        "and N edge agents with simulated sources on 127.0.0.1, then prints the fleet report. "
        "All data is INVENTED.",
    )
    p.add_argument("--homes", type=int, default=6, help="number of invented homes (2..20)")
    p.add_argument("--seconds", type=float, default=40.0,
                   help="simulated signal per home [s] (10..600)")
    p.add_argument("--speed", type=float, default=20.0,
                   help="run the simulation at this multiple of real time (1..100)")
    p.add_argument("--dir", default=None,
                   help="keep everything in this (new or empty) folder; default: a temporary "
                   "folder removed at the end")
    p.add_argument("--json", action="store_true", help="print the report as one JSON object")
    p.add_argument("--days", type=float, default=7.0,
                   help="days of INVENTED quiet history (synthesised 10-min aggregates) "
                   "before the live run, for the profile and compliance views (0..31; "
                   "default 7)")
    p.add_argument("--tz", default="UTC",
                   help="time zone of the HTML report's times (IANA name, e.g. Europe/Berlin)")
    p.set_defaults(func=cmd_demo)


def cmd_demo(args: argparse.Namespace) -> int:
    if not 2 <= args.homes <= 20:
        raise UserError(f"--homes {args.homes}: must be 2..20")
    if not 10.0 <= args.seconds <= 600.0:
        raise UserError(f"--seconds {args.seconds:g}: must be 10..600")
    if not 1.0 <= args.speed <= 100.0:
        raise UserError(f"--speed {args.speed:g}: must be 1..100")
    if not 0.0 <= args.days <= 31.0:
        raise UserError(f"--days {args.days:g}: must be 0..31")
    from agent.render.cli import check_zone

    check_zone(args.tz)
    if not mosquitto_available():
        raise UserError(MOSQUITTO_HINT)
    keep = args.dir is not None
    if keep:
        root = Path(args.dir).resolve()
        if root.exists() and (not root.is_dir() or any(root.iterdir())):
            raise UserError(f"--dir {root}: must be a new or empty folder")
        root.mkdir(parents=True, exist_ok=True)
    else:
        root = Path(tempfile.mkdtemp(prefix="halfcycle-demo-"))

    def say(text: str) -> None:
        print(f"demo: {text}", file=sys.stderr, flush=True)

    say(INVENTED_BANNER)
    from agent import logs

    logs.configure("error")  # the collector thread logs here; keep the terminal readable
    # The HTML report lives in the demo's folder; without --dir that folder is removed at
    # the end, so the report gets a folder of its own.
    run = DemoRun(root, args.homes, args.seconds, args.speed, say, tz=args.tz,
                  history_days=args.days,
                  html_dir=root / "report" if keep else Path(tempfile.mkdtemp(
                      prefix="halfcycle-demo-report-")))
    try:
        report = run.run()
    finally:
        if not keep and run.complete:
            shutil.rmtree(root, ignore_errors=True)
        elif not keep:  # something did not finish: keep the evidence (outboxes, logs)
            say(f"incomplete run: everything kept in {root}")
    if args.json:
        from agent.cli.report import _json_safe

        json.dump(_json_safe(report), sys.stdout, indent=1, allow_nan=False)
        sys.stdout.write("\n")
    else:
        from agent.report.fleet import render_text

        sys.stdout.write(render_text(report))
        demo = report["demo"]
        sys.stdout.write("\n" + "\n".join(f"note: {n}" for n in demo["notes"]) + "\n")
        t = demo["timings_s"]
        sys.stdout.write(f"HTML report: {demo['html']}\n")
        sys.stdout.write(f"demo took {t.get('total_s', 0):.1f} s"
                         f" (+ {t.get('html_s', 0):.1f} s for the HTML report)"
                         + (f"; files kept in {root}\n" if keep else "\n"))
        sys.stdout.write(INVENTED_BANNER + "\n")
    return 0 if run.complete else 1


def _home_main(argv: list[str]) -> int:
    """``python -m agent.cli.demo home --config X --speed S [--wait]``: one demo home."""
    ap = argparse.ArgumentParser(prog="halfcycle-demo-home")
    ap.add_argument("--config", required=True)
    ap.add_argument("--speed", type=float, required=True)
    ap.add_argument("--wait", action="store_true", help="print ready, start on 'go'")
    args = ap.parse_args(argv)
    from agent import logs
    from agent.publish.edge import install_signal_handlers, run_edge
    from agent.settings import load_edge_settings

    logs.configure("warning")
    settings = load_edge_settings(args.config)
    stop = threading.Event()
    install_signal_handlers(stop)
    if args.wait:
        # Warm up what run_edge does before it stamps the timebase, so every home starts
        # its clock within a few milliseconds of the others after "go".
        from agent.acquisition.open_source import open_source
        from agent.publish.mqtt import PublisherConfig

        PublisherConfig.from_section(settings.mqtt)
        source = open_source(settings.source)
        try:
            next(iter(source.blocks()), None)
        finally:
            source.close()
        print("ready", flush=True)
        if sys.stdin.readline().strip() != "go":
            return 3
    fast = math.isinf(args.speed)
    result = run_edge(settings, stop=stop, pace=not fast, speed=1.0 if fast else args.speed,
                      drain_timeout_s=30.0)
    print(json.dumps({"outbox_pending": result.outbox_pending, "published": result.published,
                      "events": result.counters.events, "blocks": result.blocks}), flush=True)
    return 0


if __name__ == "__main__":
    if len(sys.argv) > 1 and sys.argv[1] == "home":
        sys.exit(_home_main(sys.argv[2:]))
    print("usage: python -m agent.cli.demo home --config FILE --speed S [--wait]",
          file=sys.stderr)
    sys.exit(2)
