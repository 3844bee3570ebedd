"""The fleet report: what a recorder store says about every home and about the street.

:func:`fleet_report` reads a :class:`agent.store.recorder.RecorderStore` (read-only) and
returns one JSON-ready dict; :func:`render_text` turns it into tables for the three users:

* utility pilot — "Events seen by many homes at once" (events on different homes that started
  together, :func:`agent.collect.correlate.group_simultaneous`), IEEE 1564 temporal
  aggregation and SARFI indices;
* solar installer — "Overvoltage and swells" (seconds and 10-min means above 1.10 pu, the
  highest swell per day, ANSI C84.1 / EN 50160 service-voltage compliance);
* property manager — "Units out of range, offline or without power".

A home's declared nominal voltage comes from its site model in the store (set by
``RecorderStore.update_device_model``), else from its events (every event message carries
``nominal_v``), else from ``default_nominal_v``, else it is inferred from its median voltage
(nearest standard nominal, marked ``inferred``).

References
----------
ANSI C84.1; EN 50160; EN 50549-1 (10-min mean rule from memory); IEEE 1159-2019 categories;
IEEE 1564-2014 SARFI-X, SARFI-curve and temporal aggregation (one minute, from memory); ITIC
curve (2000).
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping, Sequence
from datetime import UTC, datetime
from typing import Any

import numpy as np

from agent.collect.correlate import (
    EVENT_KINDS,
    SIMULTANEITY_WINDOW_S,
    TEMPORAL_WINDOW_S,
    EventRecord,
    aggregate_temporal,
    group_simultaneous,
    sarfi,
)
from agent.report.compliance import (
    ansi_c84_1,
    en50160_voltage,
    moving_rms_mean,
    overvoltage_summary,
    standard_for,
    summarise,
    ten_minute_means,
)
from agent.report.power_quality import device_sections
from agent.site import infer_nominal
from agent.store.recorder import RecorderStore
from agent.store.trend import TrendChunk
from agent.wire.records import FLAG_EVENT

REPORT_VERSION = 1
#: Per-second fields the report reads (the rest of each stored summary stays packed): the
#: means and Urms(1/2) maxima, the flags, and the frequency only for a unit whose nominal
#: frequency is not declared (it is then inferred from the median).
TREND_FIELDS = frozenset(("rms_mean", "rms_max", "flags"))
_NOMINAL_HZ = (50, 60)
#: SARFI thresholds reported [% of nominal] (IEEE 1564-2014 usual values).
REPORT_SARFI = (90, 70, 50, 10, 110, 120, 140)
#: A device not heard from for this long [s] is called silent (common practice: a few
#: missed heartbeats; the edge sends one every 600 s by default and a summary every 60 s).
SILENT_AFTER_S = 900.0
#: A stored 10-min aggregate is a 10-min mean when it holds this many 10/12-cycle values:
#: 600 s of 0.2-s intervals is 3000 at 50 or 60 Hz; 2900 leaves room for frequency
#: deviation and the resynchronisation at the 10-min tick (IEC 61000-4-30 Ed.3, common
#: practice for the margin).
TEN_MIN_FULL_COUNT = 2900




def _num(x: Any, nd: int = 4) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return round(f, nd) if math.isfinite(f) else None


def category_tag(classification: Mapping[str, Any] | None) -> str:
    """IEEE 1159 category with its duration class, e.g. ``momentary sag``."""
    c = classification or {}
    cat = c.get("ieee1159_category")
    if not cat:
        return "unclassified"
    dur = c.get("ieee1159_duration_class")
    return f"{dur} {cat}" if dur and dur != cat and cat in ("sag", "swell", "interruption") \
        else str(cat)


def _iso(t: float | None) -> str | None:
    if t is None or not math.isfinite(t):
        return None
    return datetime.fromtimestamp(t, tz=UTC).isoformat(timespec="milliseconds").replace(
        "+00:00", "Z")


class _Trend:
    """Per-second values of one device, from the store's decoded trend chunks."""

    def __init__(self) -> None:
        self.t: list[np.ndarray] = []
        self.mean: list[np.ndarray] = []
        self.peak: list[np.ndarray] = []
        self.low: list[np.ndarray] = []
        self.flagged: list[np.ndarray] = []
        self.hz: list[np.ndarray] = []
        self.errors = 0

    def add(self, a: TrendChunk) -> None:
        self.errors += a.errors  # counted and shown; one bad row does not hide the rest
        keep = a.present
        if not keep.any():
            return
        self.t.append(a.t[keep])
        self.mean.append(a.rms_mean[keep])
        self.peak.append(a.rms_max[keep])
        self.low.append(a.rms_min[keep])
        self.flagged.append((a.flags[keep] & FLAG_EVENT) != 0)
        self.hz.append(a.hz[keep])

    def arrays(self) -> dict[str, np.ndarray] | None:
        if not self.t or not sum(x.size for x in self.t):
            return None
        width = max(x.shape[1] for x in self.mean)

        def cat(parts: list[np.ndarray]) -> np.ndarray:
            # A unit whose channel count changed: pad the narrower chunks with NaN.
            return np.concatenate([p if p.shape[1] == width else np.concatenate(
                [p, np.full((p.shape[0], width - p.shape[1]), np.nan)], axis=1) for p in parts])

        t = np.concatenate(self.t)
        order = np.argsort(t, kind="stable")
        return {"t": t[order], "mean": cat(self.mean)[order],
                "peak": cat(self.peak)[order], "low": cat(self.low)[order],
                "flagged": np.concatenate(self.flagged)[order],
                "hz": np.concatenate(self.hz)[order]}


