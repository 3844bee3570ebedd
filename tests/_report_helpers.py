"""An invented home's message stream for the report tests: real wire bodies (agent.wire.codec)
through the real encoder and decoder, committed with RecorderStore.commit_batch."""

from __future__ import annotations

from typing import Any

import numpy as np

from agent.events.classify import classify_event
from agent.events.types import Event, Thresholds
from agent.measurement.types import Aggregate
from agent.store.recorder import Item, RecorderStore
from agent.wire import codec
from agent.wire.records import SummaryBatcher

SITE = "invented-close"


class Home:
    """One invented home (contiguous seqs in one epoch)."""

    def __init__(self, device: str, nominal_v: float = 120.0, nominal_hz: float = 60.0,
                 channels: tuple[str, ...] = ("L1",)) -> None:
        self.identity = codec.Identity(site=SITE, device=device, epoch="e1")
        self.seq = 0
        self.messages: list[dict[str, Any]] = []
        self.nominal_v, self.nominal_hz, self.channels = nominal_v, nominal_hz, channels

    def add(self, body: dict[str, Any]) -> None:
        self.seq += 1
        self.messages.append(codec.decode(codec.encode(self.identity.stamp(body, self.seq))))

    def event(self, eid: str, kind: str, start: float, duration: float, level_pu: float,
              *, ended_by: str = "recovery") -> None:
        nv = self.nominal_v
        ev = Event(event_id=eid, kind=kind, channels=(0,), start=0.0, start_utc=start,  # type: ignore[arg-type]
                   nominal_v=nv, thresholds=Thresholds(), level_v=level_pu * nv,
                   end=duration * 3840.0, end_utc=start + duration,
                   per_channel_level_v=(level_pu * nv,), ended_by=ended_by,  # type: ignore[arg-type]
                   time_error_s=0.001, sync_state="synced")
        classify_event(ev, self.nominal_hz)
        self.add(codec.event_body(ev, "ended", channel_names=list(self.channels)))

    def trend(self, t: np.ndarray, values: np.ndarray, flags: np.ndarray | None = None,
              hz: np.ndarray | None = None) -> None:
        """Per-second records: ``values`` (n,) or (n, channels) [V]."""
        col = values[:, None] if values.ndim == 1 else values
        n = t.size
        batcher = SummaryBatcher(list(self.channels), k=60)
        bodies = batcher.add_many(
            t, col, col, col, np.full(n, self.nominal_hz) if hz is None else hz,
            np.full(col.shape, 0.02), np.full(n, np.nan),
            np.zeros(n) if flags is None else flags)
        last = batcher.flush()
        for body in [*bodies, *([last] if last else [])]:
            self.add(body)

    def ten_min(self, t: float, rms: tuple[float, ...], *, flagged: bool = False,
                thd: float = 0.02, count: int = 3000) -> None:
        self.add(codec.aggregate_body(Aggregate(kind="10min", t_utc=t, duration_s=600.0,
                                                rms=rms, thd=(thd,) * len(rms),
                                                flagged=flagged, count=count),
                                      list(self.channels)))

    def status(self, state: str, t: float, last_ran: float | None = None) -> None:
        self.add(codec.status_body(state, agent_version="0.1", uptime_s=2.0, outbox_depth=0,
                                   sync="synced", time_error_s=0.001, last_ran=last_ran, t=t))

    def commit(self, store: RecorderStore, received_at: float, *,
               declare: bool = True) -> None:
        upto = store.commit_batch([Item(message=m, received_at=received_at)
                                   for m in self.messages])
        assert upto[(self.identity.device, "e1")] == self.seq  # nothing dead-lettered
        if declare:  # after the commit: a new device row would be stamped with the clock
            store.update_device_model(self.identity.device, SITE,
                                      {"nominal_v": self.nominal_v,
                                       "nominal_hz": self.nominal_hz})
