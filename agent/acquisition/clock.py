"""Live timebase: map sample indices to UTC from block arrival times and the NTP state.

A sample clock (the ADC's crystal) is steady but off nominal by tens of ppm; the system
clock is right on average but arrives with jitter and can be stepped by NTP. The
:class:`ClockModel` fits wall time against sample index by least squares over a sliding
window, which gives both the origin and the true sample rate. An observation far off the
fit that persists (``step_confirm`` observations agreeing within ``step_threshold_s``) is a
wall-clock step: it is absorbed — later observations are shifted back by the step so the
fitted timeline has no jump — and flagged. The timeline then moves towards the corrected
clock at ``slew_rate`` (seconds per second, default 500 ppm, the usual NTP slew limit from
memory), so times stay monotonic and continuous yet end up right. A step larger than
``jump_above_s`` (default 60 s, e.g. the first NTP fix of a clock that booted far off) would
take days to slew; it is applied at once instead — the timeline jumps at the step, and the
step is flagged like any other. A single outlier (a late read) is dropped and counted.

Sync state comes from an injectable :class:`SystemClock`; :class:`KernelClock` reads the
Linux kernel's NTP discipline state with ``adjtimex(2)`` (read-only) and reports "unknown"
(``(False, None)``) where the call is not available.
"""

from __future__ import annotations

import ctypes
import math
import time
from dataclasses import dataclass
from typing import Protocol

import numpy as np
import numpy.typing as npt

from agent.acquisition.timebase import TimeState, utc_each

__all__ = ["ClockModel", "KernelClock", "StepRecord", "SystemClock"]

TIME_ERROR = 5  # adjtimex return value: clock not synchronised (adjtimex(2))
STA_UNSYNC = 0x0040  # status bit: clock not synchronised (adjtimex(2))


class SystemClock(Protocol):
    def now(self) -> float:
        """Current UTC time [s since epoch]."""
        ...

    def sync_status(self) -> tuple[bool, float | None]:
        """(synchronised?, estimated error [s] or None when unknown)."""
        ...


class _Timeval(ctypes.Structure):
    _fields_ = (("tv_sec", ctypes.c_long), ("tv_usec", ctypes.c_long))


class _Timex(ctypes.Structure):
    """``struct timex`` from <sys/timex.h> (Linux, LP64 layout; adjtimex(2))."""

    _fields_ = (
        ("modes", ctypes.c_uint),
        ("offset", ctypes.c_long),
        ("freq", ctypes.c_long),
        ("maxerror", ctypes.c_long),
        ("esterror", ctypes.c_long),
        ("status", ctypes.c_int),
        ("constant", ctypes.c_long),
        ("precision", ctypes.c_long),
        ("tolerance", ctypes.c_long),
        ("time", _Timeval),
        ("tick", ctypes.c_long),
        ("ppsfreq", ctypes.c_long),
        ("jitter", ctypes.c_long),
        ("shift", ctypes.c_int),
        ("stabil", ctypes.c_long),
        ("jitcnt", ctypes.c_long),
        ("calcnt", ctypes.c_long),
        ("errcnt", ctypes.c_long),
        ("stbcnt", ctypes.c_long),
        ("tai", ctypes.c_int),
        ("_reserved", ctypes.c_int * 11),
    )


class KernelClock:
    """The system clock, with sync state from the kernel (``adjtimex`` with modes = 0)."""

    def __init__(self) -> None:
        self._adjtimex = None
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            fn = libc.adjtimex
            fn.argtypes = (ctypes.POINTER(_Timex),)
            fn.restype = ctypes.c_int
            self._adjtimex = fn
        except (OSError, AttributeError):
            self._adjtimex = None

    @property
    def available(self) -> bool:
        return self._adjtimex is not None

    def now(self) -> float:
        return time.time()

    def read(self) -> tuple[int, int, int] | None:
        """(return code, status bits, esterror [µs]) or None when unavailable."""
        if self._adjtimex is None:
            return None
        tx = _Timex()
        tx.modes = 0  # read only
        rc = int(self._adjtimex(ctypes.byref(tx)))
        if rc < 0:
            return None
        return rc, int(tx.status), int(tx.esterror)

    def sync_status(self) -> tuple[bool, float | None]:
        r = self.read()
        if r is None:
            return False, None
        rc, status, esterror_us = r
        synced = rc != TIME_ERROR and not status & STA_UNSYNC
        return synced, (esterror_us * 1e-6 if synced else None)


@dataclass(frozen=True)
class StepRecord:
    """A wall-clock step absorbed at ``index`` [sample]; ``size_s`` > 0: the clock jumped ahead."""

    index: int
    size_s: float


