"""A unit's facts as the recorder store holds them, for :func:`agent.verdicts.now.unit_now`.

One reader for everyone who judges "now" — the fleet report and live page
(:mod:`agent.report.now`) and the collector's alert rules (inside its commit transaction) — so
they judge the same facts. Read-only.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from agent.store.db import Database
from agent.store.recorder import RecorderStore
from agent.store.recorder import from_json as _from_json
from agent.verdicts.limits import standard_for
from agent.verdicts.now import UnitFacts

#: A stored 10-min aggregate counts as a complete 10-min mean when it holds this many
#: 10/12-cycle values (600 s of 0.2-s intervals is 3000; the margin leaves room for frequency
#: deviation and the resynchronisation at the 10-min tick; common practice).
TEN_MIN_FULL_COUNT = 2900


def is_planned_stop(status: Mapping[str, Any]) -> bool:
    """The latest status is the agent's own announcement of a clean stop (not a Last Will)."""
    return (status.get("state") == "offline"
            and (status.get("planned") is True or status.get("reason") == "planned_stop"))


def _declared_nominal(model: Mapping[str, Any], events: list[dict[str, Any]],
                      default_nominal_v: float | None) -> float | None:
    """Declared nominal [V]: the site model's, else the events' (every event carries the
    nominal it was judged against), else the caller's default. Never inferred here: "now"
    must not judge against a guess."""
    for value in [model.get("nominal_v")] + [(e.get("payload") or {}).get("nominal_v")
                                             for e in events] + [default_nominal_v]:
        if isinstance(value, int | float) and not isinstance(value, bool) and value > 0:
            return float(value)
    return None


def _last_ten_min(db: Database, device: str) -> tuple[float, list[float | None]] | None:
    rows = db.query("SELECT t_utc, duration_s, payload FROM aggregates WHERE device = ?"
                          " AND kind = '10min' ORDER BY t_utc DESC LIMIT 6", (device,))
    for t, duration, text in rows:
        try:
            p = _from_json(text)
        except ValueError:
            continue
        if not isinstance(p, dict) or not isinstance(p.get("rms"), list):
            continue
        count = p.get("count")
        if not isinstance(count, int) or count < TEN_MIN_FULL_COUNT or t is None:
            continue
        values = [None if not isinstance(x, int | float) or not math.isfinite(x) else float(x)
                  for x in p["rms"]]
        return float(t) + float(duration or 600.0), values
    return None


def unit_facts(store: RecorderStore, dev: Mapping[str, Any],
               default_nominal_v: float | None = None) -> UnitFacts:
    """The facts :func:`unit_now` judges, for one row of :meth:`RecorderStore.devices`."""
    name = str(dev["device"])
    model = dev.get("model") or {}
    status = dev.get("status") or {}
    events = _device_events(store.db, name)
    open_events = tuple({"kind": e.get("kind"), "start_utc": e.get("start_utc"),
                         "channels": e.get("channels"), "event_id": e.get("event_id")}
                        for e in events if e.get("state") == "open"
                        and e.get("start_utc") is not None)
    losses = [float(e["start_utc"]) for e in events
              if (e.get("payload") or {}).get("ended_by") == "power_loss"
              and e.get("start_utc") is not None]
    nominal = _declared_nominal(model, events, default_nominal_v)
    hz = model.get("nominal_hz")
    point = model.get("measurement_point") if model.get("measurement_point") in (
        "service", "outlet") else "service"
    state = dev.get("state")
    depth = status.get("outbox_depth")
    return UnitFacts(
        device=name, site=str(dev.get("site")),
        presence=state if state in ("online", "offline") else None,
        presence_since=dev.get("state_since"),
        planned_stop=state == "offline" and is_planned_stop(status),
        last_seen=dev.get("last_seen"),
        open_events=open_events,
        last_ten_min=_last_ten_min(store.db, name),
        nominal_v=nominal,
        standard=standard_for(nominal, hz if isinstance(hz, int | float) else None)
        if nominal else None,
        measurement_point=str(point),
        power_loss_utc=max(losses) if losses else None,
        outbox_backlog=int(depth) if isinstance(depth, int) else None,
    )


def _device_events(db: Database, device: str) -> list[dict[str, Any]]:
    """The fields of a device's stored events that "now" needs (no capture lookup)."""
    rows = db.query("SELECT event_id, kind, state, channels, start_utc, payload FROM events"
                    " WHERE device = ? ORDER BY start_utc, event_id", (device,))
    return [{"event_id": r[0], "kind": r[1], "state": r[2], "channels": _from_json(r[3]),
             "start_utc": r[4], "payload": _from_json(r[5])} for r in rows]


def device_row(db: Database, device: str) -> dict[str, Any] | None:
    """One device as in :meth:`RecorderStore.devices` (None when unknown)."""
    r = db.query_one("SELECT device, site, model, status, first_seen, last_seen, state,"
                     " state_since FROM devices WHERE device = ?", (device,))
    if r is None:
        return None
    return {"device": r[0], "site": r[1], "model": _from_json(r[2]) or {},
            "status": _from_json(r[3]) or {}, "first_seen": r[4], "last_seen": r[5],
            "state": r[6], "state_since": r[7]}