def _nominal(model: Mapping[str, Any], events: Sequence[Mapping[str, Any]],
             trend: dict[str, np.ndarray] | None,
             default_nominal_v: float | None) -> tuple[float | None, str]:
    v = model.get("nominal_v")
    if isinstance(v, int | float) and v > 0:
        return float(v), "declared"
    for ev in events:
        nv = (ev.get("payload") or {}).get("nominal_v")
        if isinstance(nv, int | float) and nv > 0:
            return float(nv), "from events"
    if default_nominal_v:
        return float(default_nominal_v), "assumed"
    if trend is not None:
        med = float(np.nanmedian(trend["mean"])) if np.isfinite(trend["mean"]).any() else math.nan
        if math.isfinite(med) and med > 0:
            return infer_nominal(med), "inferred"
    return None, "unknown"


def _nominal_hz(model: Mapping[str, Any], trend: dict[str, np.ndarray] | None) -> float | None:
    hz = model.get("nominal_hz")
    if hz in _NOMINAL_HZ:
        return float(hz)
    if trend is not None and np.isfinite(trend["hz"]).any():
        med = float(np.nanmedian(trend["hz"]))
        return 60.0 if abs(med - 60.0) < abs(med - 50.0) else 50.0
    return None


def _event_row(ev: Mapping[str, Any]) -> dict[str, Any]:
    p = ev.get("payload") or {}
    return {
        "event_id": ev["event_id"], "kind": ev.get("kind"), "state": ev.get("state"),
        "start_utc": ev.get("start_utc"), "start": _iso(ev.get("start_utc")),
        "duration_s": _num(ev.get("duration_s"), 4), "level_pu": _num(ev.get("level_pu"), 4),
        "level_v": _num(ev.get("level_v"), 2), "category": category_tag(ev.get("classification")),
        "itic": (ev.get("classification") or {}).get("itic_region"),
        "partial_outage": bool(p.get("partial_outage")), "ended_by": p.get("ended_by"),
        "captures": len(ev.get("captures") or []),
    }


def _record(ev: Mapping[str, Any], model: Mapping[str, Any]) -> EventRecord | None:
    """The correlation record of a stored event (None for one that cannot be correlated)."""
    if ev.get("kind") not in EVENT_KINDS or ev.get("start_utc") is None \
            or ev.get("level_pu") is None:
        return None
    sync = (ev.get("payload") or {}).get("sync") or {}
    err = sync.get("error_s") if isinstance(sync, Mapping) else None
    end = ev.get("end_utc") if ev.get("state") == "closed" else None
    if end is not None and end < ev["start_utc"]:
        end = ev["start_utc"]
    try:
        return EventRecord(
            device=ev["device"], site=ev["site"], start_utc=float(ev["start_utc"]),
            end_utc=None if end is None else float(end), kind=ev["kind"],
            level_pu=max(0.0, float(ev["level_pu"])),
            time_error_s=float(err) if isinstance(err, int | float) and err >= 0
            and math.isfinite(err) else None,
            feeder=model.get("feeder"), transformer=model.get("transformer"),
            event_id=ev["event_id"])
    except ValueError:
        return None


