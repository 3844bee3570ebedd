"""Mapping from sample index to time. The live clock model lives in ``clock.py``."""

from __future__ import annotations

from dataclasses import dataclass
from typing import Protocol

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]

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

    def to_utc_many(self, index: F64) -> F64:
        """:meth:`to_utc` of every element of ``index`` (the same values)."""
        if type(self).to_utc is not ReplayTimebase.to_utc:   # a subclass with its own mapping
            return utc_each(self, index)
        return np.asarray(self.origin + index / self.rate, np.float64)

    def sample_rate(self) -> float:
        return self.rate

    def state(self) -> TimeState:
        return TimeState(sync="replay", error_s=0.0)


def utc_each(timebase: Timebase, index: F64) -> F64:
    """``timebase.to_utc`` of every element of ``index``, one call each."""
    return np.fromiter(map(timebase.to_utc, index.tolist()), np.float64, index.shape[0])


def utc_many(timebase: Timebase, index: F64) -> F64:
    """UTC [s] of every sample index in ``index`` (1-D): the timebase's own vectorised
    ``to_utc_many`` where it has one (the same values as ``to_utc``), else element by element."""
    many = getattr(timebase, "to_utc_many", None)
    if many is None:
        return utc_each(timebase, index)
    return np.asarray(many(index), np.float64)
