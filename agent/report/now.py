"""The fleet now: every unit's :func:`agent.verdicts.now.unit_now` from the recorder store.

Reads the store (read-only) and builds each unit's :class:`~agent.verdicts.now.UnitFacts`
(with :func:`agent.store.facts.unit_facts`, which the collector's alerts use too);
the fleet report's "now" list, the live page and ``halfcycle report`` all call
:func:`fleet_now`, so they show the same state.
"""

from __future__ import annotations

from agent.store.facts import TEN_MIN_FULL_COUNT, is_planned_stop, unit_facts
from agent.store.recorder import RecorderStore
from agent.verdicts.base import Verdict
from agent.verdicts.now import OFFLINE_AFTER_S, unit_now

__all__ = ["TEN_MIN_FULL_COUNT", "fleet_now", "is_planned_stop", "unit_facts"]


def fleet_now(store: RecorderStore, now: float, *, default_nominal_v: float | None = None,
              offline_after_s: float = OFFLINE_AFTER_S) -> list[Verdict]:
    """Every unit in the store, worst state first, then by device."""
    out = [unit_now(unit_facts(store, dev, default_nominal_v), now,
                    offline_after_s=offline_after_s) for dev in store.devices()]
    order = ("lost_power", "supply_out", "offline", "out_of_range", "unknown", "stopped", "ok")
    return sorted(out, key=lambda v: (order.index(v.verdict), str(v.details.get("device"))))
