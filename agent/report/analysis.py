"""Offline analysis of a recording: the result object behind ``halfcycle analyze``."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from agent.events.types import Event
from agent.pipeline import Frame
from agent.report.power_quality import analysis_sections


def infer_frequency(volts: np.ndarray, rate: float) -> float:
    """50 or 60 [Hz], whichever the spectrum's strongest low-frequency line is closer to."""
    x = volts - volts.mean()
    spec = np.abs(np.fft.rfft(x * np.hanning(x.size)))
    freqs = np.fft.rfftfreq(x.size, 1.0 / rate)
    band = (freqs > 40) & (freqs < 70)
    if not band.any() or not np.any(spec[band] > 0):
        return 50.0
    peak = float(freqs[band][np.argmax(spec[band])])
    return 60.0 if abs(peak - 60.0) < abs(peak - 50.0) else 50.0


def _num(x: float | None, nd: int = 4) -> float | None:
    if x is None or not math.isfinite(x):
        return None
    return round(float(x), nd)


def event_record(ev: Event) -> dict[str, Any]:
    c = ev.classification or {}
    category, duration_class = c.get("ieee1159_category"), c.get("ieee1159_duration_class")
    ieee1159 = (
        category if duration_class in (None, "", category) else f"{duration_class} {category}"
    )
    return {
        "type": ev.kind,
        "channels": list(ev.channels),
        "start_s": _num(ev.start_utc, 5),
        "duration_s": _num(ev.duration_s, 5),
        "level_v": _num(ev.level_v, 3),
        "level_pu": _num(ev.level_pu, 5),
        "ieee1159": ieee1159,
        "itic": c.get("itic_region"),
        "semi_f47": c.get("semi_f47"),
        "severity": _num(c.get("ieee1564_severity"), 4),
        "sag_energy_s": _num(ev.sag_energy_s, 5),
        "partial_outage": ev.partial_outage,
        "enclosing_duration_s": _num(ev.enclosing_duration_s, 5),
        "enclosing_level_v": _num(ev.enclosing_level_v, 3),
        "ended_by": ev.ended_by,
        "en50160_cell": c.get("en50160_dip_cell") or c.get("en50160_swell_cell"),
        **_rvc_fields(ev),
    }


def _rvc_fields(ev: Event) -> dict[str, Any]:
    """ΔUmax and ΔUss [V] of a rapid voltage change (nothing for other kinds)."""
    if ev.kind != "rvc":
        return {}
    return {"delta_umax_v": _num(ev.delta_umax_v, 3), "delta_uss_v": _num(ev.delta_uss_v, 3)}


@dataclass
class AnalysisCollector:
    """Sink stage: keeps what a report of the whole file needs."""

    timebase_origin: float = 0.0
    frequency: list[dict[str, float]] = field(default_factory=list)
    rms_10_12: list[dict[str, Any]] = field(default_factory=list)
    events: list[Event] = field(default_factory=list)
    flags: list[dict[str, Any]] = field(default_factory=list)
    aggregates: list[dict[str, Any]] = field(default_factory=list)
    captures: int = 0
    rate: float = 1.0
    ten_min: list[Any] = field(default_factory=list)   # 10-min Aggregates (flicker section)

    def __call__(self, frame: Frame) -> Frame:
        m = frame.measurement
        if m is not None:
            iv = m.intervals
            for k in range(len(iv)):
                self.rms_10_12.append(
                    {
                        "t": round(float(iv.start[k]) / self.rate, 5),
                        "v": [round(float(v), 4) for v in iv.rms[k]],
                        "thd": [_num(float(x), 5) for x in iv.thd[k]],
                        "flagged": bool(iv.flagged[k]),
                    }
                )
            self.ten_min.extend(a for a in m.aggregates if a.kind == "10min")
            for agg in m.aggregates:
                if agg.hz is not None:
                    self.frequency.append({"t": round(agg.t_utc, 3), "hz": round(agg.hz, 5)})
                else:
                    self.aggregates.append(
                        {
                            "kind": agg.kind,
                            "t": round(agg.t_utc, 3),
                            "v": [round(v, 4) for v in agg.rms],
                            "flagged": agg.flagged,
                        }
                    )
            for fl in m.flags:
                self.flags.append(
                    {
                        "kind": fl.kind,
                        "start_s": round(fl.start / self.rate, 5),
                        "end_s": round(fl.end / self.rate, 5),
                        "channels": list(fl.channels),
                        **({"detail": fl.detail} if fl.detail else {}),
                    }
                )
        self.events.extend(u.event for u in frame.updates if u.change == "ended")
        self.captures += len(frame.captures)
        return frame

    def result(
        self,
        *,
        sample_rate: float,
        nominal_v: float,
        nominal_hz: float,
        channels: int,
        channel_names: tuple[str, ...],
        source: str,
        nominal_inferred: bool,
        duration_s: float,
    ) -> dict[str, Any]:
        events = sorted(self.events, key=lambda e: e.start)
        return {
            "source": source,
            "sample_rate": sample_rate,
            "duration_s": round(duration_s, 4),
            "nominal_v": nominal_v,
            "nominal_inferred": nominal_inferred,
            "nominal_hz": nominal_hz,
            "channels": channels,
            "channel_names": list(channel_names),
            "frequency": self.frequency,
            "rms_10_12": self.rms_10_12,
            "aggregates": self.aggregates,
            "events": [event_record(e) for e in events],
            "captures": self.captures,
            "flags": self.flags,
            **analysis_sections(self.ten_min),
        }


