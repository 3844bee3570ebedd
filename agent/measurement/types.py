"""Data passed from the measurement stage to the events stage and the publishers.

Times inside the pipeline are fractional *sample indices* of the raw signal (float64), so
they stay exact whatever the clock does; a :class:`agent.acquisition.clock.Timebase` maps
them to UTC seconds at the edge of the pipeline.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]


@dataclass
class HalfCycleRms:
    """Urms(1/2) values (IEC 61000-4-30 Ed.3 clause 3.35 and 5.4.2): one row per refresh.

    Row k is the RMS over one fundamental cycle from ``start[k]`` to ``end[k]`` [sample
    index], refreshed every half cycle, so ``start[k+1]`` is half a cycle after ``start[k]``.
    ``urms`` has shape (n, channels) [V]. ``synthetic[k]`` is True where the window came from
    the nominal-period fallback (no zero crossings, e.g. during an interruption).
    """

    start: F64
    end: F64
    urms: F64
    synthetic: npt.NDArray[np.bool_]

    def __len__(self) -> int:
        return int(self.start.shape[0])


@dataclass
class BasicIntervals:
    """10/12-cycle values (IEC 61000-4-30 Ed.3 clause 4.4).

    ``rms`` and ``thd`` have shape (n, channels); ``rms`` [V], ``thd`` [fraction, not %], NaN where
    the sample rate cannot support it. ``flagged[k]`` is True where the interval overlaps a dip,
    swell or interruption, hysteresis tail included (clause 4.7, from memory). ``imbalance``
    [fraction of Udin] is |V1-V2|/Vnom for split-phase, the IEC 61000-4-30
    negative/positive-sequence ratio for three-phase (magnitudes only: NaN when not computable),
    NaN for single phase.
    ``hz`` is the fundamental frequency over the interval [Hz] from its zero crossings.
    """

    start: F64
    end: F64
    rms: F64
    thd: F64
    imbalance: F64
    hz: F64
    flagged: npt.NDArray[np.bool_]

    def __len__(self) -> int:
        return int(self.start.shape[0])


@dataclass
class Aggregate:
    """A clock-aligned aggregate: 150/180-cycle ("3s"), 10-minute ("10min") or 10-s frequency.

    ``t_utc`` is the interval start [s since epoch, UTC, or s since file start for replays];
    ``rms`` per channel [V] (RMS of the 10/12-cycle values, clause 4.5; RMS from memory) or ``hz``
    [Hz] for frequency (clause 5.1: whole cycles in the interval divided by their total duration,
    from memory).
    """

    kind: str
    t_utc: float
    duration_s: float
    rms: tuple[float, ...] = ()
    thd: tuple[float, ...] = ()
    hz: float | None = None
    flagged: bool = False
    count: int = 0
    harmonics: tuple[tuple[float, ...], ...] = ()
    """10-min only: per channel, harmonic subgroups h2..h40 (as far as the sample rate
    allows), each the RMS of its 10/12-cycle values over the period divided by the
    fundamental's (IEC 61000-4-7 subgroups, IEC 61000-4-30 cl. 4.5 aggregation); NaN where
    none."""
    pst: tuple[float, ...] = ()
    """10-min only: short-term flicker severity per channel (IEC 61000-4-15); NaN where none."""
    plt: tuple[float, ...] | None = None
    """10-min aggregates ending a 2-h mark: long-term flicker severity per channel."""
    flicker_flagged: bool = False
    lamp: str = ""
    """The flickermeter's lamp model ("230V" or "120V") when ``pst`` is set."""
    """Pst not to be trusted: the flickermeter was settling, the interval is incomplete, or
    it overlaps a dip, swell or interruption."""


@dataclass
class QualityFlag:
    """A data-quality finding: ``kind`` is one of clipping, flatline, sample_gap, crc_error,
    sequence_gap, unsynced_clock, clock_step. ``start``/``end`` [sample index]."""

    kind: str
    start: float
    end: float
    channels: tuple[int, ...] = ()
    detail: dict[str, float | int | str] = field(default_factory=dict)


@dataclass
class MeasurementOutput:
    """Everything one block produced (any part may be empty)."""

    half_cycles: HalfCycleRms
    intervals: BasicIntervals
    aggregates: list[Aggregate]
    flags: list[QualityFlag]
