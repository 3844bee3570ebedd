"""Alert evaluation against the recorder store: the collector's commit hook and its tick.

:meth:`AlertEngine.on_commit` runs inside the transaction that commits a batch (installed as
``RecorderStore.after_commit``), so the alerts a batch raises are queued with the messages that
raised them, or not at all. It judges only the units the batch could change: those that sent
an event, an aggregate or a status, and those with an alert raised or pending (any message can
clear those). :meth:`AlertEngine.tick` judges every unit in its own transaction, for what time
alone changes (a unit falls silent; ``for_s`` and ``clear_after_s`` run out).

A failure here is logged and rolled back to a savepoint: the messages still commit and are
acknowledged (alerts step aside rather than hold up the data); the next tick judges again.
"""

from __future__ import annotations

import time
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from typing import Any, get_args

import structlog

from agent.alerts.config import AlertSettings
from agent.alerts.rules import (
    NOTICE_RULES,
    UNIT_RULES,
    AlertRule,
    Change,
    Condition,
    Phase,
    RuleState,
    event_matches,
    fleet_groups,
    fleet_subject,
    step,
    unit_condition,
)
from agent.store import alerts as q
from agent.store.db import Database
from agent.store.facts import device_row, unit_facts
from agent.store.recorder import CommitInfo, RecorderStore, from_json
from agent.verdicts.base import INDICATIVE
from agent.verdicts.now import unit_now

log = structlog.get_logger("halfcycle.alerts")

#: Message kinds that can raise a unit rule (a summary only proves the unit is up).
_TRIGGERS = {"event", "aggregate", "status", "presence"}
#: Subject of fleet notices on the alerts topic (never a device id: ids start alphanumeric).
FLEET_SUBJECT = "_fleet"
ALERT_VERSION = 1


@dataclass
class AlertStats:
    raised: int = 0
    cleared: int = 0
    notices: int = 0
    errors: int = 0
    ticks: int = 0
    judge_s: float = 0.0  # wall time spent judging in commits and ticks [s] (for benchmarks)


def _state(row: Mapping[str, Any] | None) -> RuleState:
    if row is None:
        return RuleState()
    phase: Phase = row["state"] if row["state"] in get_args(Phase) else "clear"
    return RuleState(phase, row["pending_since"], row["raised_at"], row["absent_since"],
                     int(row["raises"] or 0))


