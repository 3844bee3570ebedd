"""Power-quality events as the detector produces and the publishers and store consume them."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

EventKind = Literal["dip", "swell", "interruption", "rvc"]
EndReason = Literal["recovery", "power_loss", "end_of_data"]


@dataclass
class Thresholds:
    """Event thresholds as fractions of the declared voltage Udin.

    Dip 90 %, swell 110 % and hysteresis 2 % are the typical settings IEC 61000-4-30 Ed.3
    clause 5.4 names. That standard sets no interruption threshold: 5 % is EN 50160's
    (the default), 10 % IEEE 1159's (tests/SOURCES.md).
    """

    dip: float = 0.90
    swell: float = 1.10
    interruption: float = 0.05
    hysteresis: float = 0.02

    def as_dict(self) -> dict[str, float]:
        return {"dip": self.dip, "swell": self.swell, "interruption": self.interruption,
                "hysteresis": self.hysteresis}


@dataclass
class Event:
    """One dip, swell, interruption or rapid voltage change (RVC).

    Times are sample indices of the raw signal (``start``, ``end``) plus UTC seconds
    (``start_utc``, ``end_utc``) from the timebase. ``level_v`` is the residual voltage
    (lowest Urms(1/2) on any involved channel) for dips and interruptions and the maximum for
    swells [V]; ``level_pu`` is that over Udin. For an interruption, ``start``/``end`` and
    ``duration_s`` are the interruption's own (below the interruption threshold) and
    ``enclosing_*`` describe the below-dip-threshold period that contains it
    (``dip_duration_s``). ``sag_energy_s`` is the voltage-sag
    energy ∫(1-(U/Udin)²)dt [s] (IEEE 1564-2014) over the event, None for swells.
    ``end_uncertainty_s`` is set when the end had to be inferred (power loss).
    """

    event_id: str
    kind: EventKind
    channels: tuple[int, ...]
    start: float
    start_utc: float
    nominal_v: float
    thresholds: Thresholds
    level_v: float
    end: float | None = None
    end_utc: float | None = None
    per_channel_level_v: tuple[float, ...] = ()
    enclosing_duration_s: float | None = None
    enclosing_level_v: float | None = None
    partial_outage: bool = False
    sag_energy_s: float | None = None
    ended_by: EndReason | None = None
    end_uncertainty_s: float | None = None
    time_error_s: float | None = None
    sync_state: str | None = None
    classification: dict[str, Any] | None = None
    # UTC start [s] of the below-dip-threshold period enclosing an interruption (the moment
    # the event was first announced as a dip); None for dips and swells.
    enclosing_start_utc: float | None = None
    # Rapid voltage changes only (kind "rvc", agent.events.rvc): ΔUmax and ΔUss [V] and the
    # threshold and hysteresis used [fraction of Udin]; None for other kinds.
    delta_umax_v: float | None = None
    delta_uss_v: float | None = None
    rvc_threshold: float | None = None
    rvc_hysteresis: float | None = None

    @property
    def is_open(self) -> bool:
        return self.end is None

    @property
    def duration_s(self) -> float | None:
        if self.end_utc is None:
            return None
        return self.end_utc - self.start_utc

    @property
    def dip_duration_s(self) -> float | None:
        """Duration below the dip threshold [s]: a dip's own duration, an interruption's
        enclosing period (dip threshold to threshold + hysteresis, IEC 61000-4-30 Ed.3
        cl. 5.4); None for swells and while unknown. The EN 50160 dip table and IEEE 1564
        judge on it; IEEE 1159 judges an interruption on its own ``duration_s``
        (:data:`agent.events.classify.DURATION_BASIS`)."""
        return dip_duration_of(self.kind, self.duration_s, self.enclosing_duration_s)

    @property
    def level_pu(self) -> float:
        return self.level_v / self.nominal_v


def dip_duration_of(kind: str, duration_s: float | None,
                    enclosing_duration_s: float | None) -> float | None:
    """Duration below the dip threshold [s] from an event's fields: ``duration_s`` for a dip,
    ``enclosing_duration_s`` for an interruption, None for a swell (or when unknown). Also
    reads event messages older than event v2, which do not carry ``dip_duration_s``."""
    if kind == "dip":
        return duration_s
    if kind == "interruption":
        return enclosing_duration_s
    return None


@dataclass
class EventUpdate:
    """The detector's output: an event that just started or just ended.

    ``index``/``utc`` are the sample index and UTC of this change as it happened (the event's
    start for "started", its end for "ended"); use them for capture triggers, since the event
    object itself may change later (a dip that becomes an interruption moves its start).
    """

    change: Literal["started", "ended"]
    event: Event
    index: float | None = None
    utc: float | None = None


@dataclass
class Capture:
    """A waveform capture around an event start or end.

    ``counts`` has shape (n, channels), int16 raw ADC counts; volts = counts * ``scale``
    (per channel, calibration included) [V/count]. ``first_index`` is the sample index of
    row 0; ``trigger_index`` the sample index of the trigger; ``trigger_utc`` its UTC time.
    """

    capture_id: str
    event_id: str
    trigger: Literal["start", "end"]
    first_index: int
    trigger_index: int
    trigger_utc: float
    sample_rate: float
    channel_names: tuple[str, ...]
    scale: npt.NDArray[np.float64]
    counts: npt.NDArray[np.int16]
    pre_cycles: int = 0
    post_cycles: int = 0
    meta: dict[str, Any] = field(default_factory=dict)
