"""Offline analysis of a recording: the result object behind ``halfcycle analyze``.

Times in the result are seconds from the file start (``t``, ``start_s``); given the
recording's start time (``--start``), events also carry their UTC time and time of day, and
the 10-min aggregates align to the UTC clock. The limits section (``compliance``) has the same
shape as a fleet report device's (:func:`agent.report.device.compliance`), judged on the
file's complete 10-min means.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from typing import Any

import numpy as np

from agent.events.types import Event
from agent.pipeline import Frame
from agent.report.device import TenMin, compliance, summarise
from agent.report.now import TEN_MIN_FULL_COUNT
from agent.report.power_quality import analysis_sections
from agent.verdicts import INDICATIVE
from agent.verdicts.limits import standard_for
from agent.verdicts.nominal import Nominal
from agent.verdicts.series import window_means


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


def _clock(t: float) -> str:
    return datetime.fromtimestamp(t, tz=UTC).isoformat(timespec="milliseconds").replace(
        "+00:00", "Z")


def event_record(ev: Event, origin_utc: float | None = None) -> dict[str, Any]:
    """One event of the file; ``start_s`` from the file start, and with the recording's start
    time ``origin_utc`` also ``start_utc`` / ``start`` (ISO 8601) / ``time_of_day``."""
    c = ev.classification or {}
    category, duration_class = c.get("ieee1159_category"), c.get("ieee1159_duration_class")
    ieee1159 = (
        category if duration_class in (None, "", category) else f"{duration_class} {category}"
    )
    origin = origin_utc or 0.0
    when = {} if origin_utc is None else {
        "start_utc": _num(ev.start_utc, 5), "start": _clock(ev.start_utc),
        "time_of_day": _clock(ev.start_utc)[11:23]}
    return {
        "type": ev.kind,
        "channels": list(ev.channels),
        "start_s": _num(ev.start_utc - origin, 5),
        **when,
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
                t_rel = agg.t_utc - self.timebase_origin
                if agg.hz is not None:
                    self.frequency.append({"t": round(t_rel, 3), "hz": round(agg.hz, 5)})
                else:
                    self.aggregates.append(
                        {
                            "kind": agg.kind,
                            "t": round(t_rel, 3),
                            "v": [round(v, 4) for v in agg.rms],
                            "thd": [_num(float(x), 5) for x in agg.thd],
                            "flagged": agg.flagged,
                            "count": agg.count,
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
        start_utc: float | None = None,
        nominal_candidates: tuple[float, ...] = (),
        measurement_point: str = "service",
    ) -> dict[str, Any]:
        events = sorted(self.events, key=lambda e: e.start)
        nominal = Nominal(nominal_v, "inferred" if nominal_inferred else "declared",
                          nominal_candidates or (nominal_v,))
        return {
            "source": source,
            "start": None if start_utc is None else _clock(start_utc),
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
            "events": [event_record(e, start_utc) for e in events],
            "captures": self.captures,
            "flags": self.flags,
            **analysis_sections(self.ten_min),
            "indicative": INDICATIVE,
            "compliance": self.limits(nominal, nominal_hz, measurement_point),
        }

    def limits(self, nominal: Nominal, nominal_hz: float, point: str) -> dict[str, Any]:
        """The file's service-voltage verdict on its complete 10-min means (flagged ones
        judged), with sustained excursions from per-second means of the 10/12-cycle values;
        the same shape as a fleet report device's ``compliance``."""
        ten = [a for a in self.aggregates if a["kind"] == "10min"
               and a.get("count", 0) >= TEN_MIN_FULL_COUNT]
        width = max((len(a["v"]) for a in ten), default=1)
        ten_min = TenMin(
            np.array([self.timebase_origin + a["t"] for a in ten], dtype=float),
            np.array([a["v"] for a in ten], dtype=float).reshape(len(ten), width),
            np.array([[np.nan if x is None else x for x in a["thd"]] for a in ten],
                     dtype=float).reshape(len(ten), width),
            np.array([bool(a["flagged"]) for a in ten], dtype=bool))
        trend = None
        if self.rms_10_12:
            t = self.timebase_origin + np.array([r["t"] for r in self.rms_10_12])
            v = np.array([r["v"] for r in self.rms_10_12], dtype=float)
            # Per-second RMS of the 10/12-cycle values (0.2 s each): the excursion lists.
            ts, vs, _ = window_means(t, v, 1.0, period_s=0.2, min_coverage=0.8)
            trend = {"t": ts, "mean": vs, "flagged": np.zeros(ts.size, bool)}
        verdict, _ = compliance(standard_for(nominal.volts, nominal_hz), nominal, point,
                                trend, ten_min, 600.0)
        out = verdict.as_dict()
        out["summary"] = summarise(out)
        return out


def render_table(result: dict[str, Any]) -> str:
    """A readable plain-text report of an analysis result."""
    lines = [
        f"recording   {result['source']}",
        f"duration    {result['duration_s']:.1f} s at {result['sample_rate']:g} S/s, "
        f"{result['channels']} channel(s) {', '.join(result['channel_names'])}",
        f"nominal     {result['nominal_v']:g} V {result['nominal_hz']:g} Hz"
        + (" (inferred: pass --nominal to declare it)" if result["nominal_inferred"] else ""),
    ]
    if result.get("start"):
        lines.append(f"start       {result['start']} (event times are times of day, UTC)")
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
        clock = bool(result.get("start"))
        lines.append(
            f"  {'UTC time' if clock else 'start s':>12} {'type':<12} {'ch':<6} {'dur s':>8} "
            f"{'level V':>8} {'pu':>6}  "
            f"{'IEEE 1159':<26} {'ITIC':<15} {'F47':<5} {'Se':>5}"
        )
        for e in events:
            f47 = {"inside": "in", "outside": "out"}.get(e["semi_f47"] or "", "-")
            se = "-" if e["severity"] is None else f"{e['severity']:.2f}"
            kind = e["type"] + ("*" if e["partial_outage"] else "")
            lines.append(
                f"  {e['time_of_day'] if clock else format(e['start_s'], '.3f'):>12} "
                f"{kind:<12} {','.join(map(str, e['channels'])):<6} "
                f"{(e['duration_s'] or 0):>8.3f} {e['level_v']:>8.2f} {e['level_pu']:>6.3f}  "
                f"{e['ieee1159'] or '-':<26} {e['itic'] or '-':<15} {f47:<5} {se:>5}"
            )
        if any(e["partial_outage"] for e in events):
            lines.append("  * partial outage: one leg of the service lost")
    c = result.get("compliance")
    if c is not None:
        lines.append("")
        lines.append(f"limits      {c['standard']}: {c['summary']}")
        for e in (c.get("excursions") or {}).get("longer_than_60s", []):
            lines.append(f"  sustained excursion: {e['extreme_v']:.1f} V ({e['side']}) for "
                         f"{e['duration_s']:.0f} s from {e['start']}")
        for note in c.get("notes") or []:
            lines.append(f"  {note}")
        lines.append(f"  verdicts are {result['indicative']}")
    flags = result["flags"]
    lines.append(f"data-quality flags: {len(flags)}")
    for fl in flags[:20]:
        lines.append(
            f"  {fl['kind']:<14} {fl['start_s']:.3f}–{fl['end_s']:.3f} s channels {fl['channels']}"
        )
    if len(flags) > 20:
        lines.append(f"  ... {len(flags) - 20} more (use --json)")
    return "\n".join(lines)