def _device_section(dev: Mapping[str, Any], events: list[dict[str, Any]],
                    trend: dict[str, np.ndarray] | None, ten_min: np.ndarray,
                    trend_errors: int, now: float, default_nominal_v: float | None,
                    planned_stop_after: float | None) -> dict[str, Any]:
    model = dev.get("model") or {}
    nominal, nominal_source = _nominal(model, events, trend, default_nominal_v)
    hz = _nominal_hz(model, trend)
    point = model.get("measurement_point") or "service"
    if point not in ("service", "outlet"):
        point = "service"
    by_kind: dict[str, int] = {}
    by_category: dict[str, int] = {}
    for ev in events:
        by_kind[str(ev.get("kind"))] = by_kind.get(str(ev.get("kind")), 0) + 1
        tag = category_tag(ev.get("classification")) if ev.get("state") == "closed" else "open"
        by_category[tag] = by_category.get(tag, 0) + 1
    lows = [ev for ev in events if ev.get("kind") in ("dip", "interruption")
            and ev.get("level_pu") is not None]
    swells = [ev for ev in events if ev.get("kind") == "swell" and ev.get("level_pu") is not None]
    worst_dip = min(lows, key=lambda e: e["level_pu"]) if lows else None
    max_swell = max(swells, key=lambda e: e["level_pu"]) if swells else None
    power_loss = [ev for ev in events if (ev.get("payload") or {}).get("ended_by") == "power_loss"]
    interruptions = [ev for ev in events if ev.get("kind") == "interruption"]
    partial = [ev for ev in events if (ev.get("payload") or {}).get("partial_outage")]

    compliance: dict[str, Any] | None = None
    overvoltage: dict[str, Any] | None = None
    standard = standard_for(nominal, hz) if nominal else None
    if nominal:
        compliance = _compliance(standard or "ansi", nominal, point, trend, ten_min)
    if nominal and trend is not None:
        if ten_min.size:
            ten_means = ten_min.ravel()
        else:  # 10-min moving means of each channel from the per-second values
            ten_means = np.concatenate([moving_rms_mean(trend["t"], trend["mean"][:, c])[1]
                                        for c in range(trend["mean"].shape[1])])
        overvoltage = overvoltage_summary(
            np.repeat(trend["t"][:, None], trend["mean"].shape[1], axis=1).ravel(),
            trend["mean"].ravel(), trend["peak"].ravel(), nominal, ten_min_means_v=ten_means)
        # Seconds counted once however many channels were above.
        limit = overvoltage["threshold_v"]
        overvoltage["seconds_above"] = int(np.count_nonzero(
            np.nanmax(np.where(np.isnan(trend["mean"]), -np.inf, trend["mean"]), axis=1)
            > limit))
        overvoltage["seconds_peak_above"] = int(np.count_nonzero(
            np.nanmax(np.where(np.isnan(trend["peak"]), -np.inf, trend["peak"]), axis=1)
            > limit))

    if max_swell is not None and overvoltage is not None and nominal:
        # A swell's own maximum (Urms(1/2)) may exceed any per-second value kept.
        day = _iso(max_swell["start_utc"])
        if day:
            key = day[:10]
            v = float(max_swell["level_pu"]) * nominal
            overvoltage["max_per_day"][key] = max(overvoltage["max_per_day"].get(key, v), v)
    last_seen = dev.get("last_seen")
    silent_s = None if last_seen is None else max(0.0, now - float(last_seen))
    out_of_range = compliance is not None and compliance.get("passed") is False
    reasons = []
    if out_of_range and compliance is not None:
        if compliance.get("verdict") == "range_b":
            reasons.append(f"outside ANSI C84.1 Range A {compliance['point']} "
                           "(within Range B)")
        elif compliance.get("verdict") == "outside_b":
            reasons.append(f"outside ANSI C84.1 Range B {compliance['point']}")
        else:
            reasons.append(f"fails {compliance['rule']}")
    if power_loss:
        reasons.append("monitor lost power (event closed by power loss)")
    elif interruptions:
        reasons.append("supply interrupted")
    if partial:
        reasons.append("partial outage (a leg or phase lost)")
    planned = (dev.get("state") == "offline" and planned_stop_after is not None
               and dev.get("state_since") is not None
               and float(dev["state_since"]) >= planned_stop_after)
    if dev.get("state") == "offline" and not planned:
        reasons.append("offline")
    elif not planned and silent_s is not None and silent_s > SILENT_AFTER_S:
        reasons.append(f"silent for {silent_s:.0f} s")
    return {
        "device": dev["device"], "site": dev["site"], "feeder": model.get("feeder"),
        "state": dev.get("state"), "state_since": _iso(dev.get("state_since")),
        "planned_stop": planned,
        "last_seen_utc": last_seen, "last_seen": _iso(last_seen), "silent_s": _num(silent_s, 1),
        "nominal_v": nominal, "nominal_source": nominal_source, "nominal_hz": hz,
        "measurement_point": point,
        "events": len(events), "events_by_kind": by_kind, "events_by_category": by_category,
        "worst_dip": None if worst_dip is None else {
            "level_pu": _num(worst_dip["level_pu"]), "level_v": _num(worst_dip.get("level_v"), 2),
            "start": _iso(worst_dip["start_utc"]), "kind": worst_dip["kind"]},
        "max_swell": None if max_swell is None else {
            "level_pu": _num(max_swell["level_pu"]), "level_v": _num(max_swell.get("level_v"), 2),
            "start": _iso(max_swell["start_utc"])},
        "compliance": compliance, "overvoltage": overvoltage,
        "out_of_range": out_of_range,
        "lost_power": bool(power_loss or interruptions),
        "power_loss_events": len(power_loss), "interruptions": len(interruptions),
        "partial_outages": len(partial),
        "trend_seconds": 0 if trend is None else int(trend["t"].size),
        "trend_rows_unreadable": trend_errors,
        "ten_min_aggregates": int(ten_min.shape[0]) if ten_min.size else 0,
        "attention": reasons,
        "event_list": [_event_row(ev) for ev in events],
    }


