"""Page contents shared by the static report and the live page: figure sets, table rows,
verdict rows and time formatting. Renders answers computed elsewhere; judges nothing."""

from __future__ import annotations

import html
import math
from collections.abc import Iterator, Mapping, Sequence
from datetime import UTC, datetime, tzinfo
from pathlib import Path
from typing import Any
from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

from jinja2 import Environment, PackageLoader, select_autoescape
from markupsafe import Markup

from agent.render import data, figures
from agent.render.figures import Figure, category_of
from agent.store.recorder import RecorderStore
from agent.verdicts import INDICATIVE

STATIC_DIR = Path(__file__).with_name("static")


def zone(name: str | None) -> tzinfo:
    """A time zone by IANA name (``Europe/Berlin``); ``UTC`` or None for UTC. ValueError
    (one line) for an unknown name."""
    if not name or name.upper() == "UTC":
        return UTC
    try:
        return ZoneInfo(name)
    except (ZoneInfoNotFoundError, ValueError):
        raise ValueError(f"unknown time zone {name!r} (use an IANA name such as "
                         "Europe/Berlin)") from None


def iso_utc(t: float | None) -> str:
    if not isinstance(t, int | float) or not math.isfinite(t):
        return ""
    return datetime.fromtimestamp(t, UTC).isoformat(timespec="seconds").replace("+00:00", "Z")


def when(t: float | None, tz: tzinfo) -> Markup:
    """A ``<time>`` element: local time as text, UTC on hover, sortable by its UTC value."""
    if not isinstance(t, int | float) or not math.isfinite(t):
        return Markup("–")
    local = datetime.fromtimestamp(t, tz).strftime("%Y-%m-%d %H:%M:%S %Z")
    utc = iso_utc(t)
    return Markup(f'<time datetime="{utc}" title="{utc} UTC" data-sort="{t:.3f}">'
                  f"{html.escape(local)}</time>")


def environment() -> Environment:
    env = Environment(loader=PackageLoader("agent.render", "templates"),
                      autoescape=select_autoescape(["html"]), trim_blocks=True,
                      lstrip_blocks=True)
    env.globals["INDICATIVE"] = INDICATIVE
    env.filters["num"] = lambda x, nd=2: "–" if not isinstance(x, int | float) or (
        isinstance(x, float) and not math.isfinite(x)) else f"{x:.{nd}f}"
    return env


def verdict_rows(obj: Any, where: str = "") -> Iterator[dict[str, Any]]:
    """Every verdict dict (one with ``rule``, ``verdict`` and ``passed``) inside ``obj``, with
    the key path it sits under; so new verdicts show without renderer changes."""
    if isinstance(obj, Mapping):
        if {"rule", "verdict", "passed"} <= obj.keys():
            basis = obj.get("basis") or {}
            yield {"where": where, "rule": obj.get("rule"), "verdict": obj.get("verdict"),
                   "passed": obj.get("passed"), "confidence": obj.get("confidence"),
                   "basis": ", ".join(f"{k}: {iso_utc(v) if k.endswith('_utc') else _short(v)}"
                                      for k, v in basis.items())
                   if isinstance(basis, Mapping) else _short(basis),
                   "notes": "; ".join(str(n) for n in obj.get("notes") or ())}
            return
        for key, value in obj.items():
            yield from verdict_rows(value, f"{where}.{key}" if where else str(key))
    elif isinstance(obj, list):
        for i, value in enumerate(obj):
            # A unit's section is named by its unit, not by its place in the list.
            name = value.get("device") if isinstance(value, Mapping) else None
            label = str(name) if isinstance(name, str) else f"{where}[{i}]"
            yield from verdict_rows(value, label)


def _short(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_short(v) for v in value[:6]) + (", …" if len(value) > 6 else
                                                                "") + "]"
    if isinstance(value, Mapping):
        return "{" + ", ".join(f"{k}: {_short(v)}" for k, v in list(value.items())[:6]) + "}"
    return str(value)


def event_row(ev: Mapping[str, Any]) -> dict[str, Any]:
    """One event as a table row (plain values, JSON-able)."""
    c = ev.get("classification") or {}
    return {"event_id": ev.get("event_id"), "device": ev.get("device"), "site": ev.get("site"),
            "kind": ev.get("kind"), "state": ev.get("state"),
            "category": category_of(ev), "start_utc": ev.get("start_utc"),
            "duration_s": ev.get("duration_s"), "level_v": ev.get("level_v"),
            "level_pu": ev.get("level_pu"), "itic": c.get("itic_region"),
            "semi_f47": c.get("semi_f47"),
            "ended_by": (ev.get("payload") or {}).get("ended_by"),
            "captures": list(ev.get("captures") or [])}


