"""Small pure helpers over regularly spaced values: window means, runs, calendar buckets.

Every verdict takes plain arrays (per-second values, 10-min means with their start times), so
the same functions can later be fed from rollups instead of raw rows.
"""

from __future__ import annotations

from datetime import UTC, datetime
from typing import Any

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
B = npt.NDArray[np.bool_]

WEEK_S = 7 * 86400.0
#: 1970-01-01 was a Thursday: Monday 00:00 UTC weeks start 4 days (345600 s) after the epoch.
_MONDAY0 = 4 * 86400.0


def as_f64(values: npt.ArrayLike) -> F64:
    return np.asarray(values, dtype=np.float64)


def iso(t: float | None) -> str | None:
    """ISO 8601 UTC with a Z, seconds resolution (None stays None)."""
    if t is None or not np.isfinite(t):
        return None
    return datetime.fromtimestamp(float(t), tz=UTC).isoformat(timespec="seconds").replace(
        "+00:00", "Z")


def window_means(t_utc: npt.ArrayLike, values: npt.ArrayLike, window_s: float, *,
                 period_s: float = 1.0, min_coverage: float = 0.99,
                 flagged: npt.ArrayLike | None = None) -> tuple[F64, F64, B]:
    """Clock-aligned RMS means over ``window_s`` of regularly spaced values.

    Windows start on multiples of ``window_s`` UTC; one is kept when at least
    ``min_coverage`` of its values are present; it is flagged when any value in it is.

    Parameters
    ----------
    t_utc : numeric (n,)  [s]  start of each value's period
    values : numeric (n,) or (n, ch)  [V]  RMS values (NaN = missing)
    window_s : float  [s]  60, 300, 600 or 900 for 1/5/10/15-min means
    period_s : float  [s]  spacing of the values
    min_coverage : float  share of a window's values needed (common practice: 99 %)
    flagged : bool (n,), optional

    Returns
    -------
    (window start [s], mean [V] shape (m,) or (m, ch), flagged (m,)); a channel's mean is the
    RMS of its present values (IEC 61000-4-30 aggregation, from memory).
    """
    t = as_f64(t_utc).ravel()
    v = as_f64(values)
    two_d = v.ndim == 2
    v2 = v if two_d else v[:, None]
    fl = np.zeros(t.shape, bool) if flagged is None else np.asarray(flagged, bool).ravel()
    if v2.shape[0] != t.size or fl.size != t.size:
        raise ValueError("t_utc, values and flagged must have the same length")
    good_t = np.isfinite(t)
    if not good_t.any():
        empty = np.empty((0, v2.shape[1])) if two_d else np.empty(0)
        return np.empty(0), empty, np.empty(0, bool)
    t, v2, fl = t[good_t], v2[good_t], fl[good_t]
    slot = np.floor(t / window_s + 1e-9).astype(np.int64)
    # Slots are dense over the span: offsets index bincounts directly (no sort needed).
    first = int(slot.min())
    inv = slot - first
    slots = np.arange(first, int(slot.max()) + 1, dtype=np.int64)
    seen = np.bincount(inv, minlength=slots.size) > 0
    present = np.isfinite(v2)
    count = np.stack([np.bincount(inv, weights=present[:, c].astype(float),
                                  minlength=slots.size) for c in range(v2.shape[1])], axis=1)
    sq = np.stack([np.bincount(inv, weights=np.where(present[:, c], v2[:, c] ** 2, 0.0),
                               minlength=slots.size) for c in range(v2.shape[1])], axis=1)
    need = min_coverage * window_s / period_s
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(count >= need, np.sqrt(sq / np.maximum(count, 1)), np.nan)
    keep = np.isfinite(mean).any(axis=1) & seen
    any_flag = np.bincount(inv, weights=fl.astype(float), minlength=slots.size) > 0
    out = mean[keep] if two_d else mean[keep, 0]
    return (slots[keep] * window_s).astype(np.float64), out, any_flag[keep]