def render_table(result: dict[str, Any]) -> str:
    """A readable plain-text report of an analysis result."""
    lines = [
        f"recording   {result['source']}",
        f"duration    {result['duration_s']:.1f} s at {result['sample_rate']:g} S/s, "
        f"{result['channels']} channel(s) {', '.join(result['channel_names'])}",
        f"nominal     {result['nominal_v']:g} V {result['nominal_hz']:g} Hz"
        + (" (inferred: pass --nominal to declare it)" if result["nominal_inferred"] else ""),
    ]
    rms = result["rms_10_12"]
    if rms:
        arr = np.array([r["v"] for r in rms], dtype=float)
        lines.append("10/12-cycle RMS [V] per channel: min / mean / max")
        for ch, name in enumerate(result["channel_names"]):
            col = arr[:, ch]
            lines.append(
                f"  {name:<6} {col.min():8.2f} {np.sqrt(np.mean(col**2)):8.2f} {col.max():8.2f}"
            )
    if result["frequency"]:
        hz = np.array([f["hz"] for f in result["frequency"]])
        lines.append(
            f"10-s frequency [Hz]: min {hz.min():.3f}  max {hz.max():.3f}  ({hz.size} intervals)"
        )
    lines.append("")
    events = result["events"]
    lines.append(f"events: {len(events)}")
    if events:
        lines.append(
            f"  {'start s':>9} {'type':<12} {'ch':<6} {'dur s':>8} {'level V':>8} {'pu':>6}  "
            f"{'IEEE 1159':<26} {'ITIC':<15} {'F47':<5} {'Se':>5}"
        )
        for e in events:
            f47 = {"inside": "in", "outside": "out"}.get(e["semi_f47"] or "", "-")
            se = "-" if e["severity"] is None else f"{e['severity']:.2f}"
            kind = e["type"] + ("*" if e["partial_outage"] else "")
            lines.append(
                f"  {e['start_s']:>9.3f} {kind:<12} {','.join(map(str, e['channels'])):<6} "
                f"{(e['duration_s'] or 0):>8.3f} {e['level_v']:>8.2f} {e['level_pu']:>6.3f}  "
                f"{e['ieee1159'] or '-':<26} {e['itic'] or '-':<15} {f47:<5} {se:>5}"
            )
        if any(e["partial_outage"] for e in events):
            lines.append("  * partial outage: one leg of the service lost")
    flags = result["flags"]
    lines.append(f"data-quality flags: {len(flags)}")
    for fl in flags[:20]:
        lines.append(
            f"  {fl['kind']:<14} {fl['start_s']:.3f}–{fl['end_s']:.3f} s channels {fl['channels']}"
        )
    if len(flags) > 20:
        lines.append(f"  ... {len(flags) - 20} more (use --json)")
    return "\n".join(lines)