def _compliance(standard: str, nominal: float, point: str,
                trend: dict[str, np.ndarray] | None,
                ten_min: np.ndarray) -> dict[str, Any] | None:
    """The worst channel's service-voltage compliance (each channel is one line to neutral).

    ANSI C84.1: per-second means (event-flagged seconds not judged), else stored 10-min
    means. EN 50160: stored 10-min means, else clock-aligned 10-min means formed from the
    per-second values (flagged intervals not judged).
    """
    if standard == "ansi":
        if trend is not None:
            results = [ansi_c84_1(trend["mean"][:, c], nominal, point, exclude=trend["flagged"])
                       for c in range(trend["mean"].shape[1])]
            basis = "per-second means, event-flagged seconds excluded"
        elif ten_min.size:
            results = [ansi_c84_1(ten_min[:, c], nominal, point, interval_s=600.0)
                       for c in range(ten_min.shape[1])]
            basis = "10-min aggregates"
        else:
            return None
    elif ten_min.size:
        results = [en50160_voltage(ten_min[:, c], nominal) for c in range(ten_min.shape[1])]
        basis = "10-min aggregates"
    elif trend is not None:
        results = []
        for c in range(trend["mean"].shape[1]):
            _, means, flagged = ten_minute_means(trend["t"], trend["mean"][:, c],
                                                 trend["flagged"])
            results.append(en50160_voltage(means, nominal, exclude=flagged))
        basis = "10-min means of the per-second values, flagged intervals excluded"
    else:
        return None
    worst = min(results, key=_compliance_rank)
    worst["basis"] = basis
    worst["summary"] = summarise(worst)
    return worst


def _compliance_rank(result: Mapping[str, Any]) -> int:
    """Worse results first: fail < provisional/partial < pass < no data."""
    verdict = result.get("verdict")
    if verdict == "outside_b":
        return 0
    if verdict == "range_b" or result.get("passed") is False:
        return 1
    if result.get("passed") is True:
        return 2
    return 3


def _first_data(store: RecorderStore, devices: list[dict[str, Any]]) -> dict[str, float]:
    """Earliest time [s UTC] each device is known to have been measuring: its first trend,
    aggregate or event time, or when it was first seen (read-only SQL)."""
    first: dict[str, float] = {d["device"]: float(d["first_seen"]) for d in devices
                               if d.get("first_seen") is not None}
    for sql in ("SELECT device, MIN(t_utc) FROM trend GROUP BY device",
                "SELECT device, MIN(t_utc) FROM aggregates GROUP BY device",
                "SELECT device, MIN(start_utc) FROM events GROUP BY device"):
        for device, t in store.db.query(sql):
            if t is not None:
                first[device] = min(first.get(device, math.inf), float(t))
    return first