def alert_body(rule: AlertRule, change: Change, subject: str, site: str | None,
               device: str | None, now: float, *, n: int = 0, since: float | None = None,
               reason: str = "", details: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The alert as every channel delivers it (JSON). ``alert_id`` is the idempotency key:
    the same alert is always the same id, so a receiver drops what it has seen."""
    alert_id = (f"{rule.name}:{subject}" if change == "notice"
                else f"{rule.name}:{subject}:{n}:{change}")
    return {"v": ALERT_VERSION, "type": "alert", "alert_id": alert_id, "rule": rule.name,
            "kind": rule.kind, "change": change, "subject": subject, "site": site,
            "device": device, "t_utc": now, "since_utc": since, "reason": reason,
            "details": dict(details or {}), "note": INDICATIVE}


class AlertEngine:
    """Judges the configured rules and queues what they raise (see the module docstring)."""

    def __init__(self, settings: AlertSettings, *, clock: Callable[[], float] = time.time
                 ) -> None:
        self.settings = settings
        self.clock = clock
        self.stats = AlertStats()
        self.unit_rules = [r for r in settings.rules if r.kind in UNIT_RULES]
        self.event_rules = [r for r in settings.rules if r.kind == "event"]
        self.fleet_rules = [r for r in settings.rules if r.kind == "fleet_event"]
        assert all(r.kind in UNIT_RULES + NOTICE_RULES for r in settings.rules)

    # --- entry points ------------------------------------------------------------------------

    def on_commit(self, store: RecorderStore, db: Database, info: CommitInfo,
                  _commit_now: float) -> None:
        """``RecorderStore.after_commit``: judge what this batch touched, in its transaction."""
        began = time.perf_counter()
        db.execute("SAVEPOINT alerts")
        try:
            self._after_batch(store, db, info, self.clock())
        except Exception as exc:  # never lose the batch for an alert
            db.execute("ROLLBACK TO SAVEPOINT alerts")
            self.stats.errors += 1
            log.error("alerts_failed", error=str(exc), where="commit")
        db.execute("RELEASE SAVEPOINT alerts")
        self.stats.judge_s += time.perf_counter() - began

    def tick(self, store: RecorderStore) -> None:
        """Judge every unit now, in one transaction of its own."""
        now = self.clock()

        def work(db: Database) -> None:
            for (device,) in db.query("SELECT device FROM devices ORDER BY device"):
                self._judge_unit(store, db, str(device), now)

        self.stats.ticks += 1
        if self.unit_rules:
            began = time.perf_counter()
            store.db.run_in_transaction(work)
            self.stats.judge_s += time.perf_counter() - began

    # --- unit rules --------------------------------------------------------------------------

    def _after_batch(self, store: RecorderStore, db: Database, info: CommitInfo,
                     now: float) -> None:
        if self.unit_rules:
            live = {subject for _, subject in q.active_subjects(db)}
            for device in sorted(info.kinds):
                if info.kinds[device] & _TRIGGERS or device in live:
                    self._judge_unit(store, db, device, now)
        for event_id in dict.fromkeys(info.event_ids):
            event = self._event(db, event_id)
            if event is None:
                continue
            for rule in self.event_rules:
                if rule.applies_to(event["site"]) and event_matches(rule, event):
                    self._notice_event(db, rule, event, now)
            for rule in self.fleet_rules:
                self._fleet(db, rule, event, now)

    def _judge_unit(self, store: RecorderStore, db: Database, device: str, now: float) -> None:
        dev = device_row(db, device)
        if dev is None:
            return
        verdict = unit_now(unit_facts(store, dev), now,
                           offline_after_s=self.settings.offline_after_s)
        for rule in self.unit_rules:
            if not rule.applies_to(dev["site"]):
                continue
            row = q.load_state(db, rule.name, device)
            prev = _state(row)
            cond = unit_condition(rule, verdict)
            new, change = step(rule, cond, prev, now)
            if new == prev and row is not None:
                continue
            if row is None and new == RuleState():
                continue  # nothing to remember
            alert_id = row["alert_id"] if row else None
            if change is not None:
                alert = self._unit_alert(rule, change, device, dev["site"], cond, new, now)
                alert_id = alert["alert_id"]
                q.enqueue(db, alert, self.settings.channels_for(rule), now)
                if change == "raised":
                    self.stats.raised += 1
                else:
                    self.stats.cleared += 1
                log.info("alert", alert_id=alert_id, change=change, device=device)
            q.save_state(db, rule.name, device, dev["site"], device,
                         {"state": new.phase, "pending_since": new.pending_since,
                          "raised_at": new.raised_at, "absent_since": new.absent_since,
                          "raises": new.raises, "alert_id": alert_id}, now)

    def _unit_alert(self, rule: AlertRule, change: Change, device: str, site: str,
                    cond: Condition, new: RuleState, now: float) -> dict[str, Any]:
        if change == "raised":
            return alert_body(rule, change, device, site, device, now, n=new.raises,
                              since=new.pending_since, reason=cond.reason,
                              details=cond.details)
        return alert_body(rule, change, device, site, device, now, n=new.raises,
                          reason=f"{rule.kind} no longer holds")

    # --- notices -----------------------------------------------------------------------------

    @staticmethod
    def _event(db: Database, event_id: str) -> dict[str, Any] | None:
        row = db.query_one("SELECT event_id, device, site, kind, state, start_utc, end_utc,"
                           " duration_s, level_v, level_pu, classification FROM events"
                           " WHERE event_id = ?", (event_id,))
        if row is None:
            return None
        keys = ("event_id", "device", "site", "kind", "state", "start_utc", "end_utc",
                "duration_s", "level_v", "level_pu", "classification")
        event = dict(zip(keys, row, strict=True))
        event["classification"] = from_json(event["classification"]) or {}
        return event

    def _once(self, db: Database, rule: AlertRule, subject: str, site: str | None,
              device: str | None, now: float) -> bool:
        """Mark (rule, subject) notified; False when it already was."""
        if q.load_state(db, rule.name, subject) is not None:
            return False
        q.save_state(db, rule.name, subject, site, device, {"state": "notified"}, now)
        return True

    def _notice_event(self, db: Database, rule: AlertRule, event: Mapping[str, Any],
                      now: float) -> None:
        subject = f"event:{event['event_id']}"
        if not self._once(db, rule, subject, event["site"], event["device"], now):
            return
        cls = event["classification"]
        details = {k: event[k] for k in ("event_id", "kind", "start_utc", "duration_s",
                                         "level_v", "level_pu")}
        details.update({k: cls.get(k) for k in ("ieee1159_category", "ieee1159_duration_class",
                                                "itic_region", "ieee1564_severity")})
        alert = alert_body(rule, "notice", subject, event["site"], event["device"], now,
                           since=event["start_utc"], details=details,
                           reason=f"{event['kind']} {cls.get('ieee1159_category', '')}".strip())
        q.enqueue(db, alert, self.settings.channels_for(rule), now)
        self.stats.notices += 1

    def _fleet(self, db: Database, rule: AlertRule, event: Mapping[str, Any],
               now: float) -> None:
        start = event.get("start_utc")
        if not isinstance(start, int | float) or not rule.applies_to(event["site"]):
            return
        # Any group holding this event starts and ends within one window of it.
        reach = 2.0 * rule.window_s + 1.0
        rows = db.query("SELECT event_id, device, site, kind, start_utc, end_utc, level_pu"
                        " FROM events WHERE start_utc >= ? AND start_utc <= ?",
                        (float(start) - reach, float(start) + reach))
        keys = ("event_id", "device", "site", "kind", "start_utc", "end_utc", "level_pu")
        events = [dict(zip(keys, r, strict=True)) for r in rows]
        events = [e for e in events if rule.applies_to(e["site"])]
        for group in fleet_groups(rule, events):
            ids = [m.event_id for m in group.events if m.event_id]
            if event["event_id"] not in ids:
                continue
            known = [i for i in ids if q.load_state(db, rule.name, f"member:{i}") is not None]
            for i in ids:
                if i not in known:
                    q.save_state(db, rule.name, f"member:{i}", None, None,
                                 {"state": "notified"}, now)
            if known:
                continue  # this group was notified when it first reached min_units
            anchor = min(group.events, key=lambda m: (m.start_utc, m.device))
            details = {"units": group.homes, "devices": list(group.devices),
                       "sites": list(group.sites), "event_ids": sorted(ids),
                       "start_utc": group.start_utc, "worst_level_pu": group.level_pu,
                       "worst_kind": group.worst.kind}
            alert = alert_body(rule, "notice", fleet_subject(group), anchor.site, None, now,
                               since=group.start_utc, details=details,
                               reason=f"{details['units']} units at once")
            q.enqueue(db, alert, self.settings.channels_for(rule), now)
            self.stats.notices += 1
