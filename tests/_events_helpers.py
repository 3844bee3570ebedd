"""Helpers for the events-stage tests: analytic Urms(1/2) series and a plain reference
state machine written straight from the IEC 61000-4-30 Ed.3 clause 5.4 wording.

Signal model: u(t) = g(t)·sqrt(2)·sin(2π t / T) with g = 1 outside the disturbance and g = depth
inside [t0, t1). Urms(1/2) windows are one cycle long and start every half cycle at the
sine's zero crossings (t = k·T/2), as a zero-crossing-synchronised Urms(1/2) would. The
disturbance's point-on-wave is therefore 360°·frac(t0/T) after a positive-going zero crossing.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from agent.events.types import Thresholds
from agent.measurement.types import HalfCycleRms


def _int_sin2(a: np.ndarray, b: np.ndarray, omega: float) -> np.ndarray:
    """∫_a^b sin²(ωt) dt, exact."""
    return (b - a) / 2.0 - (np.sin(2 * omega * b) - np.sin(2 * omega * a)) / (4 * omega)


def window_starts(n_rows: int, period_s: float, first_s: float = 0.0) -> np.ndarray:
    """Window start times [s]: every half cycle from ``first_s`` (a zero crossing)."""
    return first_s + np.arange(n_rows) * period_s / 2.0


def rect_urms_exact(
    starts_s: np.ndarray, period_s: float, t0: float, t1: float, depth: float
) -> np.ndarray:
    """Exact one-cycle RMS [pu] of the model signal for windows [s, s+T), a rectangular
    change to ``depth`` pu over [t0, t1) (analytic integral of sin²)."""
    omega = 2 * np.pi / period_s
    s = np.asarray(starts_s, dtype=np.float64)
    e = s + period_s
    a = np.clip(t0, s, e)
    b = np.clip(t1, s, e)
    inside = _int_sin2(a, b, omega)
    total = _int_sin2(s, e, omega)
    ms = 2.0 / period_s * ((total - inside) + depth**2 * inside)
    return np.sqrt(np.maximum(ms, 0.0))


def rect_urms_time_fraction(
    starts_s: np.ndarray, period_s: float, t0: float, t1: float, depth: float
) -> np.ndarray:
    """Time-fraction model sqrt(f·u² + (1-f)) [pu], f = share of the window inside the dip."""
    s = np.asarray(starts_s, dtype=np.float64)
    e = s + period_s
    f = (np.clip(t1, s, e) - np.clip(t0, s, e)) / period_s
    return np.sqrt(np.maximum(f * depth**2 + (1 - f), 0.0))


def half_cycle_rms(
    starts_s: np.ndarray, period_s: float, rate: float, urms_v: np.ndarray
) -> HalfCycleRms:
    """Wrap per-row values [V] (shape (n,) or (n, ch)) as HalfCycleRms with sample indices."""
    u = np.asarray(urms_v, dtype=np.float64)
    if u.ndim == 1:
        u = u[:, None]
    start = np.asarray(starts_s, dtype=np.float64) * rate
    return HalfCycleRms(
        start=start, end=start + period_s * rate, urms=u,
        synthetic=np.zeros(u.shape[0], dtype=bool),
    )


def slice_half(half: HalfCycleRms, a: int, b: int) -> HalfCycleRms:
    return HalfCycleRms(half.start[a:b], half.end[a:b], half.urms[a:b], half.synthetic[a:b])


def reference_events(
    urms_pu: np.ndarray, th: Thresholds
) -> list[tuple[str, int, int | None]]:
    """Row-by-row reference of the polyphase rules, returning (kind, start_row, end_row).

    Dip: any < dip starts, all >= dip + hyst ends. Swell: any > swell starts, all <= swell -
    hyst ends. Interruption (inside a dip period): all < interruption starts, any >=
    interruption + hyst ends; a dip period that held an interruption is reported as the
    interruption (first spell start to last spell end) and not as a dip.
    """
    out: list[tuple[str, int, int | None]] = []
    dip_start: int | None = None
    int_start: int | None = None
    int_end: int | None = None
    int_active = False
    swell_start: int | None = None
    for r, row in enumerate(np.atleast_2d(urms_pu)):
        if dip_start is not None and int_active and any(v >= th.interruption + th.hysteresis
                                                        for v in row):
            int_active, int_end = False, r
        if dip_start is not None and all(v >= th.dip + th.hysteresis for v in row):
            if int_start is not None:
                out.append(("interruption", int_start, int_end))
            else:
                out.append(("dip", dip_start, r))
            dip_start, int_start, int_end = None, None, None
        if dip_start is None and any(v < th.dip for v in row):
            dip_start = r
        if dip_start is not None and not int_active and all(v < th.interruption for v in row):
            int_active = True
            if int_start is None:
                int_start = r
        if swell_start is not None and all(v <= th.swell - th.hysteresis for v in row):
            out.append(("swell", swell_start, r))
            swell_start = None
        if swell_start is None and any(v > th.swell for v in row):
            swell_start = r
    if dip_start is not None:
        out.append(("interruption" if int_start is not None else "dip",
                    int_start if int_start is not None else dip_start, None))
    if swell_start is not None:
        out.append(("swell", swell_start, None))
    return out


def counter_ids(prefix: str = "ev") -> object:
    """An id_factory giving ev-1, ev-2, ..."""
    count = [0]

    def make() -> str:
        count[0] += 1
        return f"{prefix}-{count[0]}"

    return make


def rows_of(levels: Sequence[tuple[float, int]]) -> np.ndarray:
    """Piecewise-constant per-row levels: [(level_pu, n_rows), ...] → 1-D array."""
    return np.concatenate([np.full(n, v, dtype=np.float64) for v, n in levels])
