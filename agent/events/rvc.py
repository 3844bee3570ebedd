"""Rapid voltage changes (RVC) over Urms(1/2) values.

An RVC is a quick change from one steady RMS level to another that stays inside the dip and
swell thresholds (PV output ramps, capacitor switching, motor starts). After IEC 61000-4-30
Ed.3 clause 5.11 (clause number and the details below from memory, see tests/SOURCES.md):

- the reference is the arithmetic mean of the previous ``N`` Urms(1/2) values, N = 100 at
  50 Hz and 120 at 60 Hz (one second);
- *steady state*: N consecutive values all within ``threshold - hysteresis`` of their own
  mean, with no value beyond the dip or swell threshold;
- an RVC *starts* (from a steady state) at the first value more than ``threshold`` from the
  mean of the N values before it, on any channel;
- it *ends* where a new steady state begins (the end is the first value of that new steady
  window, as the standard back-dates it by N values); it is then reported in one go (start
  and end), since until then it may still turn into a dip or swell;
- an RVC during which any value crosses the dip or swell threshold is no RVC: it is
  discarded (the dip/swell detector reports that event) and detection waits for a new steady
  state;
- ``ΔUmax`` is the largest |Urms(1/2) - mean before| during the event, ``ΔUss`` the
  |mean of the new steady window - mean before|, both the largest over the channels [V].

Defaults (fractions of Udin, from memory): threshold 3 % and hysteresis 1.5 % (the standard
leaves both to the user; typical thresholds are 1-6 % of Udin, hysteresis about half the
threshold). Captures are not taken for RVCs: they are known only a second after their start.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt
from numpy.lib.stride_tricks import sliding_window_view

from agent.acquisition.timebase import Timebase
from agent.events.types import Event, EventUpdate, Thresholds
from agent.measurement.types import HalfCycleRms

F64 = npt.NDArray[np.float64]
B1 = npt.NDArray[np.bool_]


@dataclass(frozen=True)
class RvcSettings:
    """RVC threshold and hysteresis [fraction of Udin]; ``enabled`` switches detection."""

    threshold: float = 0.03
    hysteresis: float = 0.015
    enabled: bool = True

    def __post_init__(self) -> None:
        if not 0 < self.threshold < 0.1:
            raise ValueError(f"rvc threshold must be in (0, 0.1) of Udin, got {self.threshold}")
        if not 0 <= self.hysteresis < self.threshold:
            raise ValueError(f"rvc hysteresis must be in [0, threshold), got {self.hysteresis}")


def values_per_second(nominal_hz: float) -> int:
    """Urms(1/2) values in one second: 100 at 50 Hz, 120 at 60 Hz."""
    return round(2 * nominal_hz)


def steady_windows(u: F64, n: int, band_v: float) -> tuple[B1, F64]:
    """For each window of ``n`` consecutive rows of ``u`` (rows, channels) [V]: whether every
    value lies within ``band_v`` [V] of the window's mean on every channel, and the means.

    Returns ``ok`` (rows - n + 1,) and ``mean`` (rows - n + 1, channels) [V]; row k describes
    the window u[k : k + n].
    """
    x = np.ascontiguousarray(u.T)                          # (channels, rows): fast reductions
    win = sliding_window_view(x, n, axis=1)                # (channels, m, n)
    mean = win.sum(axis=-1) / n
    ok = ((win.max(axis=-1) - mean <= band_v) & (mean - win.min(axis=-1) <= band_v)).all(axis=0)
    return np.asarray(ok), np.asarray(mean.T)


class RvcDetector:
    """Streaming RVC detection over :class:`HalfCycleRms` rows (all channels at once).

    Parameters
    ----------
    nominal_v : Udin [V]
    nominal_hz : 50 or 60 [Hz] (sets N = 100 / 120)
    channels : channels per row
    thresholds : dip and swell thresholds [fraction of Udin]: an RVC never overlaps them
    settings : RVC threshold and hysteresis
    timebase : sample index -> UTC
    """

    def __init__(self, nominal_v: float, nominal_hz: float, channels: int,
                 thresholds: Thresholds, settings: RvcSettings, timebase: Timebase,
                 id_factory: Callable[[], str] | None = None) -> None:
        self.nominal_v = float(nominal_v)
        self.n = values_per_second(nominal_hz)
        self.channels = channels
        self.thresholds = thresholds
        self.settings = settings
        self.timebase = timebase
        self._new_id = id_factory or (lambda: uuid.uuid4().hex)
        self._thr_v = settings.threshold * self.nominal_v
        self._band_v = (settings.threshold - settings.hysteresis) * self.nominal_v
        self._dip_v = thresholds.dip * self.nominal_v
        self._swell_v = thresholds.swell * self.nominal_v
        self._tail = np.zeros((0, channels))   # the last n rows before the next block
        self._tail_start = np.zeros(0)         # their start indices
        self._bad_run = 0                      # rows since the last dip/swell value (capped)
        self._state = "init"
        self._ev: dict[str, Any] = {}

    def update(self, half: HalfCycleRms) -> list[EventUpdate]:
        """Feed the next rows; returns the RVCs that ended in them (a started and an ended
        update each)."""
        if not self.settings.enabled or len(half) == 0:
            return []
        n = self.n
        u = np.concatenate([self._tail, np.asarray(half.urms, np.float64)], axis=0)
        starts = np.concatenate([self._tail_start, np.asarray(half.start, np.float64)])
        t0 = self._tail.shape[0]                # first new row in u
        m = u.shape[0]
        if self._state == "steady" and t0 >= n:
            # Every mean of the last n values lies between the rows' extremes: when they
            # span no more than the threshold inside the dip/swell band, nothing can trigger.
            lo, hi = u.min(axis=0), u.max(axis=0)
            if ((hi - lo).max() <= self._thr_v and lo.min() >= self._dip_v
                    and hi.max() <= self._swell_v):
                self._tail = u[m - n:].copy()
                self._tail_start = starts[m - n:].copy()
                return []
        bad = np.asarray(((u < self._dip_v) | (u > self._swell_v)).any(axis=1))
        # Window r is u[r:r+n]: its mean (cheap, always) and whether it is steady and free of
        # dip/swell values (computed only when a state needs it).
        if m >= n:
            cs = np.concatenate([np.zeros((1, self.channels)), np.cumsum(u, axis=0)])
            wmean = (cs[n:] - cs[:-n]) / n
        else:
            wmean = np.zeros((0, self.channels))
        steady: list[B1] = []

        def windows_ok() -> B1:
            if not steady:
                if m < n:
                    steady.append(np.zeros(0, bool))
                else:
                    ok, _ = steady_windows(u, n, self._band_v)
                    cbad = np.concatenate([[0], np.cumsum(bad)])
                    steady.append(ok & ((cbad[n:] - cbad[:-n]) == 0))
            return steady[0]
        updates: list[EventUpdate] = []
        k = t0
        while k < m:
            if self._state == "init":
                # Steady once a window ending at or after k is steady and clean.
                lo = max(k, n - 1)
                hit = np.flatnonzero(windows_ok()[lo - (n - 1):]) if lo < m else np.zeros(0, int)
                if not hit.shape[0]:
                    break
                k = lo + int(hit[0]) + 1
                self._state = "steady"
            elif self._state == "steady":
                # Mean of the n rows before each row k.. (needs k >= n).
                lo = max(k, n)
                if lo >= m:
                    break
                prev = wmean[lo - n:m - n]                       # window u[j-n:j] for j=lo..
                dev = np.abs(u[lo:] - prev).max(axis=1)
                trig = (dev > self._thr_v) | bad[lo:]
                hit = np.flatnonzero(trig)
                if not hit.shape[0]:
                    break
                j = lo + int(hit[0])
                if bad[j]:
                    self._state = "init"
                    k = j + 1
                    continue
                self._ev = {"start_row": j, "start": float(starts[j]), "before": prev[j - lo],
                            "dmax": np.zeros(self.channels), "ext": u[j].copy()}
                self._fold(u, j, j)
                self._state = "event"
                k = j
            else:
                ev = self._ev
                s = ev["start_row"]
                # Bad value inside the event: discard, wait for a new steady state.
                hit_bad = np.flatnonzero(bad[max(k, s):])
                # New steady window u[e:e+n] with e > s, ending at row e + n - 1 >= k.
                lo_end = max(k, s + n)
                cand = (np.flatnonzero(windows_ok()[lo_end - (n - 1):]) if lo_end < m
                        else np.zeros(0, int))
                first_bad = max(k, s) + int(hit_bad[0]) if hit_bad.shape[0] else m
                first_end = lo_end + int(cand[0]) if cand.shape[0] else m
                if first_bad < m and first_bad <= first_end:
                    self._state, self._ev = "init", {}
                    k = first_bad + 1
                    continue
                if first_end >= m:
                    # Still open: fold rows that surely belong to the event (before m - n + 1).
                    self._fold(u, s, m - n)
                    break
                e = first_end - n + 1
                self._fold(u, s, e - 1)
                updates += self._close(ev, float(starts[e]), wmean[first_end - (n - 1)])
                self._state, self._ev = "steady", {}
                k = first_end + 1
        keep = min(n, m)
        if self._state == "event":
            # The event's rows stay addressable: shift its row numbers with the new tail.
            self._ev["start_row"] -= m - keep
            self._ev["folded"] = self._ev.get("folded", -1) - (m - keep)
        self._tail = u[m - keep:].copy()
        self._tail_start = starts[m - keep:].copy()
        return updates

    def finish(self) -> list[EventUpdate]:
        """End of data: an RVC still waiting for its new steady state is not reported."""
        self._state, self._ev = "init", {}
        return []

    # ------------------------------------------------------------------ internals
    def _fold(self, u: F64, a: int, b: int) -> None:
        """Fold rows max(a, folded + 1) .. b into the event's ΔUmax per channel."""
        ev = self._ev
        lo = max(a, ev.get("folded", -1) + 1)
        if b < lo:
            return
        d = np.abs(u[lo:b + 1] - ev["before"])
        rows = d.argmax(axis=0)
        best = d[rows, np.arange(self.channels)]
        better = best > ev["dmax"]
        ev["dmax"] = np.where(better, best, ev["dmax"])
        ev["ext"] = np.where(better, u[lo + rows, np.arange(self.channels)], ev["ext"])
        ev["folded"] = b

    def _close(self, ev: dict[str, Any], end_index: float, after: F64) -> list[EventUpdate]:
        before = ev["before"]
        dss = np.abs(after - before)
        dmax = ev["dmax"]
        involved = tuple(int(c) for c in np.flatnonzero(dmax > self._thr_v))
        worst = int(np.argmax(dmax))
        tb = self.timebase
        state = tb.state()
        event = Event(
            event_id=self._new_id(), kind="rvc", channels=involved or (worst,),
            start=ev["start"], start_utc=tb.to_utc(ev["start"]), nominal_v=self.nominal_v,
            thresholds=self.thresholds, level_v=float(ev["ext"][worst]),
            end=end_index, end_utc=tb.to_utc(end_index),
            per_channel_level_v=tuple(float(x) for x in ev["ext"]),
            ended_by="recovery", time_error_s=state.error_s, sync_state=state.sync,
            delta_umax_v=float(dmax.max()), delta_uss_v=float(dss.max()),
            rvc_threshold=self.settings.threshold, rvc_hysteresis=self.settings.hysteresis,
        )
        return [EventUpdate("started", event, event.start, event.start_utc),
                EventUpdate("ended", event, event.end, event.end_utc)]


def classify_rvc(event: Event) -> dict[str, Any]:
    """Classification of an RVC: its ΔUmax and ΔUss in pu of Udin and the settings used.

    IEC 61000-4-30 Ed.3 (from memory) defines no categories for RVCs; EN 50160 mentions rapid
    voltage changes of generally up to 5 % of Un, occasionally up to 10 % (from memory), so
    the classification says which side of 5 % ΔUmax falls (indicative).
    """
    dmax = (event.delta_umax_v or 0.0) / event.nominal_v
    dss = (event.delta_uss_v or 0.0) / event.nominal_v
    return {
        "rvc": {"delta_umax_pu": dmax, "delta_uss_pu": dss,
                "threshold_pu": event.rvc_threshold, "hysteresis_pu": event.rvc_hysteresis,
                "source": "IEC 61000-4-30 Ed.3 RVC method (from memory)"},
        "en50160_rvc": {"within_5pct": dmax <= 0.05,
                        "source": "EN 50160 rapid voltage changes (from memory)"},
    }