def moving_rms_mean(t_utc: npt.ArrayLike, values_v: npt.ArrayLike, window_s: float = 600.0,
                    period_s: float = 1.0) -> tuple[F64, F64]:
    """Moving RMS mean over ``window_s`` of regularly spaced values, full windows only.

    A window ends at each value's time and holds the values in ``(t - window_s, t]``; it is
    kept only when all ``window_s / period_s`` values are present. Returns (t_end [s], mean [V]).
    """
    t = as_f64(t_utc).ravel()
    v = as_f64(values_v).ravel()
    if t.shape != v.shape:
        raise ValueError("t_utc and values_v must have the same length")
    good = np.isfinite(v) & np.isfinite(t)
    t, v = t[good], v[good]
    need = round(window_s / period_s)
    if t.size < need or need < 1:
        return np.empty(0), np.empty(0)
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    csum = np.concatenate([[0.0], np.cumsum(v * v)])
    first = np.searchsorted(t, t - window_s + 0.5 * period_s, side="left")
    count = np.arange(t.size) + 1 - first
    idx = np.nonzero(count == need)[0]
    return t[idx], np.sqrt((csum[idx + 1] - csum[first[idx]]) / need)


def runs(t_utc: npt.ArrayLike, mask: npt.ArrayLike, period_s: float) -> list[tuple[int, int]]:
    """Index ranges ``[i, j)`` of consecutive True values whose times are contiguous
    (a gap in time longer than 1.5 periods, or a False, ends a run). Vectorised: one pass of
    numpy over the whole array."""
    t = as_f64(t_utc).ravel()
    m = np.asarray(mask, bool).ravel()
    if not m.any():
        return []
    # A run starts at a True whose predecessor is False or lies more than 1.5 periods back.
    gap = np.ones(t.size, bool)
    gap[1:] = np.diff(t) > 1.5 * period_s
    starts = np.nonzero(m & (gap | ~np.r_[False, m[:-1]]))[0]
    # It ends after a True whose successor is False or lies more than 1.5 periods ahead.
    nxt_gap = np.r_[gap[1:], True]
    ends = np.nonzero(m & (nxt_gap | ~np.r_[m[1:], False]))[0] + 1
    return list(zip(starts.tolist(), ends.tolist(), strict=True))


def week_start(t_utc: float) -> float:
    """Start [s UTC] of the calendar week (Monday 00:00 UTC, ISO 8601) holding ``t_utc``."""
    return float(np.floor((t_utc - _MONDAY0) / WEEK_S) * WEEK_S + _MONDAY0)


def iso_week(t_utc: float) -> str:
    y, w, _ = datetime.fromtimestamp(t_utc, tz=UTC).isocalendar()
    return f"{y}-W{w:02d}"


def per_day(t_utc: npt.ArrayLike, values: npt.ArrayLike
            ) -> dict[str, tuple[int, float, float, int]]:
    """Per UTC day of the finite values: (count, min, max, day start index) keyed by ISO date;
    vectorised (one sort), so a month of per-second values costs one numpy pass."""
    t = as_f64(t_utc).ravel()
    v = as_f64(values).ravel()
    ok = np.isfinite(t) & np.isfinite(v)
    t, v = t[ok], v[ok]
    if not t.size:
        return {}
    day = np.floor(t / 86400.0).astype(np.int64)
    days, inv = np.unique(day, return_inverse=True)
    count = np.bincount(inv, minlength=days.size)
    lo = np.full(days.size, np.inf)
    hi = np.full(days.size, -np.inf)
    np.minimum.at(lo, inv, v)
    np.maximum.at(hi, inv, v)
    return {day_key(float(d) * 86400.0): (int(c), float(a), float(b), int(d))
            for d, c, a, b in zip(days, count, lo, hi, strict=True)}


def day_key(t_utc: float) -> str:
    return datetime.fromtimestamp(float(t_utc), tz=UTC).date().isoformat()


def percentiles(values: npt.ArrayLike, qs: tuple[float, ...]) -> dict[str, Any]:
    """``{"p1": ...}`` of the finite values (linear interpolation, numpy's default)."""
    v = as_f64(values).ravel()
    v = v[np.isfinite(v)]
    if not v.size:
        return {f"p{q:g}": None for q in qs}
    got = np.percentile(v, qs)
    return {f"p{q:g}": round(float(x), 3) for q, x in zip(qs, got, strict=True)}
