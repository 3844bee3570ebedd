"""The collector's alert glue: the commit hook, the periodic tick and the sender thread.

:class:`agent.collect.service.Collector` calls three things and nothing else: :meth:`attach`
on its writer's store, :meth:`maybe_tick` from the writer loop, and :meth:`run_sender` in a
thread of its own with its own store connection. With several collectors on one PostgreSQL
store, every one judges (rule state rows are locked while judged, so decisions are taken once)
but only the one holding an advisory lock sends, which keeps each channel in order.
"""

from __future__ import annotations

import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import structlog

from agent.alerts.config import AlertSettings
from agent.alerts.deliver import AlertSender, make_channels
from agent.alerts.engine import AlertEngine
from agent.store.recorder import RecorderStore

log = structlog.get_logger("halfcycle.alerts")

# PostgreSQL advisory lock held by the one collector that delivers alerts.
SENDER_LOCK_KEY = 0x68630002


class CollectorAlerts:
    def __init__(self, settings: AlertSettings, *, clock: Callable[[], float] = time.time
                 ) -> None:
        self.settings = settings
        self.engine = AlertEngine(settings, clock=clock)
        self.clock = clock
        self.sender: AlertSender | None = None
        self._last_tick = -float("inf")

    def attach(self, store: RecorderStore) -> None:
        """Judge every committed batch inside its transaction."""
        store.after_commit = self.engine.on_commit

    def maybe_tick(self, store: RecorderStore) -> None:
        """Judge every unit when ``tick_s`` has passed since the last tick."""
        if time.monotonic() - self._last_tick < self.settings.tick_s:
            return
        self._last_tick = time.monotonic()
        try:
            self.engine.tick(store)
        except Exception as exc:  # the store is away; the writer copes
            self.engine.stats.errors += 1
            log.error("alerts_failed", error=str(exc), where="tick")

    def run_sender(self, url: str, captures_dir: Path, mqtt_client: Any,
                   stop: threading.Event) -> None:
        store = RecorderStore(url, captures_dir)
        try:
            if store.db.dialect == "postgresql":
                while not stop.is_set():
                    row = store.db.query_one("SELECT pg_try_advisory_lock(?)", (SENDER_LOCK_KEY,))
                    if row and row[0]:
                        break
                    stop.wait(5.0)
                if stop.is_set():
                    return
            self.sender = AlertSender(store.db, make_channels(self.settings, mqtt_client),
                                      self.settings, clock=self.clock)
            log.info("alert_sender_active", channels=self.settings.channels)
            self.sender.run(stop)
        finally:
            store.close()
