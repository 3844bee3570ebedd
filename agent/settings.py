"""The edge agent's configuration file (TOML), checked key by key.

```toml
[site]          # agent.site.Site: site, device, nominal_v, nominal_hz, service_type, channels, ...
[source]        # agent.acquisition.open_source: kind = "sim" | "wav" | "csv" | "serial", ...
[events]        # thresholds as fractions of nominal: dip, swell, interruption, hysteresis
[rvc]           # rapid voltage changes: threshold = 0.03, hysteresis = 0.015 (of nominal),
                # enabled = true (agent.events.rvc; defaults from memory, IEC 61000-4-30 Ed.3)
[capture]       # pre_cycles, post_cycles
[calibration]   # file = "calibration.toml" (written by `halfcycle calibrate`)
[state]         # dir = "/var/lib/halfcycle" (outbox, open-event journal)
[summary]       # seconds = 60 (per-second records batched per summary message)
[mqtt]          # broker connection, see agent.publish.config (required by `edge run`)
[log]           # level = "info" (the command line and $HALFCYCLE_LOG_LEVEL come first)
```

Relative paths are taken from the configuration file's folder. Every error names the file
and the dotted key.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from agent.config import ConfigError, Section, load_toml
from agent.events.rvc import RvcSettings
from agent.events.types import Thresholds
from agent.pipeline import CaptureSettings
from agent.site import Site, check_identifier

SECTIONS = {"site", "source", "events", "rvc", "capture", "calibration", "state", "summary",
            "mqtt", "log"}


@dataclass
class EdgeSettings:
    path: Path
    site: Site
    source: Section
    thresholds: Thresholds
    capture: CaptureSettings
    calibration_file: Path | None
    state_dir: Path
    summary_seconds: int
    mqtt: Section
    raw: dict[str, Any] = field(default_factory=dict)
    rvc: RvcSettings = field(default_factory=RvcSettings)

    def resolve(self, value: str) -> Path:
        p = Path(value)
        return p if p.is_absolute() else (self.path.parent / p)

    def gains(self) -> np.ndarray | None:
        """Per-channel calibration gains from the calibration file, or None (gain 1)."""
        if self.calibration_file is None or not self.calibration_file.exists():
            return None
        from agent.acquisition.calibration import CalibrationRecord

        record = CalibrationRecord.load(self.calibration_file)
        try:
            return record.gains_for(self.site.channel_names)
        except KeyError as exc:
            raise ConfigError(self.calibration_file, "channels", str(exc.args[0])) from None


def parse_thresholds(sec: Section) -> Thresholds:
    sec.reject_unknown({"dip", "swell", "interruption", "hysteresis"})
    t = Thresholds(
        dip=sec.get("dip", float, 0.90),
        swell=sec.get("swell", float, 1.10),
        interruption=sec.get("interruption", float, 0.05),
        hysteresis=sec.get("hysteresis", float, 0.02),
    )
    if not 0.0 < t.interruption < t.dip < 1.0:
        raise sec.error("dip", f"need 0 < interruption ({t.interruption}) < dip ({t.dip}) < 1")
    if not 1.0 < t.swell < 2.0:
        raise sec.error("swell", f"must be between 1 and 2, got {t.swell}")
    if not 0.0 <= t.hysteresis < min(t.dip - t.interruption, t.swell - 1.0):
        raise sec.error("hysteresis", f"{t.hysteresis} does not fit between the thresholds")
    return t


def parse_rvc(sec: Section) -> RvcSettings:
    sec.reject_unknown({"threshold", "hysteresis", "enabled"})
    threshold = sec.get("threshold", float, RvcSettings.threshold)
    hysteresis = sec.get("hysteresis", float, RvcSettings.hysteresis)
    if not 0.0 < threshold < 0.1:
        raise sec.error("threshold", f"must be between 0 and 0.1 of nominal, got {threshold}")
    if not 0.0 <= hysteresis < threshold:
        raise sec.error("hysteresis", f"must be >= 0 and below the threshold, got {hysteresis}")
    return RvcSettings(threshold, hysteresis, sec.get("enabled", bool, True))


def load_edge_settings(path: str | Path) -> EdgeSettings:
    p = Path(path)
    doc = load_toml(p)
    top = Section(doc, p)
    top.reject_unknown(SECTIONS)
    site_sec = top.section("site", required=True)
    site = Site.from_section(site_sec)
    check_identifier(site.site_id, str(p), "site.site")
    check_identifier(site.device_id, str(p), "site.device")
    cap = top.section("capture")
    cap.reject_unknown({"pre_cycles", "post_cycles"})
    capture = CaptureSettings(cap.get("pre_cycles", int, 10), cap.get("post_cycles", int, 20))
    for name, value in (("pre_cycles", capture.pre_cycles), ("post_cycles", capture.post_cycles)):
        if not 0 <= value <= 3000:
            raise cap.error(name, f"must be 0..3000 cycles, got {value}")
    cal = top.section("calibration")
    cal.reject_unknown({"file"})
    cal_file = cal.optional("file", str)
    state = top.section("state")
    state.reject_unknown({"dir"})
    summary = top.section("summary")
    summary.reject_unknown({"seconds"})
    seconds = summary.get("seconds", int, 60)
    if not 1 <= seconds <= 3600:
        raise summary.error("seconds", f"must be 1..3600, got {seconds}")
    settings = EdgeSettings(
        path=p,
        site=site,
        source=top.section("source", required=True),
        thresholds=parse_thresholds(top.section("events")),
        capture=capture,
        calibration_file=None,
        state_dir=Path("."),
        summary_seconds=seconds,
        mqtt=top.section("mqtt"),
        raw=doc,
        rvc=parse_rvc(top.section("rvc")),
    )
    settings.calibration_file = settings.resolve(cal_file) if cal_file else None
    settings.state_dir = settings.resolve(state.get("dir", str, "state"))
    return settings
