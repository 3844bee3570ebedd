"""The fleet now: every unit's :func:`agent.verdicts.now.unit_now` from the recorder store.

Reads the store (read-only) and builds each unit's :class:`~agent.verdicts.now.UnitFacts`;
the fleet report's "now" list, the live page and ``halfcycle report`` all call
:func:`fleet_now`, so they show the same state.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

from agent.store.recorder import RecorderStore, from_json
from agent.verdicts.base import Verdict
from agent.verdicts.limits import standard_for
from agent.verdicts.now import OFFLINE_AFTER_S, UnitFacts, unit_now

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


def _last_ten_min(store: RecorderStore, device: str
                  ) -> tuple[float, list[float | None]] | None:
    rows = store.db.query("SELECT t_utc, duration_s, payload FROM aggregates WHERE device = ?"
                          " AND kind = '10min' ORDER BY t_utc DESC LIMIT 6", (device,))
    for t, duration, text in rows:
        try:
            p = from_json(text)
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
    events = store.events(name)
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
        last_ten_min=_last_ten_min(store, name),
        nominal_v=nominal,
        standard=standard_for(nominal, hz if isinstance(hz, int | float) else None)
        if nominal else None,
        measurement_point=str(point),
        power_loss_utc=max(losses) if losses else None,
        outbox_backlog=int(depth) if isinstance(depth, int) else None,
    )


def fleet_now(store: RecorderStore, now: float, *, default_nominal_v: float | None = None,
              offline_after_s: float = OFFLINE_AFTER_S) -> list[Verdict]:
    """Every unit in the store, worst state first, then by device."""
    out = [unit_now(unit_facts(store, dev, default_nominal_v), now,
                    offline_after_s=offline_after_s) for dev in store.devices()]
    order = ("lost_power", "supply_out", "offline", "out_of_range", "unknown", "stopped", "ok")
    return sorted(out, key=lambda v: (order.index(v.verdict), str(v.details.get("device"))))
