"""What is true of a unit *now*: online, offline since, supply out since, lost power, out of
range in the last 10-min mean.

A pure function over plain facts that the caller reads from wherever it keeps them (the
recorder store for the report and the live page, the collector's commit path for alerts), so
the attention list, the live fleet page and the alert rules give one answer.

Rules (common practice unless named):

* ``lost_power`` — the monitor itself went without power: an interruption was open when it
  fell silent (it could not report the end), or its last event was closed by ``power_loss``
  after a restart that has not yet been followed by fresh data.
* ``supply_out`` — an interruption event is open and the monitor still reports (it rides on a
  battery or on a healthy leg).
* ``offline`` — the broker said offline (Last Will) or nothing was heard for longer than
  ``offline_after_s``, and the agent did not announce a planned stop.
* ``stopped`` — the agent announced a planned stop: shown, not an attention state.
* ``out_of_range`` — the last complete 10-min mean of any channel lies outside the service band
  (:func:`agent.verdicts.limits.service_band`: ANSI C84.1 Range A at the measurement point, or
  EN 50160 ±10 %), and that mean is recent (ended within ``stale_after_s``).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Literal

from agent.verdicts.base import Verdict
from agent.verdicts.limits import service_band

#: A unit not heard from for this long [s] is offline: a summary arrives every 60 s and a
#: heartbeat every 600 s by default, so 900 s is more than one missed heartbeat (common
#: practice).
OFFLINE_AFTER_S = 900.0
#: The last 10-min mean speaks for "now" while it ended less than this long ago [s]: the
#: interval just closed plus one more (common practice).
STALE_AFTER_S = 1200.0

#: Attention states, worst first (what a property manager would act on first).
SEVERITY = ("lost_power", "supply_out", "offline", "out_of_range")
STATES = (*SEVERITY, "stopped", "ok", "unknown")

State = Literal["lost_power", "supply_out", "offline", "out_of_range", "stopped", "ok",
                "unknown"]


@dataclass(frozen=True)
class UnitFacts:
    """Plain facts about one unit, as last recorded.

    Times are [s UTC]. ``open_events`` are events started and not yet ended (mappings with at
    least ``kind`` and ``start_utc``). ``last_ten_min`` is ``(end_utc, per-channel RMS [V])``
    of the last complete 10-min aggregate. ``power_loss_utc`` is the start of the last event
    closed by ``power_loss`` (the agent's open-event journal after a restart).
    """

    device: str
    site: str
    presence: Literal["online", "offline"] | None = None
    presence_since: float | None = None
    planned_stop: bool = False
    last_seen: float | None = None
    open_events: tuple[Mapping[str, Any], ...] = ()
    last_ten_min: tuple[float, Sequence[float | None]] | None = None
    nominal_v: float | None = None
    standard: str | None = None
    measurement_point: str = "service"
    power_loss_utc: float | None = None
    outbox_backlog: int | None = None
    extra: Mapping[str, Any] = field(default_factory=dict)


def _state(state: State, since: float | None, reason: str, **more: Any) -> dict[str, Any]:
    return {"state": state, "since": since, "reason": reason, **more}


def unit_now(facts: UnitFacts, now: float, *, offline_after_s: float = OFFLINE_AFTER_S,
             stale_after_s: float = STALE_AFTER_S) -> Verdict:
    """The unit's state at ``now`` [s UTC].

    Returns
    -------
    Verdict with ``verdict`` the worst state (``lost_power`` > ``supply_out`` > ``offline`` >
    ``out_of_range``; else ``stopped``, ``ok`` or ``unknown`` when nothing was ever heard),
    ``passed`` False for an attention state, True for ``ok`` / ``stopped``, None for
    ``unknown``; ``details["states"]`` lists every state that holds, each with ``since`` and
    ``reason``; ``details["last_ten_min"]`` the mean judged and its band.
    """
    states: list[dict[str, Any]] = []
    silent_s = None if facts.last_seen is None else max(0.0, now - facts.last_seen)
    gone = facts.presence == "offline" or (silent_s is not None and silent_s > offline_after_s)
    interruptions = [e for e in facts.open_events if e.get("kind") == "interruption"]
    first_int = min((float(e["start_utc"]) for e in interruptions), default=None)

    if interruptions and gone and not facts.planned_stop:
        states.append(_state("lost_power", first_int,
                             "supply interrupted and the monitor fell silent"))
    elif interruptions:
        states.append(_state("supply_out", first_int, "interruption in progress"))
    elif (facts.power_loss_utc is not None and gone and not facts.planned_stop
          and (facts.last_seen is None or facts.last_seen <= facts.power_loss_utc)):
        states.append(_state("lost_power", facts.power_loss_utc,
                             "monitor lost power (event closed by power loss)"))
    if gone and not facts.planned_stop and not any(s["state"] == "lost_power" for s in states):
        since = facts.presence_since if facts.presence == "offline" else facts.last_seen
        why = ("broker reports the unit offline" if facts.presence == "offline"
               else f"nothing heard for {silent_s:.0f} s")
        states.append(_state("offline", since, why))
    if gone and facts.planned_stop:
        states.append(_state("stopped", facts.presence_since, "the agent announced a stop"))

    judged: dict[str, Any] | None = None
    if facts.last_ten_min is not None and facts.nominal_v and facts.standard:
        end_utc, values = facts.last_ten_min
        band = service_band(facts.nominal_v, facts.standard, facts.measurement_point)
        finite = [float(v) for v in values if v is not None and math.isfinite(float(v))]
        judged = {"end_utc": end_utc, "rms_v": [None if v is None else float(v) for v in values],
                  "band": {"low_v": round(band.low_v, 3), "high_v": round(band.high_v, 3),
                           "rule": band.rule, "confidence": band.confidence},
                  "recent": now - end_utc <= stale_after_s}
        outside = [v for v in finite if not band.contains(v)]
        if outside and judged["recent"]:
            worst = max(outside, key=lambda v: abs(v - facts.nominal_v))  # type: ignore[operator]
            side = "above" if worst > band.high_v else "below"
            states.append(_state("out_of_range", end_utc - 600.0,
                                 f"last 10-min mean {worst:.1f} V {side} {band.rule}",
                                 value_v=round(worst, 2)))

    attention = sorted((s for s in states if s["state"] in SEVERITY),
                       key=lambda s: SEVERITY.index(s["state"]))
    if attention:
        verdict: State = attention[0]["state"]
        passed: bool | None = False
    elif any(s["state"] == "stopped" for s in states):
        verdict, passed = "stopped", True
    elif facts.last_seen is None and facts.presence is None:
        verdict, passed = "unknown", None
    else:
        verdict, passed = "ok", True
    ordered = attention + [s for s in states if s["state"] not in SEVERITY]
    return Verdict(
        rule="unit state now (halfcycle rules, common practice)",
        verdict=verdict, passed=passed, confidence="cp",
        basis={"now_utc": now, "offline_after_s": offline_after_s,
               "stale_after_s": stale_after_s, "presence": facts.presence,
               "planned_stop": facts.planned_stop},
        details={"device": facts.device, "site": facts.site, "states": ordered,
                 "last_seen_utc": facts.last_seen,
                 "silent_s": None if silent_s is None else round(silent_s, 1),
                 "last_ten_min": judged, "outbox_backlog": facts.outbox_backlog},
    )
