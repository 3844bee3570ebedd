# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""Alert rules: the pure state machine (hysteresis, flapping, "offline longer than X"), event
and fleet notices, and the engine over a real recorder store (SQLite file and PostgreSQL),
where alerts are queued in the same transaction as the messages that raised them.

The timing rules are the project's own (common practice, agent/alerts/rules.py); event classes
are IEEE 1159-2019 Table 2 duration classes and ITIC (2000) regions (tests/SOURCES.md).
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any

import pytest
from _store_helpers import (  # noqa: F401  (pytest fixtures are used by name)
    msg,
    pg_database,
    store,
    store_url,
)

from agent.alerts.config import AlertSettings, load_alert_settings
from agent.alerts.engine import AlertEngine
from agent.alerts.rules import AlertRule, Condition, RuleState, event_matches, step
from agent.config import ConfigError, Section
from agent.events.classify import classify
from agent.store import alerts as q
from agent.store.recorder import Item, RecorderStore

T0 = 1_700_000_000.0


# --- the pure state machine -------------------------------------------------------------------

def run(rule: AlertRule, timeline: list[tuple[float, bool]], since: float | None = None
        ) -> list[tuple[float, str]]:
    state, out = RuleState(), list[tuple[float, str]]()
    for t, active in timeline:
        cond = Condition(active, since if since is not None else (t if active else None))
        state, change = step(rule, cond, state, t)
        if change:
            out.append((t, change))
    return out


def test_raised_once_cleared_once() -> None:
    rule = AlertRule("off", "offline", clear_after_s=120.0, min_hold_s=0.0)
    timeline = [(T0 + i * 10.0, 10 <= i < 40) for i in range(100)]
    changes = run(rule, timeline)
    assert changes == [(T0 + 100.0, "raised"), (T0 + 520.0, "cleared")]  # 400 s + 120 s


def test_offline_longer_than_x_counts_from_the_condition_start() -> None:
    # Silent since T0 (the verdict's "since"), first judged at T0 + 900: with for_s = 3600 the
    # alert is raised at the first judgement at or after T0 + 3600, not 3600 s after noticing.
    rule = AlertRule("off-1h", "offline", for_s=3600.0)
    timeline = [(T0 + 900.0 + i * 300.0, True) for i in range(20)]
    changes = run(rule, timeline, since=T0)
    assert changes == [(T0 + 3600.0, "raised")]


def test_flapping_unit_does_not_flood() -> None:
    # Offline 30 s, back 30 s, for two hours (120 flaps), then steady.
    flaps = [(T0 + i * 30.0, (i % 2) == 0) for i in range(240)]
    steady = [(T0 + 7200.0 + i * 30.0, False) for i in range(20)]
    guarded = AlertRule("off", "offline", clear_after_s=300.0, min_hold_s=300.0)
    changes = run(guarded, flaps + steady)
    assert [c for _, c in changes] == ["raised", "cleared"]
    assert changes[1][0] >= T0 + 7170.0 + 300.0
    # Without the guard every flap is an alert pair: what the guard prevents.
    bare = AlertRule("off", "offline", clear_after_s=0.0, min_hold_s=0.0)
    assert len(run(bare, flaps + steady)) == 240


def test_min_hold_keeps_a_short_alert_up() -> None:
    rule = AlertRule("p", "lost_power", clear_after_s=0.0, min_hold_s=600.0)
    changes = run(rule, [(T0, True), (T0 + 10, False), (T0 + 300, False), (T0 + 600, False)])
    assert changes == [(T0, "raised"), (T0 + 600, "cleared")]


# --- event notices: IEEE 1159 duration class, ITIC region, IEEE 1564 severity -----------------

def closed(kind: str, level_pu: float, duration_s: float) -> dict[str, Any]:
    return {"state": "closed", "kind": kind,
            "classification": classify(kind, level_pu, duration_s, 50.0)}


def test_event_class_or_worse() -> None:
    momentary = AlertRule("sags", "event", kinds=("dip",), min_duration_class="momentary")
    # IEEE 1159-2019 Table 2: 0.5-30 cycles instantaneous, 30 cycles-3 s momentary,
    # 3 s-1 min temporary (50 Hz: 30 cycles = 0.6 s).
    assert not event_matches(momentary, closed("dip", 0.5, 0.2))
    assert event_matches(momentary, closed("dip", 0.5, 1.0))
    assert event_matches(momentary, closed("dip", 0.5, 10.0))  # temporary is worse
    assert not event_matches(momentary, closed("swell", 1.15, 10.0))  # kind filtered
    assert not event_matches(momentary, {**closed("dip", 0.5, 10.0), "state": "open"})
    # ITIC (2000): a dip to 50 % for 0.3 s lies below the curve (70 % from 20 ms to 0.5 s).
    itic = AlertRule("itic", "event", itic_regions=("no_damage", "prohibited"))
    assert event_matches(itic, closed("dip", 0.5, 0.3))
    assert not event_matches(itic, closed("dip", 0.75, 0.3))
    # ITIC (2000): a swell above 120 % for under 0.5 s is in the prohibited region.
    assert event_matches(itic, closed("swell", 1.3, 0.1))


