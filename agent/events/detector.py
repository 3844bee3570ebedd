"""Dip, swell and interruption detection over Urms(1/2) values.

A vectorised state machine after IEC 61000-4-30 Ed.3 clause 5.4 (dips and swells) and
clause 5.5 (interruptions, from memory), polyphase rules included; the interruption
threshold itself is EN 50160's 5 % or IEEE 1159's 10 % (tests/SOURCES.md):

- dip: starts when ANY channel falls below the dip threshold; ends when ALL channels are at
  or above the dip threshold plus the hysteresis;
- swell: starts when ANY channel rises above the swell threshold; ends when ALL channels are
  at or below the swell threshold minus the hysteresis;
- interruption: starts when ALL channels are below the interruption threshold; ends when ANY
  channel is at or above the interruption threshold plus the hysteresis.

Timestamp convention (both edges alike, so the duration is unbiased by window position): an
event starts at the *start* of the first Urms(1/2) window that met the start condition and
ends at the *start* of the first window that met the end condition. For a rectangular change
the duration is then within about one cycle of the true one (the ±1 cycle duration
uncertainty of IEC 61000-4-30 Ed.3, from memory). For deep dips (residual below about 0.45 pu) the
threshold method itself can overstate the duration by up to ~1.06 cycle at unlucky points on
the wave (one-cycle window, 90 %/92 % threshold pair); ``tests/test_events_detector.py``
checks the analytic bounds.

An interruption lies inside a below-dip-threshold period. It is reported as ONE event of kind
``interruption`` (no separate dip): the event is announced as a ``dip`` when the enclosing
period starts (so captures and the journal start at once), becomes an ``interruption`` (same
id, same object) when all channels fall below the interruption threshold, and is reported
ended when the enclosing period ends. Its ``start``/``end`` are then the interruption's own,
and ``enclosing_duration_s`` / ``enclosing_level_v`` describe the enclosing period. Several
interruption spells inside one enclosing period are merged into one interruption from the
first spell's start to the last spell's end.

One channel (not all) below the interruption threshold — e.g. the loss of one leg of a
120/240 V split-phase service — is a dip with ``partial_outage=True`` (never set on an
interruption: there the whole service was out, however the legs dropped).
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from agent.acquisition.timebase import Timebase
from agent.events.types import Event, EventUpdate, Thresholds
from agent.measurement.types import HalfCycleRms

F64 = npt.NDArray[np.float64]
B1 = npt.NDArray[np.bool_]

# Channel count each service type implies (line-to-neutral voltages), as in agent.site.
_SERVICE_CHANNELS = {"1ph": 1, "120/240": 2, "120/208": 3, "3ph": 3}


def _rows_any(mask: B1) -> B1:
    return np.asarray(mask.any(axis=1), dtype=np.bool_)


def _rows_all(mask: B1) -> B1:
    return np.asarray(mask.all(axis=1), dtype=np.bool_)


# Trust order of TimeState.sync values: an event keeps the least trusted state it saw.
_SYNC_RANK = {"replay": 0, "synced": 0, "holdover": 1, "unsynced": 2}


def _worse_sync(a: str | None, b: str) -> str:
    if a is None:
        return b
    return b if _SYNC_RANK.get(b, 3) > _SYNC_RANK.get(a, 3) else a


def _default_id() -> str:
    return uuid.uuid4().hex


@dataclass
class _Track:
    """Running statistics of one open event (dip period or swell)."""

    event: Event
    extreme: F64  # per-channel min (dip) or max (swell) [V]
    involved: B1
    # Interruption spell inside a dip period (unused for swells).
    int_active: bool = False
    int_start: float | None = None
    int_end: float | None = None
    int_extreme: F64 | None = None
    period_start: float = 0.0
    period_start_utc: float = 0.0
    period_min: float = float("inf")
    partial: bool = False  # some, not all, channels below the interruption threshold
    energy_s: float = 0.0


def sag_energy_terms(level_pu: F64, dt_s: F64) -> F64:
    """Voltage-sag energy contribution of each Urms(1/2) value.

    Parameters
    ----------
    level_pu : numeric  [pu of Udin]
    dt_s : numeric  [s] time each value stands for (the half-cycle refresh step)

    Returns
    -------
    energy : numeric  [s] ``(1 - level_pu**2) * dt_s``

    References
    ----------
    IEEE 1564-2014, voltage-sag energy E = ∫ (1 - (U/Unom)²) dt.
    """
    return (1.0 - np.square(level_pu)) * dt_s


class EventDetector:
    """Turn a stream of Urms(1/2) values into event starts and ends.

    Parameters
    ----------
    nominal_v : float  [V] declared voltage Udin every channel is compared with
    channels : int  number of channels in each :class:`HalfCycleRms` row
    thresholds : Thresholds  fractions of Udin
    timebase : Timebase  maps sample indices to UTC; its state is recorded on each event
    site_service_type : str  one of 1ph, 120/240, 120/208, 3ph (checked against ``channels``)
    id_factory : callable returning a new event id (default: uuid4 hex)

    Notes
    -----
    Sag energy (IEEE 1564-2014) is accumulated over every Urms(1/2) value of the event, from
    its start row up to (not including) its end row, with Δt = half the window length (the
    refresh step). For polyphase sites the LOWEST channel of each row is used (a choice of
    this project: IEEE 1564 also describes summing per-phase energies). For an interruption
    the energy covers the whole enclosing below-dip-threshold period. Swells carry None.

    ``sync_state`` is the least trusted timebase state seen at the event's start and end
    (unsynced, then holdover, then synced/replay) and ``time_error_s`` the largest error.
    Each :class:`EventUpdate` carries the index/UTC of its own change: use those for capture
    triggers (an event that becomes an interruption moves its ``start`` later).

    References
    ----------
    IEC 61000-4-30 Ed.3 clause 5.4 (dips and swells) and clause 5.5 (interruptions: start and
    end rules, from memory). The interruption threshold is EN 50160's 5 % or IEEE 1159's 10 %
    (:class:`Thresholds`), not IEC 61000-4-30's.
    """

    def __init__(
        self,
        nominal_v: float,
        channels: int,
        thresholds: Thresholds,
        timebase: Timebase,
        site_service_type: str = "1ph",
        id_factory: Callable[[], str] | None = None,
    ) -> None:
        if not nominal_v > 0:
            raise ValueError(f"nominal_v must be > 0 V, got {nominal_v!r}")
        if channels < 1:
            raise ValueError(f"channels must be >= 1, got {channels!r}")
        expected = _SERVICE_CHANNELS.get(site_service_type)
        if expected is None:
            raise ValueError(
                f"site_service_type must be one of {', '.join(_SERVICE_CHANNELS)}; "
                f"got {site_service_type!r}"
            )
        if expected != channels:
            raise ValueError(
                f"site_service_type {site_service_type} has {expected} channel(s), got {channels}"
            )
        t = thresholds
        if not (0 <= t.interruption < t.dip < 1.0 < t.swell) or not (t.hysteresis >= 0):
            raise ValueError(
                "thresholds must satisfy 0 <= interruption < dip < 1 < swell and hysteresis "
                f">= 0; got {t.as_dict()}"
            )
        if t.dip + t.hysteresis > t.swell - t.hysteresis:
            raise ValueError(f"hysteresis bands of dip and swell overlap: {t.as_dict()}")
        self.nominal_v = float(nominal_v)
        self.channels = channels
        self.thresholds = thresholds
        self.timebase = timebase
        self.site_service_type = site_service_type
        self._new_id = id_factory or _default_id
        v = self.nominal_v
        self._dip_v = t.dip * v
        self._dip_end_v = (t.dip + t.hysteresis) * v
        self._swell_v = t.swell * v
        self._swell_end_v = (t.swell - t.hysteresis) * v
        self._int_v = t.interruption * v
        self._int_end_v = (t.interruption + t.hysteresis) * v
        self._dip: _Track | None = None
        self._swell: _Track | None = None
        self._last_start = -np.inf

    # ------------------------------------------------------------------ public API

    def open_events(self) -> list[Event]:
        """The events that have started and not yet ended (live objects)."""
        return [tr.event for tr in (self._dip, self._swell) if tr is not None]

    def update(self, half: HalfCycleRms) -> list[EventUpdate]:
        """Feed the next Urms(1/2) rows; return the events that started or ended in them.

        Raises ValueError on non-finite values, a wrong channel count or rows that do not
        follow the previous ones in time (nothing of the detector's state is changed then).
        """
        n = len(half)
        if n == 0:
            return []
        urms = np.asarray(half.urms, dtype=np.float64)
        if urms.ndim != 2 or urms.shape != (n, self.channels):
            raise ValueError(f"urms must have shape ({n}, {self.channels}), got {urms.shape}")
        if not np.isfinite(urms).all():
            bad = int(np.flatnonzero(~np.isfinite(urms).all(axis=1))[0])
            raise ValueError(f"non-finite Urms(1/2) value at row {bad} (start {half.start[bad]})")
        start = np.asarray(half.start, dtype=np.float64)
        if start[0] <= self._last_start or (n > 1 and not (np.diff(start) > 0).all()):
            raise ValueError("Urms(1/2) rows must have strictly increasing start indices")
        rate = self.timebase.sample_rate()
        dt = (np.asarray(half.end, dtype=np.float64) - start) * 0.5 / rate
        self._last_start = float(start[-1])

        # Common case: no event open and every value inside the band — one numpy check.
        if self._dip is None and self._swell is None:
            lo, hi = float(urms.min()), float(urms.max())
            if lo >= self._dip_v and hi <= self._swell_v:
                return []

        below_dip: B1 = urms < self._dip_v
        any_below_dip = _rows_any(below_dip)
        all_dip_end = _rows_all(urms >= self._dip_end_v)
        above_swell: B1 = urms > self._swell_v
        any_above_swell = _rows_any(above_swell)
        all_swell_end = _rows_all(urms <= self._swell_end_v)
        below_int: B1 = urms < self._int_v
        all_below_int = _rows_all(below_int)
        any_int_end = _rows_any(urms >= self._int_end_v)
        partial: B1 = _rows_any(below_int) & ~all_below_int
        row_min = urms.min(axis=1)

        updates: list[EventUpdate] = []
        seg = 0
        search = 0
        while True:
            t = self._next_transition(
                search, any_below_dip, all_dip_end, all_below_int, any_int_end,
                any_above_swell, all_swell_end,
            )
            self._accumulate(seg, t, urms, below_dip, above_swell, partial, row_min, dt)
            if t >= n:
                break
            row_start = float(start[t])
            # Order inside one row: interruption end, dip end, dip start, interruption start,
            # then swell end and start (the dip and swell tracks are independent).
            dip = self._dip
            if dip is not None and dip.int_active and any_int_end[t]:
                dip.int_active = False
                dip.int_end = row_start
            if dip is not None and all_dip_end[t]:
                updates.append(self._end_dip(row_start, "recovery"))
                dip = None
            if dip is None and any_below_dip[t]:
                dip = self._start_dip(row_start, urms[t])
                ev = dip.event
                updates.append(EventUpdate("started", ev, ev.start, ev.start_utc))
            if dip is not None and not dip.int_active and all_below_int[t]:
                self._start_interruption(dip, row_start)
            if self._swell is not None and all_swell_end[t]:
                updates.append(self._end_swell(row_start, "recovery"))
            if self._swell is None and any_above_swell[t]:
                self._swell = self._start_swell(row_start, urms[t])
                ev = self._swell.event
                updates.append(EventUpdate("started", ev, ev.start, ev.start_utc))
            seg = t
            search = t + 1
        return updates

    def finish(self, end_index: float) -> list[EventUpdate]:
        """End of data: close every open event at ``end_index`` with ended_by="end_of_data"."""
        updates: list[EventUpdate] = []
        if self._dip is not None:
            if self._dip.int_active:
                self._dip.int_active = False
                self._dip.int_end = float(end_index)
            updates.append(self._end_dip(float(end_index), "end_of_data"))
        if self._swell is not None:
            updates.append(self._end_swell(float(end_index), "end_of_data"))
        return updates

    # ------------------------------------------------------------------ internals

    def _next_transition(
        self, frm: int, any_below_dip: B1, all_dip_end: B1, all_below_int: B1,
        any_int_end: B1, any_above_swell: B1, all_swell_end: B1,
    ) -> int:
        """Index of the first row >= frm where the current state changes (len if none)."""
        n = any_below_dip.shape[0]
        if frm >= n:
            return n
        dip = self._dip
        if dip is None:
            cond = any_below_dip[frm:]
        else:
            cond = all_dip_end[frm:] | (any_int_end[frm:] if dip.int_active
                                         else all_below_int[frm:])
        cond = cond | (all_swell_end[frm:] if self._swell is not None else any_above_swell[frm:])
        hit = int(np.argmax(cond))
        return frm + hit if cond[hit] else n

    def _accumulate(
        self, a: int, b: int, urms: F64, below_dip: B1, above_swell: B1, partial: B1,
        row_min: F64, dt: F64,
    ) -> None:
        """Fold rows [a, b) into the open events' statistics (the state is constant there)."""
        if b <= a:
            return
        dip = self._dip
        if dip is not None:
            seg = urms[a:b]
            np.minimum(dip.extreme, seg.min(axis=0), out=dip.extreme)
            dip.involved |= below_dip[a:b].any(axis=0)
            dip.period_min = min(dip.period_min, float(row_min[a:b].min()))
            dip.energy_s += float(sag_energy_terms(row_min[a:b] / self.nominal_v, dt[a:b]).sum())
            dip.partial = dip.partial or bool(partial[a:b].any())
            if dip.int_active and dip.int_extreme is not None:
                np.minimum(dip.int_extreme, seg.min(axis=0), out=dip.int_extreme)
            self._refresh_dip_event(dip)
        sw = self._swell
        if sw is not None:
            np.maximum(sw.extreme, urms[a:b].max(axis=0), out=sw.extreme)
            sw.involved |= above_swell[a:b].any(axis=0)
            ev = sw.event
            ev.level_v = float(sw.extreme.max())
            ev.per_channel_level_v = tuple(float(x) for x in sw.extreme)
            ev.channels = tuple(int(i) for i in np.flatnonzero(sw.involved))

    def _refresh_dip_event(self, dip: _Track) -> None:
        ev = dip.event
        ev.sag_energy_s = dip.energy_s
        # A partial outage is a dip property: an interruption had the whole service out.
        ev.partial_outage = dip.partial and dip.int_extreme is None
        if dip.int_extreme is not None:  # an interruption: levels of the interruption spells
            ev.level_v = float(dip.int_extreme.min())
            ev.per_channel_level_v = tuple(float(x) for x in dip.int_extreme)
            ev.enclosing_level_v = dip.period_min
        else:
            ev.level_v = float(dip.extreme.min())
            ev.per_channel_level_v = tuple(float(x) for x in dip.extreme)
            ev.channels = tuple(int(i) for i in np.flatnonzero(dip.involved))

    def _time(self, index: float) -> tuple[float, str, float]:
        state = self.timebase.state()
        return self.timebase.to_utc(index), state.sync, state.error_s

    def _new_event(self, kind: str, index: float, row: F64) -> tuple[Event, float]:
        utc, sync, err = self._time(index)
        level = float(row.min()) if kind == "dip" else float(row.max())
        ev = Event(
            event_id=self._new_id(), kind=kind,  # type: ignore[arg-type]
            channels=(), start=index, start_utc=utc, nominal_v=self.nominal_v,
            thresholds=self.thresholds, level_v=level,
            per_channel_level_v=tuple(float(x) for x in row),
            time_error_s=err, sync_state=sync,
        )
        return ev, utc

    def _start_dip(self, index: float, row: F64) -> _Track:
        ev, utc = self._new_event("dip", index, row)
        ev.sag_energy_s = 0.0
        tr = _Track(
            event=ev, extreme=np.full(self.channels, np.inf),
            involved=np.zeros(self.channels, dtype=bool),
            period_start=index, period_start_utc=utc,
        )
        self._dip = tr
        return tr

    def _start_interruption(self, dip: _Track, index: float) -> None:
        dip.int_active = True
        dip.int_end = None
        ev = dip.event
        if dip.int_start is None:  # first spell: the event becomes an interruption
            dip.int_start = index
            dip.int_extreme = np.full(self.channels, np.inf)
            utc, sync, err = self._time(index)
            ev.kind = "interruption"
            ev.enclosing_start_utc = dip.period_start_utc
            ev.start = index
            ev.start_utc = utc
            ev.channels = tuple(range(self.channels))
            ev.time_error_s = max(ev.time_error_s or 0.0, err)
            ev.sync_state = _worse_sync(ev.sync_state, sync)

    def _end_dip(self, index: float, reason: str) -> EventUpdate:
        dip = self._dip
        assert dip is not None
        self._refresh_dip_event(dip)
        ev = dip.event
        utc, sync, err = self._time(index)
        if dip.int_start is not None:
            assert dip.int_end is not None
            int_utc = self.timebase.to_utc(dip.int_end)
            ev.end = dip.int_end
            ev.end_utc = int_utc
            ev.enclosing_duration_s = utc - dip.period_start_utc
            ev.enclosing_level_v = dip.period_min
        else:
            ev.end = index
            ev.end_utc = utc
        ev.ended_by = reason  # type: ignore[assignment]
        ev.time_error_s = max(ev.time_error_s or 0.0, err)
        ev.sync_state = _worse_sync(ev.sync_state, sync)
        self._dip = None
        return EventUpdate("ended", ev, ev.end, ev.end_utc)

    def _start_swell(self, index: float, row: F64) -> _Track:
        ev, _ = self._new_event("swell", index, row)
        return _Track(
            event=ev, extreme=np.full(self.channels, -np.inf),
            involved=np.zeros(self.channels, dtype=bool),
        )

    def _end_swell(self, index: float, reason: str) -> EventUpdate:
        sw = self._swell
        assert sw is not None
        ev = sw.event
        utc, sync, err = self._time(index)
        ev.end = index
        ev.end_utc = utc
        ev.ended_by = reason  # type: ignore[assignment]
        ev.time_error_s = max(ev.time_error_s or 0.0, err)
        ev.sync_state = _worse_sync(ev.sync_state, sync)
        self._swell = None
        return EventUpdate("ended", ev, ev.end, ev.end_utc)
