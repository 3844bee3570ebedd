"""Alert rules as pure functions: facts in, raise / clear / notice decisions out.

Two families:

* **unit rules** (``lost_power``, ``supply_out``, ``offline``, ``out_of_range``) follow a
  unit's state as judged by :func:`agent.verdicts.now.unit_now` — the same verdict the report
  and the live page show. Each (rule, unit) is a small state machine with hysteresis:

  - ``for_s``: the condition must hold this long before the alert is raised, measured from
    the condition's own start (a unit silent since 10:00 with ``for_s = 3600`` is raised at
    11:00, however late the collector noticed); "offline longer than X" is ``for_s = X``.
  - ``clear_after_s``: once raised, the condition must be absent this long before the alert
    clears; it coming back meanwhile keeps the alert raised (no second raise).
  - ``min_hold_s``: a raised alert stays raised at least this long.

  So a unit is raised once and cleared once per episode, and a unit that flaps faster than
  ``clear_after_s`` stays one raised alert: at most one raise and one clear per
  ``for_s + max(min_hold_s, clear_after_s)`` per (rule, unit) (common practice).

* **notices** (``event``, ``fleet_event``) are one-shot: an ended event of the chosen class or
  worse at one unit, or an event seen by several units at once (grouped with
  :func:`agent.collect.correlate.group_simultaneous`). Each subject (event id, fleet group) is
  notified once; there is nothing to clear.

Nothing here reads a store or sends anything: :mod:`agent.alerts.engine` does.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

from agent.collect.correlate import SIMULTANEITY_WINDOW_S, FleetEvent, group_simultaneous
from agent.verdicts.base import Verdict

UNIT_RULES = ("lost_power", "supply_out", "offline", "out_of_range")
NOTICE_RULES = ("event", "fleet_event")
RULE_KINDS = UNIT_RULES + NOTICE_RULES

#: Which :func:`unit_now` states make each unit rule's condition hold. A unit without power
#: is also silent (offline) and its supply is out; ``unit_now`` reports it as ``lost_power``
#: alone (the worst state), so those rules accept it too.
RULE_STATES: dict[str, tuple[str, ...]] = {
    "lost_power": ("lost_power",),
    "supply_out": ("supply_out", "lost_power"),
    "offline": ("offline", "lost_power"),
    "out_of_range": ("out_of_range",),
}

#: IEEE 1159 duration classes, least to most severe (IEEE 1159-2019 Table 2 order).
DURATION_CLASSES = ("instantaneous", "momentary", "temporary", "sustained")
#: ITIC (2000) regions outside the no-interruption region.
ITIC_OUTSIDE = ("no_damage", "prohibited")
EVENT_KINDS = ("dip", "swell", "interruption")

Phase = Literal["clear", "pending", "raised", "clearing"]
Change = Literal["raised", "cleared", "notice"]


@dataclass(frozen=True)
class AlertRule:
    """One configured rule (``[[alerts.rule]]``); see the module docstring for timing.

    Event notices fire when the ended event's kind is in ``kinds`` (all when empty) and ANY of
    the given criteria holds: IEEE 1159 duration class at least ``min_duration_class``, ITIC
    region in ``itic_regions``, IEEE 1564 severity Se at least ``min_severity``; with no
    criterion every event of those kinds is notified. Fleet notices fire when at least
    ``min_units`` units saw starts within ``window_s`` [s].
    """

    name: str
    kind: str
    for_s: float = 0.0
    clear_after_s: float = 300.0
    min_hold_s: float = 300.0
    kinds: tuple[str, ...] = ()
    min_duration_class: str | None = None
    itic_regions: tuple[str, ...] = ()
    min_severity: float | None = None
    min_units: int = 3
    window_s: float = SIMULTANEITY_WINDOW_S
    channels: tuple[str, ...] = ()
    sites: tuple[str, ...] = ()

    def applies_to(self, site: str | None) -> bool:
        return not self.sites or site in self.sites


@dataclass(frozen=True)
class Condition:
    """Whether a unit rule's condition holds now; ``since`` [s UTC] when it began."""

    active: bool
    since: float | None = None
    reason: str = ""
    details: Mapping[str, Any] = field(default_factory=dict)


