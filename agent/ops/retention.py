"""How long the recorder store keeps what, and the collector's scheduled prune.

``[retention]`` in the collector configuration (days; 0 keeps forever)::

    trend_days = 90          # per-second trend rows (10-min aggregates are kept forever)
    received_days = 14       # per-seq idempotency rows at or below a stream's committed seq
    dead_letter_days = 30    # malformed messages kept for inspection
    capture_days = 365       # waveform captures (rows and files)
    export_queue_days = 1    # export rows, pruned only when no [export] is configured
    interval_s = 3600        # how often the collector prunes

What the export queue still needs is never dropped: its rows carry their own payload, and
they are pruned only by a collector that has no exporter (a store with an exporter keeps
every row until the time-series server accepted it).
"""

from __future__ import annotations

import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, Protocol

import structlog

from agent.config import Section

log = structlog.get_logger("halfcycle.ops.retention")
DAY_S = 86400.0


class PrunableStore(Protocol):
    def prune_trend(self, before_utc: float) -> int: ...
    def prune_received(self, before_utc: float) -> int: ...
    def prune_dead_letters(self, before_utc: float) -> int: ...
    def prune_captures(self, before_utc: float) -> int: ...
    def prune_export_queue(self, before_utc: float) -> int: ...


@dataclass(frozen=True)
class RetentionSettings:
    trend_days: float = 90.0
    received_days: float = 14.0
    dead_letter_days: float = 30.0
    capture_days: float = 365.0
    export_queue_days: float = 1.0
    interval_s: float = 3600.0

    @classmethod
    def from_section(cls, sec: Section, *, trend_days: float | None = None
                     ) -> RetentionSettings:
        """``trend_days``: the older ``[store] trend_retention_days``, used when
        ``[retention] trend_days`` is not given."""
        sec.reject_unknown(set(cls.__dataclass_fields__))
        kw: dict[str, Any] = {}
        for name in cls.__dataclass_fields__:
            if sec.has(name):
                value = sec.get(name, float, required=True)
                if value < 0 or (name == "interval_s" and value < 1):
                    raise sec.error(name, "must be >= 0 days" if name != "interval_s"
                                    else "must be >= 1 s")
                kw[name] = value
        if "trend_days" not in kw and trend_days is not None:
            kw["trend_days"] = trend_days
        return cls(**kw)


class Pruner:
    """Runs the prune on the writer's thread (its store connection) when due."""

    def __init__(self, settings: RetentionSettings, *, exporting: bool,
                 clock: Callable[[], float] = time.time,
                 monotonic: Callable[[], float] = time.monotonic) -> None:
        self.settings = settings
        self.exporting = exporting
        self._clock = clock
        self._monotonic = monotonic
        self._last = -float("inf")
        self.totals: dict[str, int] = {}

    def due(self) -> bool:
        return self._monotonic() - self._last >= self.settings.interval_s

    def prune(self, store: PrunableStore) -> dict[str, int]:
        """One pass over every table with a retention; returns rows removed per table."""
        self._last = self._monotonic()
        s, now = self.settings, self._clock()
        plan: list[tuple[str, float, Callable[[float], int]]] = [
            ("trend", s.trend_days, store.prune_trend),
            ("received", s.received_days, store.prune_received),
            ("dead_letters", s.dead_letter_days, store.prune_dead_letters),
            ("captures", s.capture_days, store.prune_captures),
        ]
        if not self.exporting:
            plan.append(("export_queue", s.export_queue_days, store.prune_export_queue))
        removed: dict[str, int] = {}
        for table, days, prune in plan:
            if days > 0 or table == "export_queue":
                removed[table] = prune(now - days * DAY_S)
                self.totals[table] = self.totals.get(table, 0) + removed[table]
        log.info("retention_pruned", **removed)
        return removed

    def maybe_prune(self, store: PrunableStore) -> dict[str, int] | None:
        return self.prune(store) if self.due() else None