def _ten_min(payloads: list[Any]) -> np.ndarray:
    values = []
    for p in payloads:
        if not isinstance(p, dict):
            continue
        if p.get("kind") != "10min" or not isinstance(p.get("rms"), list):
            continue
        # A partial interval (the agent started or stopped inside it) is no 10-min mean;
        # one flagged by an RMS event is not judged (IEC 61000-4-30 flagging, from memory).
        count = p.get("count")
        if not isinstance(count, int) or count < TEN_MIN_FULL_COUNT or p.get("flagged"):
            continue
        values.append([math.nan if x is None else float(x) for x in p["rms"]])
    if not values:
        return np.empty((0, 0))
    width = max(len(v) for v in values)
    return np.array([v + [math.nan] * (width - len(v)) for v in values])


def fleet_report(store: RecorderStore, *, now: float | None = None,
                 default_nominal_v: float | None = None, min_homes: int = 2,
                 window_s: float = SIMULTANEITY_WINDOW_S,
                 temporal_window_s: float = TEMPORAL_WINDOW_S,
                 planned_stop_after: float | None = None, start_utc: float | None = None,
                 end_utc: float | None = None) -> dict[str, Any]:
    """The fleet report of everything in ``store`` (read-only).

    Parameters
    ----------
    store : RecorderStore
    now : float, optional  [s UTC] reference for "silent" devices (default: the clock)
    default_nominal_v : float, optional  [V] nominal for homes whose store records none
    min_homes : int  a fleet event listed as "seen by many homes" needs this many homes
    window_s : float  [s]  simultaneity window (plus the devices' clock errors)
    temporal_window_s : float  [s]  IEEE 1564 temporal aggregation window (one minute)
    planned_stop_after : float, optional  [s UTC] devices that went offline at or after this
        time stopped as planned (a maintenance window, the end of a demo): not flagged
    start_utc, end_utc : float, optional  [s UTC] the reporting period ``[start, end)``:
        events that start in it, per-second and 10-min values inside it, and the homes
        monitored during it (first seen before its end, last seen after its start)

    Returns
    -------
    dict (JSON-ready): ``homes_monitored``, ``period``, ``devices`` (one section each),
    ``fleet_events``, ``temporal_aggregates``, ``sarfi``, ``outage_windows``,
    ``attention`` (homes needing a look), ``store`` counts (dead letters, gaps).
    """
    now = time.time() if now is None else now
    if start_utc is not None and end_utc is not None and not start_utc < end_utc:
        raise ValueError(f"the period start {start_utc} is not before its end {end_utc}")
    # Monitored in the period: heard from at or after its start, and either known before
    # its end or with data inside it (a store may learn a site model after the data).
    devices = [d for d in store.devices()
               if start_utc is None or d.get("last_seen") is None or d["last_seen"] >= start_utc]
    all_events = store.events(start_from=start_utc, start_before=end_utc)
    first_data = _first_data(store, devices) if end_utc is not None else {}
    by_device: dict[str, list[dict[str, Any]]] = {}
    for ev in all_events:
        by_device.setdefault(ev["device"], []).append(ev)
    known = {d["device"] for d in devices}
    for name in sorted(set(by_device) - known):  # events of a device without a devices row
        first = by_device[name][0]
        devices.append({"device": name, "site": first["site"], "model": {}, "status": {},
                        "last_seen": None, "state": "unknown", "state_since": None})
    sections = []
    records: list[EventRecord] = []
    models: dict[str, Mapping[str, Any]] = {}
    for dev in devices:
        name = dev["device"]
        models[name] = dev.get("model") or {}
        if end_utc is not None and first_data.get(name, dev.get("first_seen") or 0.0) >= end_utc:
            continue  # not yet monitored in the period
        # One home at a time: its seconds are decoded chunk by chunk and dropped once its
        # section is made, so memory follows the largest home, not the fleet.
        trend = _Trend()
        fields = TREND_FIELDS if models[name].get("nominal_hz") in _NOMINAL_HZ \
            else TREND_FIELDS | {"hz"}
        for chunk in store.trend_arrays(name, start_utc, end_utc, fields=fields):
            trend.add(chunk)
        events = by_device.get(name, [])
        aggregates = store.ten_min_aggregates(name, start_utc, end_utc)
        sections.append(_device_section(dev, events, trend.arrays(), _ten_min(aggregates),
                                        trend.errors, now,
                                        default_nominal_v, planned_stop_after))
        # Harmonics and flicker verdicts per channel (agent.report.power_quality).
        sections[-1].update(device_sections([p for p in aggregates if isinstance(p, dict)]))
        for ev in events:
            rec = _record(ev, models[name])
            if rec is not None:
                records.append(rec)
    homes = len(sections)

    fleet = group_simultaneous(records, window_s=window_s)
    fleet_rows = []
    for fe in fleet:
        if fe.homes < min_homes:
            continue
        kinds = sorted({e.kind for e in fe.events})
        fleet_rows.append({
            "start_utc": fe.start_utc, "start": _iso(fe.start_utc),
            "end": _iso(fe.end_utc), "kinds": kinds,
            "homes": fe.homes, "homes_monitored": homes,
            "share": round(fe.homes / homes, 4) if homes else None,
            "devices": list(fe.devices), "sites": list(fe.sites), "feeder": fe.feeder,
            "homes_on_feeder": (sum(1 for sec in sections if sec["feeder"] == fe.feeder)
                                if fe.feeder else None),
            "worst_level_pu": _num(fe.level_pu), "worst_device": fe.worst.device,
            "longest_s": _num(max((e.duration_s or 0.0) for e in fe.events), 4),
            "spread_s": _num(max(e.start_utc for e in fe.events) - fe.start_utc, 4),
            "event_ids": [e.event_id for e in fe.events],
        })
    temporal = aggregate_temporal(fleet, window_s=temporal_window_s)
    # Per home, sags (dips, interruptions) and swells aggregate separately, so a swell in the
    # same minute as a deeper sag still counts for SARFI-110+ (common practice).
    per_home = aggregate_temporal(
        records, window_s=temporal_window_s,
        key=lambda e: f"{e.device}/{'swell' if e.kind == 'swell' else 'sag'}")
    sarfi_out: dict[str, Any] = {"homes_monitored": homes}
    if homes:
        result = sarfi([a.representative for a in per_home], homes, REPORT_SARFI)
        sarfi_out.update({
            "counts": {f"SARFI-{x}": result.counts[x] for x in REPORT_SARFI},
            "index": {f"SARFI-{x}": round(result.index[x], 4) for x in REPORT_SARFI},
            "SARFI-ITIC": round(result.itic, 4), "itic_count": result.itic_count,
            "SARFI-SEMI": round(result.semi, 4), "semi_count": result.semi_count,
            "skipped_open": result.skipped_open,
            "events_counted": len(per_home), "events_stored": len(records),
        })
    # Outage windows as the store recorded them from every restart report and last-gasp
    # event (the devices table keeps only the latest status, so it cannot give them).
    # Reports the store could not read were dead-lettered with the reason, not dropped.
    outage_errors: list[str] = []
    windows = store.outage_windows(start_from=start_utc, end_before=end_utc)
    starts = [ev["start_utc"] for ev in all_events if ev.get("start_utc") is not None]
    trend_t = [s["last_seen_utc"] for s in sections if s["last_seen_utc"] is not None]
    return {
        "report": "halfcycle fleet report", "version": REPORT_VERSION,
        "generated": _iso(now), "homes_monitored": homes,
        "period_requested": {"start": _iso(start_utc), "end": _iso(end_utc)},
        "sites": sorted({s["site"] for s in sections}),
        "period": {"first_event": _iso(min(starts)) if starts else None,
                   "last_event": _iso(max(starts)) if starts else None,
                   "last_seen": _iso(max(trend_t)) if trend_t else None},
        "devices": sections,
        "fleet_events": fleet_rows,
        "simultaneity_window_s": window_s,
        "temporal_aggregates": {
            "window_s": temporal_window_s, "fleet_events": len(fleet),
            "fleet_aggregates": len(temporal),
            "per_home_events": len(records), "per_home_aggregates": len(per_home)},
        "sarfi": sarfi_out,
        "outage_windows": [{"device": w.device, "site": w.site, "start": _iso(w.start_utc),
                            "end": _iso(w.end_utc), "duration_s": _num(w.duration_s, 3),
                            "sources": list(w.sources)} for w in windows],
        "outage_errors": outage_errors,
        # Most of a site's monitors out at once: one site-level outage, not N unit outages.
        "site_outages": [{"site": o.site, "start": _iso(o.start_utc), "end": _iso(o.end_utc),
                          "duration_s": _num(o.end_utc - o.start_utc, 3),
                          "devices": list(o.devices), "devices_monitored": o.devices_monitored}
                         for o in store.site_outages(start_from=start_utc, end_before=end_utc)],
        "attention": [{"device": s["device"], "site": s["site"], "reasons": s["attention"]}
                      for s in sections if s["attention"]],
        "store": {"events": len(all_events),
                  "events_not_correlated": len(all_events) - len(records),
                  "dead_letters": store.count("dead_letters"),
                  "gaps": store.count("gaps"), "captures": store.count("captures")},
    }