def test_config_errors_name_the_key(tmp_path: Path) -> None:
    path = tmp_path / "collector.toml"

    def load(data: dict[str, Any]) -> AlertSettings:
        return load_alert_settings(Section(data, path, "alerts"))

    good = load({"rule": [{"kind": "offline", "for_s": 600}], "webhook": {"url": "http://x/"}})
    assert good.channels == ("mqtt", "webhook") and good.rules[0].name == "offline"
    with pytest.raises(ConfigError, match=r"alerts\.rule\[0\]\.kind: must be one of"):
        load({"rule": [{"kind": "smoke"}]})
    with pytest.raises(ConfigError, match=r"alerts\.rule\[1\]\.name: 'offline' is used"):
        load({"rule": [{"kind": "offline"}, {"kind": "offline"}]})
    with pytest.raises(ConfigError, match=r"alerts\.email\.password_file: cannot read"):
        load({"rule": [], "email": {"host": "h", "from": "a@b", "to": ["c@d"],
                                    "username": "u", "password_file": "nope"}})
    with pytest.raises(ConfigError, match=r"alerts\.rule\[0\]\.channels: none of its"):
        load({"mqtt": False, "rule": [{"kind": "offline", "channels": ["webhook"]}]})


def test_the_example_collector_config_parses(tmp_path: Path) -> None:
    import tomllib

    example = Path(__file__).resolve().parents[1] / "deploy" / "collector.example.toml"
    doc = tomllib.loads(example.read_text())
    (tmp_path / "smtp.password").write_text("invented\n")
    doc["alerts"]["email"]["password_file"] = str(tmp_path / "smtp.password")
    cfg = load_alert_settings(Section(doc["alerts"], example, "alerts"))
    assert cfg.channels == ("mqtt", "webhook", "email") and cfg.email is not None
    assert cfg.email.password == "invented" and len(cfg.rules) == 6
    by_name = {r.name: r for r in cfg.rules}
    assert by_name["offline-1h"].for_s == 3600 and by_name["street-wide"].min_units == 3
    assert cfg.channels_for(by_name["long-or-deep"]) == ("webhook",)


# --- the engine over a real store ---------------------------------------------------------------

pytestmark_store = pytest.mark.parametrize("store_url", ["sqlite", "postgresql"], indirect=True)

RULES = {"rule": [
    {"kind": "offline", "for_s": 0, "clear_after_s": 0, "min_hold_s": 0},
    {"kind": "supply_out", "clear_after_s": 0, "min_hold_s": 0},
    {"name": "long-sags", "kind": "event", "kinds": ["dip"], "min_duration_class": "momentary"},
    {"name": "street", "kind": "fleet_event", "min_units": 3},
]}


class Clock:
    def __init__(self, t: float) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def engine_on(store: RecorderStore, clock: Clock) -> AlertEngine:
    engine = AlertEngine(load_alert_settings(Section(RULES, None, "alerts")), clock=clock)
    store.after_commit = engine.on_commit
    return engine


def commit(store: RecorderStore, at: float, *messages: dict[str, Any]) -> None:
    store.commit_batch([Item(message=m, received_at=at) for m in messages])


def queued(store: RecorderStore) -> list[tuple[str, str]]:
    return [(r[0], r[1]) for r in store.db.query(
        "SELECT alert_id, channel FROM alert_queue ORDER BY id")]


def sag(seq: int, device: str, event_id: str, start: float, duration: float,
        level_pu: float = 0.55) -> dict[str, Any]:
    return msg("event", seq, device=device, event_id=event_id, kind="dip", channels=[0],
               state="closed", start_utc=start, end_utc=start + duration,
               duration_s=duration, level_v=230 * level_pu, level_pu=level_pu,
               thresholds={}, classification=classify("dip", level_pu, duration, 50.0))