@dataclass(frozen=True)
class RuleState:
    """The stored state of one (rule, subject)."""

    phase: Phase = "clear"
    pending_since: float | None = None
    raised_at: float | None = None
    absent_since: float | None = None
    raises: int = 0


def unit_condition(rule: AlertRule, verdict: Verdict) -> Condition:
    """The condition of a unit rule in a :func:`unit_now` verdict."""
    wanted = RULE_STATES[rule.kind]
    for st in verdict.details.get("states", []):
        if st.get("state") in wanted:
            extra = {k: v for k, v in st.items() if k not in ("state", "since", "reason")}
            return Condition(True, st.get("since"), str(st.get("reason", "")),
                             {"state": st["state"], **extra})
    return Condition(False)


def step(rule: AlertRule, cond: Condition, prev: RuleState, now: float
         ) -> tuple[RuleState, Change | None]:
    """Advance one (rule, unit) state machine to ``now`` [s UTC].

    Returns the new state and the change to announce (``raised``, ``cleared`` or None).
    """
    if cond.active:
        if prev.phase in ("raised", "clearing"):
            return RuleState("raised", prev.pending_since, prev.raised_at, None,
                             prev.raises), None
        began = now if cond.since is None else min(float(cond.since), now)
        pending = began if prev.pending_since is None else min(prev.pending_since, began)
        if now - pending >= rule.for_s:
            return RuleState("raised", pending, now, None, prev.raises + 1), "raised"
        return RuleState("pending", pending, None, None, prev.raises), None
    if prev.phase in ("raised", "clearing"):
        absent = now if prev.absent_since is None else prev.absent_since
        raised_at = prev.raised_at if prev.raised_at is not None else now
        if now - absent >= rule.clear_after_s and now - raised_at >= rule.min_hold_s:
            return RuleState("clear", None, None, None, prev.raises), "cleared"
        return RuleState("clearing", prev.pending_since, prev.raised_at, absent,
                         prev.raises), None
    return RuleState("clear", None, None, None, prev.raises), None


def _num(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float):
        return None
    return float(value) if math.isfinite(value) else None


def event_matches(rule: AlertRule, event: Mapping[str, Any]) -> bool:
    """Does an ended event (a stored event: ``kind``, ``state``, ``classification``) meet
    an ``event`` rule? Open events are not judged (their class is not known yet)."""
    if event.get("state") != "closed":
        return False
    if rule.kinds and event.get("kind") not in rule.kinds:
        return False
    cls = event.get("classification") or {}
    criteria = []
    if rule.min_duration_class is not None:
        got = cls.get("ieee1159_duration_class")
        criteria.append(got in DURATION_CLASSES and DURATION_CLASSES.index(got)
                        >= DURATION_CLASSES.index(rule.min_duration_class))
    if rule.itic_regions:
        criteria.append(cls.get("itic_region") in rule.itic_regions)
    if rule.min_severity is not None:
        se = _num(cls.get("ieee1564_severity"))
        criteria.append(se is not None and se >= rule.min_severity)
    return not criteria or any(criteria)


def fleet_groups(rule: AlertRule, events: Iterable[Mapping[str, Any]]) -> list[FleetEvent]:
    """Groups of events that started together at ``min_units`` or more distinct units."""
    records = []
    for e in events:
        if e.get("kind") not in EVENT_KINDS or _num(e.get("start_utc")) is None \
                or _num(e.get("level_pu")) is None:
            continue
        if rule.kinds and e.get("kind") not in rule.kinds:
            continue
        records.append({k: e.get(k) for k in ("device", "site", "start_utc", "end_utc", "kind",
                                               "level_pu", "event_id")})
    groups = group_simultaneous(records, rule.window_s)
    return [g for g in groups if g.homes >= rule.min_units]


def fleet_subject(group: FleetEvent) -> str:
    """A fleet group's subject: its anchor (earliest) event, so a group that grows as more
    units report is still the same subject."""
    anchor = min(group.events, key=lambda e: (e.start_utc, e.device))
    return f"fleet:{anchor.event_id or anchor.device + '@' + repr(anchor.start_utc)}"
