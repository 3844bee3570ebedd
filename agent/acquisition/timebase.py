"""Mapping from sample index to time. The live clock model lives in ``clock.py``."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

SYNC_STATES = ("synced", "unsynced", "holdover", "replay")


@dataclass(frozen=True)
class TimeState:
    """How far a timestamp can be trusted.

    ``sync`` is one of :data:`SYNC_STATES`; ``error_s`` the estimated time error [s] (one
    standard uncertainty); ``step`` is True when a wall-clock step was absorbed since the
    previous state was read.
    """

    sync: str
    error_s: float
    step: bool = False


class Timebase(Protocol):
    def to_utc(self, index: float) -> float:
        """UTC time [s since epoch] of sample ``index`` (fractional)."""
        ...

    def sample_rate(self) -> float:
        """Best estimate of the true sample rate [S/s]."""
        ...

    def state(self) -> TimeState: ...


@dataclass
class ReplayTimebase:
    """A recording's own time: ``t = origin + index / rate`` with no clock involved."""

    rate: float
    origin: float = 0.0

    def to_utc(self, index: float) -> float:
        return self.origin + index / self.rate

    def sample_rate(self) -> float:
        return self.rate

    def state(self) -> TimeState:
        return TimeState(sync="replay", error_s=0.0)
