"""The fleet report: what a recorder store says about every home and about the street.

:func:`fleet_report` reads a :class:`agent.store.recorder.RecorderStore` (read-only), calls
the pure verdicts (:mod:`agent.verdicts`, composed per home in :mod:`agent.report.device`) and
returns one JSON-ready dict; :func:`agent.report.fleet_text.render_text` turns it into text.

* utility pilot — events seen by many homes at once, IEEE 1564 temporal aggregation, SARFI
  (sag side and swell side apart), EN 50160 / IEEE 1366 interruption statistics;
* solar installer — overvoltage and swells, would the inverter have tripped (IEEE 1547-2018
  category defaults, EN 50549-1 10-min mean), service-voltage compliance, voltage profile;
* property manager — the attention list: what is true *now* (offline since, supply out since,
  out of range in the last 10-min mean, lost power: :func:`agent.report.now.fleet_now`) apart
  from what happened in the period.

Every verdict is judged on all values (flagged ones included) and states its basis; the
report carries :data:`agent.verdicts.INDICATIVE` once.

References
----------
ANSI C84.1; EN 50160; EN 50549-1 (10-min mean rule from memory); IEEE 1547-2018; IEEE 1366;
IEEE 1159 categories; IEEE 1564-2014 SARFI-X, SARFI-curve and temporal aggregation (one
minute, from memory); ITIC curve (2000).
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping
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
from agent.report.device import (
    EMPTY_TEN_MIN,
    TenMin,
    device_verdicts,
    dip_duration,
    period_reasons,
    pick_nominal,
)
from agent.report.fleet_text import category_tag, render_text
from agent.report.now import TEN_MIN_FULL_COUNT, fleet_now, is_planned_stop
from agent.report.power_quality import device_sections
from agent.report.seconds import Limits, Seconds, from_rollups, from_seconds
from agent.store.recorder import RecorderStore
from agent.verdicts import INDICATIVE
from agent.verdicts.interruptions import interruption_stats
from agent.verdicts.inverter import EN50549_TEN_MIN_PU, IEEE1547_DEFAULTS
from agent.verdicts.limits import ansi_band, standard_for
from agent.verdicts.nominal import Nominal

REPORT_VERSION = 2
#: SARFI thresholds reported [% of nominal] (IEEE 1564-2014 usual values).
REPORT_SARFI = (90, 70, 50, 10, 110, 120, 140)
#: A device not heard from for this long [s] is called silent (common practice: a few
#: missed heartbeats; the edge sends one every 600 s by default and a summary every 60 s).
SILENT_AFTER_S = 900.0

__all__ = ["REPORT_VERSION", "fleet_report", "render_text"]


def _num(x: Any, nd: int = 4) -> float | None:
    if x is None or isinstance(x, bool):
        return None
    try:
        f = float(x)
    except (TypeError, ValueError):
        return None
    return round(f, nd) if math.isfinite(f) else None


def _iso(t: float | None) -> str | None:
    if t is None or not math.isfinite(t):
        return None
    return datetime.fromtimestamp(t, tz=UTC).isoformat(timespec="milliseconds").replace(
        "+00:00", "Z")


def _nominal_hz(model: Mapping[str, Any], ten_min: TenMin,
                trend: dict[str, np.ndarray] | None) -> float | None:
    """Declared, else the nearer of 50/60 Hz to the median of the stored 10-min mean
    frequencies (of the per-second ones without them)."""
    hz = model.get("nominal_hz")
    if hz in (50, 60, 50.0, 60.0):
        return float(hz)
    values = ten_min.hz if ten_min.hz is not None and np.isfinite(ten_min.hz).any() else (
        trend["hz"] if trend is not None else None)
    if values is not None and np.isfinite(values).any():
        med = float(np.nanmedian(values))
        return 60.0 if abs(med - 60.0) < abs(med - 50.0) else 50.0
    return None


def _limits(nominal: Nominal, hz: float | None, point: str, category: str) -> Limits:
    """The limits whose runs of single seconds the verdicts count: the IEEE 1547 default
    settings and the overvoltage level (1.10 pu, means and Urms(1/2) maxima), and ANSI C84.1
    Range A for its excursion lists (the band every candidate nominal gives, when inferred)."""
    n = nominal.volts
    lows = [pu * n for _, side, pu, _ in IEEE1547_DEFAULTS[category] if side == "under"]
    highs = [pu * n for _, side, pu, _ in IEEE1547_DEFAULTS[category] if side == "over"]
    highs.append(EN50549_TEN_MIN_PU * n)
    band_low = band_high = None
    if standard_for(n, hz) == "ansi":
        bands = [ansi_band(volts, "A", point) for volts in {n, *nominal.candidates}]
        band_low = max(b.low_v for b in bands)
        band_high = min(b.high_v for b in bands)
    return Limits(max(lows), min(highs), EN50549_TEN_MIN_PU * n, band_low, band_high,
                  stand_ins=not (set(nominal.candidates) - {n}))


def _event_row(ev: Mapping[str, Any]) -> dict[str, Any]:
    p = ev.get("payload") or {}
    return {
        "event_id": ev["event_id"], "kind": ev.get("kind"), "state": ev.get("state"),
        "start_utc": ev.get("start_utc"), "start": _iso(ev.get("start_utc")),
        "duration_s": _num(ev.get("duration_s"), 4),
        "dip_duration_s": _num(dip_duration(ev), 4),
        "level_pu": _num(ev.get("level_pu"), 4),
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
            event_id=ev["event_id"], dip_duration_s=dip_duration(ev))
    except ValueError:
        return None


def _point(model: Mapping[str, Any]) -> str:
    point = model.get("measurement_point") or "service"
    return point if point in ("service", "outlet") else "service"


def _read_home(store: RecorderStore, dev: Mapping[str, Any], events: list[dict[str, Any]],
               ten_min: TenMin, start_utc: float | None, end_utc: float | None,
               default_nominal_v: float | None, window_s: float, inverter_category: str,
               every_second: bool) -> tuple[Seconds, float | None, Nominal | None]:
    """One home's per-second values (from the rollups and the seconds they point to, or
    every second), its nominal frequency and nominal voltage."""
    model = dev.get("model") or {}
    name = dev["device"]
    if not every_second and ten_min.size and window_s == 600.0:
        hz = _nominal_hz(model, ten_min, None)
        nominal = pick_nominal(model, events, None, ten_min, hz, default_nominal_v)
        if nominal is not None:
            limits = _limits(nominal, hz, _point(model), inverter_category)
            return from_rollups(store, name, start_utc, end_utc, limits), hz, nominal
    seconds = from_seconds(store, name, start_utc, end_utc)
    hz = _nominal_hz(model, ten_min, seconds.arrays)
    return seconds, hz, pick_nominal(model, events, seconds.arrays, ten_min, hz,
                                     default_nominal_v)


def _device_section(dev: Mapping[str, Any], events: list[dict[str, Any]],
                    seconds: Seconds, hz: float | None, nominal: Nominal | None,
                    ten_min: TenMin, now: float, planned_stop_after: float | None,
                    window_s: float, inverter_category: str) -> dict[str, Any]:
    model = dev.get("model") or {}
    point = _point(model)
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

    order = (dev.get("status") or {}).get("thd_max_order")  # newer edges state it
    verdicts = device_verdicts(model, events, seconds, ten_min, nominal=nominal, hz=hz,
                               point=point, window_s=window_s,
                               inverter_category=inverter_category,
                               thd_max_order=order if isinstance(order, int)
                               and not isinstance(order, bool) else None)
    overvoltage = verdicts["overvoltage"]
    if max_swell is not None and overvoltage is not None and nominal is not None:
        # A swell's own maximum (Urms(1/2)) may exceed any per-second value kept.
        day = _iso(max_swell["start_utc"])
        if day:
            key = day[:10]
            v = float(max_swell["level_pu"]) * nominal.volts
            overvoltage["max_per_day"][key] = max(overvoltage["max_per_day"].get(key, v), v)
    last_seen = dev.get("last_seen")
    silent_s = None if last_seen is None else max(0.0, now - float(last_seen))
    compliance = verdicts["compliance"]
    # A planned stop: the agent announced it (its own offline status), or it went offline
    # inside the caller's maintenance window (planned_stop_after).
    planned = dev.get("state") == "offline" and (
        is_planned_stop(dev.get("status") or {})
        or (planned_stop_after is not None and dev.get("state_since") is not None
            and float(dev["state_since"]) >= planned_stop_after))
    section = {
        "device": dev["device"], "site": dev["site"], "feeder": model.get("feeder"),
        "state": dev.get("state"), "state_since": _iso(dev.get("state_since")),
        "planned_stop": planned,
        "last_seen_utc": last_seen, "last_seen": _iso(last_seen), "silent_s": _num(silent_s, 1),
        "nominal_v": None if nominal is None else nominal.volts,
        "nominal_source": "unknown" if nominal is None else nominal.source,
        "nominal_candidates": [] if nominal is None else list(nominal.candidates),
        "nominal_hz": hz, "measurement_point": point, "standard": verdicts["standard"],
        "events": len(events), "events_by_kind": by_kind, "events_by_category": by_category,
        "worst_dip": None if worst_dip is None else {
            "level_pu": _num(worst_dip["level_pu"]), "level_v": _num(worst_dip.get("level_v"), 2),
            "start": _iso(worst_dip["start_utc"]), "kind": worst_dip["kind"]},
        "max_swell": None if max_swell is None else {
            "level_pu": _num(max_swell["level_pu"]), "level_v": _num(max_swell.get("level_v"), 2),
            "start": _iso(max_swell["start_utc"])},
        "compliance": compliance, "overvoltage": overvoltage,
        "profile": verdicts["profile"], "inverter": verdicts["inverter"],
        "supply": verdicts["supply"],
        "out_of_range": compliance is not None and compliance.get("passed") is False,
        "lost_power": bool(power_loss or interruptions),
        "power_loss_events": len(power_loss), "interruptions": len(interruptions),
        "partial_outages": len(partial),
        "trend_seconds": seconds.seconds,
        "trend_seconds_read": seconds.decoded,
        "trend_rows_unreadable": seconds.errors,
        "ten_min_aggregates": ten_min.size,
        "event_list": [_event_row(ev) for ev in events],
    }
    section["attention_period"] = period_reasons(section)
    return section


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


def _ten_min(payloads: list[Any]) -> TenMin:
    """Complete stored 10-min aggregates. Flagged ones are kept and judged (the flag is for
    event statistics, IEC 61000-4-30, from memory); a partial interval (the agent started or
    stopped inside it) is no 10-min mean."""
    rows: list[tuple[float, list[float], list[float], bool, float]] = []
    orders: set[int] = set()
    for p in payloads:
        if not isinstance(p, dict) or p.get("kind") != "10min" \
                or not isinstance(p.get("rms"), list):
            continue
        count, t = p.get("count"), p.get("t")
        if not isinstance(count, int) or count < TEN_MIN_FULL_COUNT \
                or not isinstance(t, int | float):
            continue
        thd_raw = p.get("thd")
        thd: list[Any] = thd_raw if isinstance(thd_raw, list) else []
        rows.append((float(t), [math.nan if x is None else float(x) for x in p["rms"]],
                     [math.nan if x is None else float(x) for x in thd],
                     bool(p.get("flagged")),
                     float(p["hz"]) if isinstance(p.get("hz"), int | float)
                     and not isinstance(p.get("hz"), bool) else math.nan))
        order = p.get("thd_max_order")  # newer edges state the THD's harmonic orders
        if isinstance(order, int) and not isinstance(order, bool):
            orders.add(order)
    if not rows:
        return EMPTY_TEN_MIN
    width = max(len(r[1]) for r in rows)

    def pad(x: list[float]) -> list[float]:
        return x + [math.nan] * (width - len(x))

    return TenMin(np.array([r[0] for r in rows]), np.array([pad(r[1]) for r in rows]),
                  np.array([pad(r[2][:width]) for r in rows]), np.array([r[3] for r in rows]),
                  min(orders) if orders else None, np.array([r[4] for r in rows]))


def _interruption_windows(store: RecorderStore, all_events: list[dict[str, Any]],
                          start_utc: float | None, end_utc: float | None,
                          ) -> tuple[list[dict[str, Any]], list[Any]]:
    """Each home without supply: the store's outage windows (power loss reports) and the
    closed interruption events its monitor rode through (merged per home by the verdict)."""
    windows = store.outage_windows(start_from=start_utc, end_before=end_utc)
    spans = [{"device": w.device, "start_utc": w.start_utc, "end_utc": w.end_utc}
             for w in windows]
    for ev in all_events:
        if ev.get("kind") == "interruption" and ev.get("state") == "closed" \
                and ev.get("start_utc") is not None and ev.get("end_utc") is not None:
            spans.append({"device": ev["device"], "start_utc": float(ev["start_utc"]),
                          "end_utc": max(float(ev["end_utc"]), float(ev["start_utc"]))})
    return spans, windows


def fleet_report(store: RecorderStore, *, now: float | None = None,
                 default_nominal_v: float | None = None, min_homes: int = 2,
                 window_s: float = SIMULTANEITY_WINDOW_S,
                 temporal_window_s: float = TEMPORAL_WINDOW_S,
                 planned_stop_after: float | None = None, start_utc: float | None = None,
                 end_utc: float | None = None, averaging_window_s: float = 600.0,
                 inverter_category: str = "II", every_second: bool = False) -> dict[str, Any]:
    """The fleet report of everything in ``store`` (read-only).

    Parameters
    ----------
    store : RecorderStore
    now : float, optional  [s UTC] reference for "now" (default: the clock)
    default_nominal_v : float, optional  [V] nominal for homes whose store records none
    min_homes : int  a fleet event listed as "seen by many homes" needs this many homes
    window_s : float  [s]  simultaneity window (plus the devices' clock errors)
    temporal_window_s : float  [s]  IEEE 1564 temporal aggregation window (one minute)
    planned_stop_after : float, optional  [s UTC] devices that went offline at or after this
        time stopped as planned (a maintenance window, the end of a demo): not flagged
    start_utc, end_utc : float, optional  [s UTC] the reporting period ``[start, end)``:
        events that start in it, per-second and 10-min values inside it; a unit silent since
        before the period is still listed (``monitored_in_period`` False, silent since ...)
    averaging_window_s : float  [s]  ANSI C84.1 averaging window (60, 300, 600 or 900)
    inverter_category : IEEE 1547-2018 category (I, II, III) for "would it have tripped"
    every_second : read every stored second of every home instead of the 10-min rollups and
        the seconds they point to (the same answers, slower; for checks)

    Returns
    -------
    dict (JSON-ready): ``indicative``, ``homes_monitored``, ``period``, ``devices`` (one
    section each), ``fleet_events``, ``temporal_aggregates``, ``sarfi``, ``interruptions``,
    ``outage_windows``, ``now`` (each unit's state now), ``attention`` (now and period
    apart), ``store`` counts (dead letters, gaps).
    """
    now = time.time() if now is None else now
    if start_utc is not None and end_utc is not None and not start_utc < end_utc:
        raise ValueError(f"the period start {start_utc} is not before its end {end_utc}")
    every_second = every_second or not store.has_unit_rollups()
    devices = store.devices()
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
    for dev in devices:
        name = dev["device"]
        if end_utc is not None and first_data.get(name, dev.get("first_seen") or 0.0) >= end_utc:
            continue  # not yet monitored in the period
        # One home at a time: its rollups, and the seconds they point to, are read and
        # dropped once its section is made, so memory follows the largest home.
        events = by_device.get(name, [])
        aggregates = store.ten_min_aggregates(name, start_utc, end_utc)
        ten_min = _ten_min(aggregates)
        seconds, hz, nominal = _read_home(store, dev, events, ten_min, start_utc, end_utc,
                                          default_nominal_v, averaging_window_s,
                                          inverter_category, every_second)
        section = _device_section(
            dev, events, seconds, hz, nominal, ten_min, now, planned_stop_after,
            averaging_window_s, inverter_category)
        # Harmonics and flicker verdicts per channel (agent.report.power_quality).
        section.update(device_sections([p for p in aggregates if isinstance(p, dict)]))
        # Heard from at or after the period's start: monitored in it. A unit silent since
        # before is listed all the same (never dropped), but is not a home of N_T.
        section["monitored_in_period"] = (start_utc is None or dev.get("last_seen") is None
                                          or float(dev["last_seen"]) >= start_utc
                                          or bool(events))
        if not section["monitored_in_period"]:
            section["attention_period"].append(
                f"silent since {_iso(dev.get('last_seen'))} (before the period)")
        sections.append(section)
        for ev in events:
            rec = _record(ev, dev.get("model") or {})
            if rec is not None:
                records.append(rec)
    monitored = [s for s in sections if s["monitored_in_period"]]
    homes = len(monitored)

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
            "homes_on_feeder": (sum(1 for sec in monitored if sec["feeder"] == fe.feeder)
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
        result = sarfi([a.representative for a in per_home],
                       max(homes, len({a.representative.device for a in per_home})),
                       REPORT_SARFI)
        sarfi_out.update({
            "counts": {f"SARFI-{x}": result.counts[x] for x in REPORT_SARFI},
            "index": {f"SARFI-{x}": round(result.index[x], 4) for x in REPORT_SARFI},
            # IEEE 1564 SARFI-ITIC is a sag index; swells above the curve are counted apart.
            "SARFI-ITIC": round(result.itic, 4), "itic_count": result.itic_count,
            "ITIC-swell": round(result.itic_swell, 4),
            "itic_swell_count": result.itic_swell_count,
            "SARFI-SEMI": round(result.semi, 4), "semi_count": result.semi_count,
            "skipped_open": result.skipped_open,
            "events_counted": len(per_home), "events_stored": len(records),
        })
    spans, windows = _interruption_windows(store, all_events, start_utc, end_utc)
    interruptions = interruption_stats(spans, homes).as_dict()
    now_verdicts = fleet_now(store, now, default_nominal_v=default_nominal_v)
    in_report = {s["device"] for s in sections}
    now_rows = [v.as_dict() for v in now_verdicts if v.details.get("device") in in_report]
    now_by_device = {r["device"]: r for r in now_rows}
    attention = []
    for s in sections:
        states = [st for st in (now_by_device.get(s["device"]) or {}).get("states", [])
                  if st["state"] in ("lost_power", "supply_out", "offline", "out_of_range")
                  and not (s["planned_stop"] and st["state"] == "offline")]
        now_list = [{"state": st["state"], "since": _iso(st.get("since")),
                     "reason": st["reason"]} for st in states]
        if now_list or s["attention_period"]:
            attention.append({
                "device": s["device"], "site": s["site"], "now": now_list,
                "period": s["attention_period"],
                "reasons": [f"now {st['state'].replace('_', ' ')}"
                            + (f" since {st['since']}" if st["since"] else "")
                            + f": {st['reason']}" for st in now_list] + s["attention_period"]})
    starts = [ev["start_utc"] for ev in all_events if ev.get("start_utc") is not None]
    trend_t = [s["last_seen_utc"] for s in sections if s["last_seen_utc"] is not None]
    return {
        "report": "halfcycle fleet report", "version": REPORT_VERSION,
        "indicative": INDICATIVE,
        "generated": _iso(now), "homes_monitored": homes,
        "period_requested": {"start": _iso(start_utc), "end": _iso(end_utc)},
        "settings": {"ansi_averaging_window_s": averaging_window_s,
                     "inverter_category": inverter_category},
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
        "interruptions": interruptions,
        "outage_windows": [{"device": w.device, "site": w.site, "start": _iso(w.start_utc),
                            "end": _iso(w.end_utc), "duration_s": _num(w.duration_s, 3),
                            "sources": list(w.sources)} for w in windows],
        "outage_errors": [],
        # Most of a site's monitors out at once: one site-level outage, not N unit outages.
        "site_outages": [{"site": o.site, "start": _iso(o.start_utc), "end": _iso(o.end_utc),
                          "duration_s": _num(o.end_utc - o.start_utc, 3),
                          "devices": list(o.devices), "devices_monitored": o.devices_monitored}
                         for o in store.site_outages(start_from=start_utc, end_before=end_utc)],
        "now": now_rows,
        "attention": attention,
        "store": {"events": len(all_events),
                  "events_not_correlated": len(all_events) - len(records),
                  "dead_letters": store.count("dead_letters"),
                  "gaps": store.count("gaps"), "captures": store.count("captures")},
    }