class ClockModel:
    """Least-squares sample-index → UTC mapping for a live source (implements ``Timebase``).

    Parameters
    ----------
    nominal_rate : float  [S/s]
    system_clock : SystemClock, default KernelClock()
    window_s : float  [s] — observations older than this (in samples) leave the fit
    step_threshold_s : float  [s] — a residual beyond this is an outlier or a step
    step_confirm : int — consecutive agreeing outliers that make a step
    slew_rate : float  [s/s] — how fast an absorbed step is worked off (0 = never)
    error_floor_s : float  [s] — added in quadrature to the estimated error
    unsynced_error_s : float  [s] — assumed clock error when unsynced and the kernel gives none
    min_fit_span_s : float  [s] — below this span the slope is held at nominal
    jump_above_s : float or None  [s] — steps larger than this are applied at once, not slewed
    """

    def __init__(
        self,
        nominal_rate: float,
        system_clock: SystemClock | None = None,
        *,
        window_s: float = 600.0,
        step_threshold_s: float = 0.05,
        step_confirm: int = 2,
        slew_rate: float = 500e-6,
        error_floor_s: float = 1e-3,
        unsynced_error_s: float = 1.0,
        min_fit_span_s: float = 30.0,
        jump_above_s: float | None = 60.0,
    ) -> None:
        if not (math.isfinite(nominal_rate) and nominal_rate > 0):
            raise ValueError(f"nominal_rate must be positive, got {nominal_rate}")
        if not 0.0 <= slew_rate < 0.1:
            raise ValueError("slew_rate must be in [0, 0.1)")
        if step_confirm < 1:
            raise ValueError("step_confirm must be >= 1")
        self.nominal_rate = float(nominal_rate)
        self.clock: SystemClock = system_clock if system_clock is not None else KernelClock()
        self.window_samples = window_s * nominal_rate
        self.step_threshold_s = step_threshold_s
        self.step_confirm = step_confirm
        self.slew_rate = slew_rate
        self.error_floor_s = error_floor_s
        self.unsynced_error_s = unsynced_error_s
        self.min_fit_span = min_fit_span_s * nominal_rate
        self.jump_above_s = jump_above_s
        # observations (index, absorbed wall time) in a compacting buffer: [lo, hi) is live
        self._idx = np.empty(1024, dtype=np.float64)
        self._t = np.empty(1024, dtype=np.float64)
        self._lo = 0
        self._hi = 0
        self._last_index: int | None = None
        self._pending: list[tuple[int, float]] = []  # (index, raw wall time) outliers
        self._absorbed = 0.0  # sum of absorbed steps [s]
        self.step_log: list[StepRecord] = []
        self.outliers = 0
        self._step_unread = False
        self._t0: float | None = None  # epoch offset for numerical conditioning
        self._i_ref = 0.0
        self._t_ref = 0.0
        self._slope = 1.0 / nominal_rate  # [s/sample]
        self._resid_std = 0.0
        self._synced = False
        self._ever_synced = False
        self._ntp_error: float | None = None
        self.first_synced_index: int | None = None

    # -- observations ----------------------------------------------------------------------
    def observe(self, end_index: int, wall_time: float | None = None) -> None:
        """Record that sample ``end_index`` (exclusive end of a block) arrived at ``wall_time``.

        Call once per block of a live source with ``block.end_index, block.wall_time``;
        ``wall_time`` None reads the system clock now. Replayed files have no wall time:
        use :class:`agent.acquisition.timebase.ReplayTimebase` for them instead.
        """
        end_index = int(end_index)
        if self._last_index is not None and end_index <= self._last_index:
            raise ValueError(f"end_index {end_index} does not advance past {self._last_index}")
        self._last_index = end_index
        synced, est = self.clock.sync_status()
        self._synced, self._ntp_error = synced, est
        if synced:
            self._ever_synced = True
            if self.first_synced_index is None:
                self.first_synced_index = end_index
        t = self.clock.now() if wall_time is None else float(wall_time)
        if self._t0 is None:
            self._t0 = t
        raw = t - self._t0
        if self._hi - self._lo < 2:
            self._add(end_index, raw - self._absorbed)
            return
        resid = (raw - self._absorbed) - self._fit_at(end_index)
        if abs(resid) <= self.step_threshold_s:
            self.outliers += len(self._pending)
            self._pending.clear()
            self._add(end_index, raw - self._absorbed)
            return
        self._pending.append((int(end_index), raw))
        res = [(r - self._absorbed) - self._fit_at(i) for i, r in self._pending]
        if max(res) - min(res) > self.step_threshold_s:
            # outliers that disagree: the oldest was a one-off
            self.outliers += 1
            self._pending.pop(0)
            return
        if len(self._pending) >= self.step_confirm:
            size = float(np.median(res))
            self._absorbed += size
            self.step_log.append(StepRecord(self._pending[0][0], size))
            self._step_unread = True
            for i, r in self._pending:
                self._add(i, r - self._absorbed)
            self._pending.clear()

    def _add(self, index: int, t: float) -> None:
        if self._hi == self._idx.size:
            live = self._hi - self._lo
            if live * 2 > self._idx.size:  # grow
                self._idx = np.concatenate([self._idx, np.empty_like(self._idx)])
                self._t = np.concatenate([self._t, np.empty_like(self._t)])
            self._idx[:live] = self._idx[self._lo : self._hi]
            self._t[:live] = self._t[self._lo : self._hi]
            self._lo, self._hi = 0, live
        self._idx[self._hi] = index
        self._t[self._hi] = t
        self._hi += 1
        floor = index - self.window_samples
        first = self._lo + int(np.searchsorted(self._idx[self._lo : self._hi], floor))
        self._lo = max(self._lo, min(first, self._hi - 2))  # keep at least two points
        self._refit()

    def _refit(self) -> None:
        idx = self._idx[self._lo : self._hi]
        t = self._t[self._lo : self._hi]
        i_ref = float(idx.mean())
        x = idx - i_ref
        span = float(idx[-1] - idx[0])
        fitted = span >= self.min_fit_span and idx.size >= 3
        t_ref = float(t.mean())
        slope = float(np.dot(x, t - t_ref) / np.dot(x, x)) if fitted else 1.0 / self.nominal_rate
        resid = t - (t_ref + x * slope)
        dof = idx.size - (2 if fitted else 1)
        self._resid_std = float(math.sqrt(np.dot(resid, resid) / dof)) if dof > 0 else 0.0
        self._i_ref, self._t_ref, self._slope = i_ref, t_ref, slope

    def _fit_at(self, index: float) -> float:
        return self._t_ref + (index - self._i_ref) * self._slope

    # -- Timebase ----------------------------------------------------------------------------
    def _slew(self, index: float) -> float:
        total = 0.0
        for st in self.step_log:
            if self.jump_above_s is not None and abs(st.size_s) > self.jump_above_s:
                total += st.size_s if index >= st.index else 0.0
                continue
            worked = max(0.0, (index - st.index) / self.nominal_rate * self.slew_rate)
            total += math.copysign(min(abs(st.size_s), worked), st.size_s)
        return total

    def to_utc(self, index: float) -> float:
        if self._t0 is None:
            raise RuntimeError("ClockModel.to_utc before any observation")
        return self._t0 + self._fit_at(index) + self._slew(index)

    def to_utc_many(self, index: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
        """:meth:`to_utc` of every element of ``index`` (the same operations, so the same
        values), for a batch of crossings at once."""
        if type(self).to_utc is not ClockModel.to_utc:    # a subclass with its own mapping
            return utc_each(self, index)
        if self._t0 is None:
            raise RuntimeError("ClockModel.to_utc before any observation")
        fit = self._t_ref + (index - self._i_ref) * self._slope
        total = np.zeros(index.shape)
        for st in self.step_log:
            if self.jump_above_s is not None and abs(st.size_s) > self.jump_above_s:
                total += np.where(index >= st.index, st.size_s, 0.0)
                continue
            worked = np.maximum(0.0, (index - st.index) / self.nominal_rate * self.slew_rate)
            total += np.copysign(np.minimum(abs(st.size_s), worked), st.size_s)
        return np.asarray(self._t0 + fit + total, np.float64)

    def sample_rate(self) -> float:
        return 1.0 / self._slope

    @property
    def steps(self) -> int:
        return len(self.step_log)

    @property
    def last_step_s(self) -> float:
        return self.step_log[-1].size_s if self.step_log else 0.0

    def unslewed_s(self, index: float) -> float:
        """Part of the absorbed steps not yet worked off at ``index`` [s]."""
        return self._absorbed - self._slew(index)

    @property
    def sync(self) -> str:
        if self._synced:
            return "synced"
        return "holdover" if self._ever_synced else "unsynced"

    def state(self) -> TimeState:
        ntp = self._ntp_error
        if ntp is None:
            ntp = 0.0 if self._synced else self.unsynced_error_s
        err = math.sqrt(self._resid_std**2 + ntp**2 + self.error_floor_s**2)
        last = self._last_index or 0
        err += abs(self.unslewed_s(last))
        step, self._step_unread = self._step_unread, False
        return TimeState(sync=self.sync, error_s=err, step=step)