@pytestmark_store
def test_unit_alerts_raise_and_clear_with_the_batch(store: RecorderStore) -> None:
    clock = Clock(T0)
    engine = engine_on(store, clock)
    commit(store, T0, msg("status", 1, device="u1", state="online", t=T0))
    assert queued(store) == []
    # The broker's Last Will: offline at once (for_s 0).
    clock.t = T0 + 5
    commit(store, T0 + 5, msg("status", 0, device="u1", state="offline", t=T0))
    assert queued(store) == [("offline:u1:1:raised", "mqtt")]
    # The same will redelivered: nothing new.
    commit(store, T0 + 6, msg("status", 0, device="u1", state="offline", t=T0))
    assert len(queued(store)) == 1
    # Back online: cleared, in the same transaction as the presence.
    clock.t = T0 + 60
    commit(store, T0 + 60, msg("status", 0, device="u1", state="online", t=T0 + 60))
    assert [a for a, _ in queued(store)] == ["offline:u1:1:raised", "offline:u1:1:cleared"]
    log = q.history(store.db)
    assert [a["change"] for a in log] == ["raised", "cleared"]
    assert log[0]["device"] == "u1" and log[0]["since_utc"] == pytest.approx(T0 + 5)
    assert engine.stats.raised == 1 and engine.stats.cleared == 1


@pytestmark_store
def test_alerts_roll_back_with_their_batch(store: RecorderStore) -> None:
    clock = Clock(T0)
    engine = engine_on(store, clock)
    commit(store, T0, msg("status", 1, device="u1", state="online", t=T0))

    def failing_hook(*args: Any) -> None:
        engine.on_commit(*args)  # queues the alert ...
        raise RuntimeError("disk full")  # ... then the commit fails

    store.after_commit = failing_hook
    with pytest.raises(RuntimeError):
        commit(store, T0 + 5, msg("status", 0, device="u1", state="offline", t=T0))
    assert queued(store) == [] and store.count("alert_log") == 0
    assert store.devices()[0]["state"] == "online"  # the message did not commit either
    store.after_commit = engine.on_commit
    commit(store, T0 + 5, msg("status", 0, device="u1", state="offline", t=T0))
    assert queued(store) == [("offline:u1:1:raised", "mqtt")]


@pytestmark_store
def test_tick_raises_silence_and_any_message_clears(store: RecorderStore) -> None:
    clock = Clock(T0)
    engine = engine_on(store, clock)
    commit(store, T0, msg("status", 1, device="u1", state="online", t=T0),
           msg("status", 1, device="u2", state="online", t=T0))
    clock.t = T0 + 600
    commit(store, T0 + 600, msg("summary", 2, device="u2"))  # u2 keeps talking
    clock.t = T0 + 1000  # u1 silent > 900 s (agent.verdicts.now.OFFLINE_AFTER_S)
    engine.tick(store)
    engine.tick(store)
    assert [a for a, _ in queued(store)] == ["offline:u1:1:raised"]
    alert = q.history(store.db)[0]
    assert alert["since_utc"] == pytest.approx(T0) and "nothing heard" in alert["reason"]
    clock.t = T0 + 1010
    commit(store, T0 + 1010, msg("summary", 2, device="u1"))  # a summary is enough
    assert [a for a, _ in queued(store)][-1] == "offline:u1:1:cleared"


@pytestmark_store
def test_event_and_fleet_notices_once(store: RecorderStore) -> None:
    clock = Clock(T0 + 100)
    engine_on(store, clock)
    start = T0 + 50
    # Three homes see one feeder sag within 40 ms (< 100 ms window); a fourth arrives later.
    commit(store, T0 + 100, sag(1, "h1", "e1", start, 1.0), sag(1, "h2", "e2", start + 0.04, 1.0))
    assert queued(store) == [("long-sags:event:e1", "mqtt"), ("long-sags:event:e2", "mqtt")]
    commit(store, T0 + 101, sag(1, "h3", "e3", start + 0.02, 1.0))
    fleet = [a for a, _ in queued(store) if a.startswith("street:")]
    assert fleet == ["street:fleet:e1"]
    commit(store, T0 + 102, sag(1, "h4", "e4", start + 0.03, 1.0))
    commit(store, T0 + 103, sag(1, "h3", "e3", start + 0.02, 1.0))  # redelivered
    fleet = [a for a, _ in queued(store) if a.startswith("street:")]
    assert fleet == ["street:fleet:e1"]
    notice = next(a for a in q.history(store.db) if a["rule"] == "street")
    assert notice["details"]["units"] == 3 and notice["device"] is None
    # A short sag (instantaneous, IEEE 1159) elsewhere: no event notice, no fleet notice.
    commit(store, T0 + 200, sag(2, "h1", "e9", T0 + 150, 0.2))
    assert not any("e9" in a for a, _ in queued(store))
    assert json.loads(store.db.query("SELECT payload FROM alert_queue ORDER BY id")[0][0])[
        "note"].startswith("indicative")