# --- text -------------------------------------------------------------------------------------


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    cells = [[("-" if c is None else str(c)) for c in row] for row in rows]
    widths = [max(len(h), *(len(r[i]) for r in cells)) if cells else len(h)
              for i, h in enumerate(headers)]
    line = "  ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in cells]
    return out


def _names(devices: Sequence[str], most: int = 6) -> str:
    """Device names for a table cell; a long list is cut (the JSON report has them all)."""
    shown = ", ".join(devices[:most])
    return shown if len(devices) <= most else f"{shown} ... (+{len(devices) - most} more)"


def _pu(x: float | None) -> str | None:
    return None if x is None else f"{x:.3f}"


def render_text(report: Mapping[str, Any]) -> str:
    """The report as readable text (tables), one section per question."""
    lines: list[str] = []
    if report.get("invented"):
        lines += ["*** INVENTED DATA: a made-up demo street, not measurements of any real "
                  "home, feeder or utility. ***", ""]
    homes = report["homes_monitored"]
    lines.append(f"halfcycle fleet report - {homes} homes monitored, sites: "
                 f"{', '.join(report['sites']) or '-'}; generated {report['generated']}")
    period = report["period"]
    lines.append(f"events from {period['first_event'] or '-'} to {period['last_event'] or '-'};"
                 f" last heard {period['last_seen'] or '-'}")
    lines.append("")

    lines.append("== Events seen by many homes at once (likely upstream: feeder or "
                 "transmission) ==")
    if report["fleet_events"]:
        lines += _table(
            ("start (UTC)", "kind", "homes", "feeder", "worst pu", "longest s", "spread s",
             "devices"),
            [(f["start"], "+".join(f["kinds"]), f"{f['homes']}/{f['homes_monitored']}",
              None if not f["feeder"] else f"{f['feeder']} ({f['homes']}/{f['homes_on_feeder']})",
              _pu(f["worst_level_pu"]), f["longest_s"], f["spread_s"], _names(f["devices"]))
             for f in report["fleet_events"]])
    else:
        lines.append("none: no event started on two or more homes together")
    ta = report["temporal_aggregates"]
    lines += [f"IEEE 1564 temporal aggregation ({ta['window_s']:.0f} s): {ta['fleet_events']} "
              f"fleet events -> {ta['fleet_aggregates']} aggregates;",
              f"  {ta['per_home_events']} home events -> {ta['per_home_aggregates']} counted "
              "for SARFI (sags and swells aggregated apart)"]
    lines.append("")

    lines.append("== How many homes saw sags, swells and curve violations (IEEE 1564 SARFI) ==")
    s = report["sarfi"]
    if "index" in s:
        keys = list(s["index"])
        lines += _table(("index", *keys, "SARFI-ITIC"),
                        [("homes (N_i)", *(s["counts"][k] for k in keys), s["itic_count"]),
                         ("per home monitored", *(f"{s['index'][k]:.3f}" for k in keys),
                          f"{s['SARFI-ITIC']:.3f}")])
        lines.append(f"over {s['homes_monitored']} homes monitored; open events not counted: "
                     f"{s['skipped_open']}")
    lines.append("")

    lines.append("== Overvoltage and swells (solar installers) ==")
    rows: list[tuple[Any, ...]] = []
    for d in report["devices"]:
        ov = d.get("overvoltage")
        swell = d.get("max_swell")
        days = (ov or {}).get("max_per_day") or {}
        nominal = d.get("nominal_v")
        rows.append((
            d["device"],
            None if swell is None else f"{swell['level_pu']:.3f} ({swell['level_v']} V)",
            None if ov is None else ov["seconds_above"],
            None if ov is None else ov["seconds_peak_above"],
            None if ov is None else (f"{ov['ten_min_above']}/{ov['ten_min_means']}"
                                     if ov["ten_min_means"] else "n/a (<10 min)"),
            "; ".join(f"{k} {v:.1f} V" + (f" ({v / nominal:.3f} pu)" if nominal else "")
                      for k, v in sorted(days.items())) or None,
        ))
    lines += _table(("home", "max swell pu", "s mean>1.10", "s peak>1.10", "10-min>1.10",
                     "highest per day"), rows)
    lines += ["1.10 pu: EN 50549-1 10-min mean trip level (from memory). 10-min column: means",
              "  above 1.10 pu / 10-min means available (stored, else moving means)."]
    lines.append("")

    lines.append("== Service voltage compliance ==")
    rows = []
    for d in report["devices"]:
        c = d.get("compliance")
        nominal = d.get("nominal_v")
        name = None if nominal is None else f"{nominal:g} ({d['nominal_source']})"
        if c is None:
            rows.append((d["device"], name, d.get("measurement_point"), "no data", None, None,
                         None, None))
            continue
        ansi = c["standard"] == "ANSI C84.1"
        r = c["range_a"] if ansi else c["band"]
        verdict = (c["verdict"].replace("_", " ") if ansi
                   else {True: "pass", False: "fail", None: "no data"}[c["passed"]]
                   + ("" if c["complete_week"] else " (provisional)"))
        rows.append((
            d["device"], name, d.get("measurement_point"), verdict,
            None if r["fraction_inside"] is None else f"{100 * r['fraction_inside']:.1f} %",
            f"{r['low_v']:.1f}-{r['high_v']:.1f} V",
            f"{r['time_below_s']:.0f}/{r['time_above_s']:.0f}",
            f"{r['worst_low_v']:.1f}/{r['worst_high_v']:.1f}"
            if r["worst_low_v"] is not None else None))
    lines += _table(("home", "nominal V", "point", "verdict", "inside", "limits",
                     "s below/above", "worst low/high V"), rows)
    lines += [
        "ANSI C84.1 (60-Hz homes): 'inside' = share of per-second (or 10-min) means within",
        "  Range A; verdict range a / range b / outside b. Range A service limits: public",
        "  summaries; utilization and Range B limits: from memory.",
        "EN 50160 (50-Hz homes): 10-min means within Un +-10 % for 95 % of a week, all within",
        "  +10/-15 %; provisional until a full week (1008 means).",
        "Values flagged by an RMS event are not judged."]
    lines.append("")

    lines.append("== Units out of range, offline or without power (property managers) ==")
    if report["attention"]:
        lines += _table(("home", "site", "why"),
                        [(a["device"], a["site"], "; ".join(a["reasons"]))
                         for a in report["attention"]])
    else:
        lines.append("none")
    if report["outage_windows"]:
        lines.append("outage windows (from restart reports and power-loss events):")
        lines += _table(("home", "from", "to", "s", "from reports"),
                        [(w["device"], w["start"], w["end"], w["duration_s"],
                          ", ".join(w["sources"])) for w in report["outage_windows"]])
    if report["site_outages"]:
        lines.append("site outages (most of a site's monitors out at once):")
        lines += _table(("site", "from", "to", "s", "homes out"),
                        [(o["site"], o["start"], o["end"], o["duration_s"],
                          f"{len(o['devices'])}/{o['devices_monitored']}")
                         for o in report["site_outages"]])
    lines.append("")

    lines.append("== Every home ==")
    lines += _table(
        ("home", "site", "state", "last seen", "events", "by IEEE 1159 category", "worst dip pu"),
        [(d["device"], d["site"], d["state"] + (" (planned stop)" if d["planned_stop"] else ""),
          d["last_seen"], d["events"],
          ", ".join(f"{k} {v}" for k, v in sorted(d["events_by_category"].items())) or None,
          None if d["worst_dip"] is None else _pu(d["worst_dip"]["level_pu"]))
         for d in report["devices"]])
    st = report["store"]
    lines.append("")
    lines.append(f"store: {st['events']} events, {st['captures']} captures, {st['gaps']} gap "
                 f"notices, {st['dead_letters']} dead letters")
    unreadable = {d["device"]: d["trend_rows_unreadable"] for d in report["devices"]
                  if d["trend_rows_unreadable"]}
    if unreadable:
        lines.append(f"NOT USED: unreadable per-second rows {unreadable}")
    if st.get("events_not_correlated"):
        lines.append(f"NOT USED in fleet figures: {st['events_not_correlated']} events without "
                     "kind, start or level")
    for problem in report.get("outage_errors") or []:
        lines.append(f"NOT USED in outage windows: {problem}")
    return "\n".join(lines) + "\n"