def unit_context(store: RecorderStore, device: str) -> dict[str, Any]:
    """The unit's site model, declared nominal, frequency, measurement point and bands."""
    dev = data.unit_model(store, device)
    model = dev.get("model") or {}
    events = store.events(device)
    nominal = data.declared_nominal(dev, events)
    hz = model.get("nominal_hz") if isinstance(model.get("nominal_hz"), int | float) else None
    point = str(model.get("measurement_point") or "service")
    bands = data.bands_for(nominal, hz, point) if nominal else []
    return {"device": device, "site": dev.get("site"), "model": model, "nominal_v": nominal,
            "nominal_hz": hz, "measurement_point": point, "bands": bands, "events": events,
            "dev": dev}


#: The figures of a unit page, in page order.
UNIT_FIGURES = ("profile", "daily-envelope", "hour-profile", "histogram", "overvoltage-hours")


def unit_figures(store: RecorderStore, unit: Mapping[str, Any], tz: tzinfo,
                 start_utc: float | None = None, end_utc: float | None = None,
                 only: Sequence[str] = UNIT_FIGURES) -> list[Figure]:
    """A home's figures: RMS means with the bands, daily envelope, time-of-day profile,
    histogram, and time above the band by hour of the day (``only``: a subset by name)."""
    bands = unit["bands"]
    if not bands:
        return [figures.empty(name, "declared voltage unknown: no bands to draw against",
                              "The unit's site model declares no nominal voltage.")
                for name in only]
    series = data.profile_series(store, unit["device"], start_utc, end_utc)
    make = {"profile": lambda: figures.profile(series, bands, tz),
            "daily-envelope": lambda: figures.daily_envelope(series, bands, tz),
            "hour-profile": lambda: figures.hour_profile(series, bands, tz),
            "histogram": lambda: figures.histogram(series, bands),
            "overvoltage-hours": lambda: figures.overvoltage_by_hour(series, bands[0], tz)}
    return [make[name]() for name in only]


def capture_figure(store: RecorderStore, unit: Mapping[str, Any], event: Mapping[str, Any],
                   capture_id: str) -> Figure | None:
    """The waveform figure of one capture; None when the unit's nominal is unknown."""
    nominal, hz = unit.get("nominal_v"), unit.get("nominal_hz")
    if not nominal or not hz:
        return None
    trace = data.capture_trace(store.capture(capture_id), float(nominal), float(hz))
    return figures.waveform(trace, event, float(nominal), name=f"wave-{capture_id}")


def event_figures(store: RecorderStore, unit: Mapping[str, Any],
                  event: Mapping[str, Any]) -> list[tuple[str, Figure]]:
    """(capture id, waveform figure) for each stored capture of an event."""
    out = []
    for cid in event.get("captures") or ():
        fig = capture_figure(store, unit, event, cid)
        if fig is not None:
            out.append((cid, fig))
    return out


def fleet_figures(store: RecorderStore, report: Mapping[str, Any], tz: tzinfo,
                  start_utc: float | None = None, end_utc: float | None = None
                  ) -> list[Figure]:
    """Fleet figures: events on ITIC and SEMI F47, homes × time, SARFI, interruptions,
    swells against inverter trip settings."""
    events = store.events(start_from=start_utc, start_before=end_utc)
    rows = []
    for dev in store.devices():
        unit_events = [e for e in events if e.get("device") == dev["device"]]
        rows.append((dev["device"],
                     data.profile_series(store, dev["device"], start_utc, end_utc),
                     data.declared_nominal(dev, unit_events)))
    return [figures.itic(events), figures.semi_f47(events),
            figures.fleet_timeline(rows, events, report.get("fleet_events") or [], tz),
            figures.sarfi_bars(report.get("sarfi") or {}),
            figures.interruptions(report.get("interruptions"),
                                  report.get("outage_windows") or []),
            figures.swells_vs_trips(events)]


def add_last_events(units: list[dict[str, Any]], events: Sequence[Mapping[str, Any]]
                    ) -> list[dict[str, Any]]:
    """Give each ``unit_now`` verdict dict its latest event (``last_event``: id, kind,
    category, start, level) from ``events`` (oldest first, as the store returns them)."""
    last: dict[str, Mapping[str, Any]] = {}
    for ev in events:
        last[str(ev.get("device"))] = ev
    for u in units:
        latest = last.get(str(u.get("device")))
        u["last_event"] = None if latest is None else {
            k: v for k, v in event_row(latest).items()
            if k in ("event_id", "kind", "category", "start_utc", "level_pu")}
    return units


def fleet_now_rows(verdicts: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Rows of the fleet-now table from ``unit_now`` verdict dicts."""
    rows = []
    for v in verdicts:
        states = v.get("states") or []
        top = states[0] if states else {}
        rows.append({"device": v.get("device"), "site": v.get("site"),
                     "state": v.get("verdict"), "since": top.get("since"),
                     "reason": top.get("reason") or "", "last_seen": v.get("last_seen_utc"),
                     "backlog": v.get("outbox_backlog"), "last_event": v.get("last_event"),
                     "others": [s.get("state") for s in states[1:]]})
    return rows
