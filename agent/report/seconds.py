"""What one home's verdicts read of its per-second values: the store's 10-min rollups where
they suffice, the seconds themselves only where a verdict needs them one by one.

Most of a week's answers are sums and extremes over 10-min intervals (seconds measured and
flagged, the highest value per day, 10-s frequency means against the EN 50160 bands, the
imbalance RMS), which the collector keeps per interval at commit time
(:func:`agent.store.trend.rollup`, :func:`agent.store.trend.unit_rollup`). Three answers need
runs of single seconds: ANSI C84.1 excursions outside Range A longer than a minute, IEEE
1547 sustained trips, seconds above the overvoltage level. A run of seconds beyond a limit
lies wholly in intervals whose extremes pass that limit, so only those intervals are read
and decoded (:func:`needs_seconds` picks them); the runs found are exactly the runs in all
seconds. Intervals cut by the period's ends, and those whose 10-s frequency means were left
open at commit time, are read too.

:func:`from_seconds` builds the same :class:`Seconds` from every second (the way for a home
without stored 10-min aggregates, or an averaging window other than 10 min), reducing them
with the same rollup functions, so both ways give one answer (tests/test_report_rollups.py).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.store.recorder import UNIT_COLUMNS, RecorderStore, unit_row_values
from agent.store.trend import ROLLUP_FIELDS, SPANS, TrendChunk, rollup, unit_rollup
from agent.verdicts.series import day_key
from agent.wire.records import FLAG_EVENT

F64 = npt.NDArray[np.float64]
Arrays = dict[str, np.ndarray]
#: The rollup interval [s].
SPAN_S = SPANS[0]
#: Per-channel rollup columns the report reads.
CHANNEL_COLUMNS = ("t_utc", "channel", "seconds", "flagged", "sum_v", "sum_sq_v2", "min_v",
                   "max_v", "low_v", "peak_v")
#: Share of a 10-min interval's seconds a mean needs (as
#: :func:`agent.verdicts.series.window_means`; common practice).
MIN_COVERAGE = 0.99


@dataclass(frozen=True)
class Seconds:
    """One home's per-second values as the verdicts read them.

    ``arrays``: per-second ``t``, ``mean``, ``peak``, ``low``, ``flagged``, ``hz``, ``thd``,
    ``imbalance`` (time order) of every second (``complete``) or of the intervals that need
    them; None when the home has no measured second in the period. ``channel``/``unit``:
    column arrays of the 10-min rollups (per channel, per unit) over the whole period.
    ``decoded``: seconds read one by one; ``errors``: stored rows that could not be read.
    """

    arrays: Arrays | None
    complete: bool
    channel: Arrays
    unit: Arrays
    decoded: int
    errors: int = 0

    @property
    def seconds(self) -> int:
        """Measured seconds in the period (any channel)."""
        return int(self.unit["seconds"].sum())

    @property
    def flagged(self) -> int:
        return int(self.unit["flagged"].sum())

    @property
    def channels(self) -> int:
        ch = self.channel["channel"]
        return int(ch.max()) + 1 if ch.size else 0

    def max_per_day(self) -> dict[str, float]:
        """Highest per-second mean or Urms(1/2) maximum [V] per UTC day, any channel."""
        high = np.fmax(self.channel["max_v"], self.channel["peak_v"])
        ok = np.isfinite(high)
        day = np.floor(self.channel["t_utc"][ok] / 86400.0)
        days, inv = np.unique(day, return_inverse=True)
        top = np.full(days.size, -np.inf)
        np.maximum.at(top, inv, high[ok])
        return {day_key(float(d) * 86400.0): float(v) for d, v in zip(days, top, strict=True)}

    def frequency(self, nominal_hz: float) -> dict[str, Any] | None:
        """Additive counts of the 10-s frequency means for ``nominal_hz`` (50 or 60), as
        :func:`agent.verdicts.supply.frequency_from_counts` takes them; None when the home
        has no frequency value."""
        u = self.unit
        if not u["hz_n"].sum():
            return None
        tag = "50" if nominal_hz == 50.0 else "60"
        made = u["f10_n"] > 0
        return {"n": int(u["f10_n"].sum()), "inside": int(u[f"f10_in_{tag}"].sum()),
                "outside_all": int(u[f"f10_out_{tag}"].sum()),
                "t_first": float(u["f10_first"][made].min()) if made.any() else None,
                "t_last": float(u["f10_last"][made].max()) if made.any() else None,
                "min_hz": float(u["f10_min"][made].min()) if made.any() else None,
                "max_hz": float(u["f10_max"][made].max()) if made.any() else None}

    def imbalance_means(self) -> tuple[F64, F64] | None:
        """10-min RMS means of the per-second imbalance (intervals with at least
        :data:`MIN_COVERAGE` of their seconds); None when the home has no imbalance value."""
        u = self.unit
        if not u["imb_n"].sum():
            return None
        keep = u["imb_n"] >= MIN_COVERAGE * SPAN_S
        return u["t_utc"][keep], np.sqrt(u["imb_sq"][keep] / u["imb_n"][keep])


def _chunk(a: Arrays) -> TrendChunk:
    """Per-second arrays back as a chunk for the rollup functions."""
    n = a["t"].size
    return TrendChunk(t=a["t"], rms_min=a["low"], rms_mean=a["mean"], rms_max=a["peak"],
                      thd=a["thd"], hz=a["hz"], imbalance=a["imbalance"],
                      flags=np.where(a["flagged"], FLAG_EVENT, 0).astype(np.int64),
                      present=np.ones(n, bool))


def _empty_columns(cols: Iterable[str]) -> Arrays:
    return {c: np.empty(0) for c in cols}


def reduce_seconds(a: Arrays | None) -> tuple[Arrays, Arrays]:
    """The 10-min rollups (per channel, per unit) of per-second arrays holding every second
    of their intervals, as column arrays (the same functions the collector runs at commit)."""
    if a is None or not a["t"].size:
        return _empty_columns(CHANNEL_COLUMNS), _empty_columns(("t_utc", *UNIT_COLUMNS))
    chunk = _chunk(a)
    rows = [(r.t_utc, r.channel, r.seconds, r.flagged, r.sum_v, r.sum_sq_v2,
             np.nan if r.min_v is None else r.min_v, np.nan if r.max_v is None else r.max_v,
             np.nan if r.low_v is None else r.low_v, np.nan if r.peak_v is None else r.peak_v)
            for r in rollup(chunk, None)]
    units = [(u.t_utc, *[np.nan if x is None else x for x in unit_row_values(u)])
             for u in unit_rollup(chunk, final=True)]
    ch = np.array(rows, dtype=np.float64).reshape(-1, len(CHANNEL_COLUMNS))
    un = np.array(units, dtype=np.float64).reshape(-1, 1 + len(UNIT_COLUMNS))
    return ({c: ch[:, i] for i, c in enumerate(CHANNEL_COLUMNS)},
            {c: un[:, i] for i, c in enumerate(("t_utc", *UNIT_COLUMNS))})


class _Collect:
    """Decoded chunks of one home gathered into per-second arrays (time order)."""

    FIELDS = ("t", "mean", "peak", "low", "flagged", "hz", "thd", "imbalance")

    def __init__(self) -> None:
        self.parts: dict[str, list[np.ndarray]] = {k: [] for k in self.FIELDS}
        self.errors = 0

    def add(self, c: TrendChunk) -> None:
        self.errors += c.errors  # counted and shown; one bad row does not hide the rest
        keep = c.present
        for name, arr in (("t", c.t), ("mean", c.rms_mean), ("peak", c.rms_max),
                          ("low", c.rms_min), ("flagged", (c.flags & FLAG_EVENT) != 0),
                          ("hz", c.hz), ("thd", c.thd), ("imbalance", c.imbalance)):
            self.parts[name].append(arr[keep])

    def arrays(self, width: int = 0) -> Arrays | None:
        if not sum(x.size for x in self.parts["t"]):
            return None
        width = max(width, *(x.shape[1] for x in self.parts["mean"]))
        out = {}
        for name, chunks in self.parts.items():
            if chunks[0].ndim == 2:  # channel counts may differ between rows: pad with NaN
                chunks = [c if c.shape[1] == width else np.pad(
                    c, ((0, 0), (0, width - c.shape[1])), constant_values=np.nan)
                    for c in chunks]
            out[name] = np.concatenate(chunks)
        t = out["t"]
        if t.size > 1 and not (t[1:] >= t[:-1]).all():
            order = np.argsort(t, kind="stable")
            out = {k: v[order] for k, v in out.items()}
        return out


def from_seconds(store: RecorderStore, device: str, start_utc: float | None,
                 end_utc: float | None) -> Seconds:
    """Every second of ``device`` in ``[start_utc, end_utc)``, and its rollups reduced
    from them."""
    got = _Collect()
    for chunk in store.trend_seconds(device, start_utc, end_utc):
        got.add(chunk)
    return every_second(got.arrays(), got.errors)


def every_second(arrays: Arrays | None, errors: int = 0) -> Seconds:
    """:class:`Seconds` of per-second arrays that hold every second of the period (keys as
    :attr:`Seconds.arrays`; ``peak``/``low`` default to ``mean``)."""
    if arrays is not None:
        arrays = {**arrays, "peak": arrays.get("peak", arrays["mean"]),
                  "low": arrays.get("low", arrays["mean"])}
    ch, un = reduce_seconds(arrays)
    return Seconds(arrays, True, ch, un, 0 if arrays is None else int(arrays["t"].size),
                   errors)


@dataclass(frozen=True)
class Limits:
    """The limits [V] whose runs of single seconds a home's verdicts count.

    ``low_v``/``high_v``: the nearest of the trip settings and the overvoltage level (every
    second beyond them is needed one by one); ``peak_high_v``: the Urms(1/2) maximum level;
    ``band_low_v``/``band_high_v``: a band whose excursions are only listed as runs (ANSI
    C84.1 Range A), or None; ``stand_ins``: whole intervals beyond that band may be stood in
    for (False when the band is the narrowest of several candidate bands: a wider one
    would need their seconds).
    """

    low_v: float
    high_v: float
    peak_high_v: float
    band_low_v: float | None = None
    band_high_v: float | None = None
    stand_ins: bool = True


def plan(c: Arrays, u: Arrays, limits: Limits) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Which 10-min intervals to read one second at a time, from their rollups.

    Returns (interval starts [s] to read, interval starts whose every second lies beyond
    the band on one side and nowhere beyond the other limits, the value per channel [V] that
    stands for them). Such an interval cannot end or break a run, nor count towards a trip or
    the overvoltage level: its 600 seconds are stood in for by that value (the channel's
    extreme on that side), which gives the same runs, extremes and sides as its seconds.
    """
    if not c["t_utc"].size:
        return np.empty(0), np.empty(0), np.empty((0, 0))
    starts, row = np.unique(c["t_utc"], return_inverse=True)
    m = starts.size
    width = int(c["channel"].max()) + 1
    grid = {k: np.full((m, width), np.nan) for k in ("min_v", "max_v", "peak_v", "seconds")}
    for k in grid:
        grid[k][row, c["channel"].astype(np.int64)] = c[k]
    lo, hi, pk, n = grid["min_v"], grid["max_v"], grid["peak_v"], grid["seconds"]
    with np.errstate(invalid="ignore"):
        other = ((lo < limits.low_v) | (hi > limits.high_v) | (pk > limits.peak_high_v)).any(1)
        if limits.band_low_v is None or limits.band_high_v is None:
            return starts[other], np.empty(0), np.empty((0, width))
        a_lo, a_hi = limits.band_low_v, limits.band_high_v
        band = ((lo < a_lo) | (hi > a_hi)).any(axis=1)
        whole = n == SPAN_S
        all_high = ((lo > a_hi) & whole).any(axis=1) & (lo >= a_lo).all(axis=1)
        all_low = ((hi < a_lo) & whole).any(axis=1) & (hi <= a_hi).all(axis=1)
    unit_whole = np.isin(starts, u["t_utc"][u["seconds"] == SPAN_S])
    stand_in = band & ~other & (all_high | all_low) & unit_whole & limits.stand_ins
    value = np.where(all_high[:, None], hi, lo)
    return starts[(other | band) & ~stand_in], starts[stand_in], value[stand_in]


def _ranges(starts: np.ndarray) -> list[tuple[float, float]]:
    """Sorted interval starts merged into ``[a, b)`` ranges of consecutive intervals."""
    out: list[tuple[float, float]] = []
    for t in np.unique(starts):
        a = float(t)
        if out and out[-1][1] == a:
            out[-1] = (out[-1][0], a + SPAN_S)
        else:
            out.append((a, a + SPAN_S))
    return out


def from_rollups(store: RecorderStore, device: str, start_utc: float | None,
                 end_utc: float | None, limits: Limits) -> Seconds:
    """The home's rollups over ``[start_utc, end_utc)``, with the seconds of the intervals
    :func:`plan` picks (and of those cut by the period's ends or with open 10-s frequency
    means) read, decoded and reduced again, exactly."""
    first = None if start_utc is None else math.floor(start_utc / SPAN_S) * SPAN_S
    ch, un = store.interval_rollups(device, first, end_utc)
    picked, whole_t, whole_v = plan(ch, un, limits)
    read = set(picked.tolist())
    read |= set(un["t_utc"][un["f10_open"] > 0].tolist())
    read |= set(ch["t_utc"].tolist()) - set(un["t_utc"].tolist())  # no unit row: read them
    # Intervals cut by the period's ends: only their seconds inside the period count.
    edges = {math.floor(e / SPAN_S) * SPAN_S for e in (start_utc, end_utc)
             if e is not None and e % SPAN_S}
    read |= edges
    stand_in = ~np.isin(whole_t, np.array(sorted(read), dtype=np.float64))
    whole_t, whole_v = whole_t[stand_in], whole_v[stand_in]
    got = _Collect()
    ranges = []
    for a, b in _ranges(np.array(sorted(read))):
        lo = a if start_utc is None else max(a, start_utc)
        hi = b if end_utc is None else min(b, end_utc)
        if lo < hi:
            ranges.append((lo, hi))
    # THD is judged on the 10-min aggregates here: its per-second arrays stay packed.
    for chunk in store.trend_in_ranges(device, ranges, fields=ROLLUP_FIELDS):
        got.add(chunk)
    width = int(ch["channel"].max()) + 1 if ch["channel"].size else 0
    arrays = got.arrays(width)
    # The intervals read take their rollups from the seconds themselves; one read but with
    # no stored second (trend not kept) keeps its stored rollups, unless the period cuts it.
    rch, run = reduce_seconds(arrays)
    done = np.union1d(run["t_utc"], np.array(sorted(edges), dtype=np.float64))
    if done.size:
        ch = _merge(ch, rch, done)
        un = _merge(un, run, done)
    decoded = 0 if arrays is None else int(arrays["t"].size)
    if whole_t.size:
        arrays = _with_stand_ins(arrays, whole_t, whole_v, width)
    if arrays is None and un["t_utc"].size and un["seconds"].sum() > 0:
        arrays = _no_seconds(width)  # measured, but no second needed one by one
    return Seconds(arrays, False, ch, un, decoded, got.errors)


def _with_stand_ins(arrays: Arrays | None, starts: np.ndarray, values: np.ndarray,
                    width: int) -> Arrays:
    """Per-second arrays with each whole interval of ``starts`` added as 600 seconds of its
    stand-in ``values`` (per channel), in time order."""
    w = max(width, values.shape[1])
    t = (starts[:, None] + np.arange(SPAN_S, dtype=np.float64)).ravel()
    v = np.repeat(values, SPAN_S, axis=0)
    v = np.pad(v, ((0, 0), (0, w - v.shape[1])), constant_values=np.nan)
    extra = {"t": t, "mean": v, "peak": v, "low": v, "flagged": np.zeros(t.size, bool),
             "hz": np.full(t.size, np.nan), "thd": np.full(v.shape, np.nan),
             "imbalance": np.full(t.size, np.nan)}
    if arrays is None:
        return extra
    out = {}
    for k, a in arrays.items():
        b = extra[k]
        if a.ndim == 2 and a.shape[1] != b.shape[1]:
            wide = max(a.shape[1], b.shape[1])
            a = np.pad(a, ((0, 0), (0, wide - a.shape[1])), constant_values=np.nan)
            b = np.pad(b, ((0, 0), (0, wide - b.shape[1])), constant_values=np.nan)
        out[k] = np.concatenate([a, b])
    order = np.argsort(out["t"], kind="stable")
    return {k: v[order] for k, v in out.items()}


def _merge(stored: Arrays, fresh: Arrays, done: np.ndarray) -> Arrays:
    """Stored rollup rows outside ``done`` (interval starts) and the fresh rows, by time."""
    keep = ~np.isin(stored["t_utc"], done)
    out = {k: np.concatenate([stored[k][keep], fresh[k]]) for k in stored}
    keys = (out["channel"], out["t_utc"]) if "channel" in out else (out["t_utc"],)
    order = np.lexsort(keys)
    return {k: v[order] for k, v in out.items()}


def _no_seconds(width: int) -> Arrays:
    w = max(width, 1)
    return {"t": np.empty(0), "mean": np.empty((0, w)), "peak": np.empty((0, w)),
            "low": np.empty((0, w)), "flagged": np.empty(0, bool), "hz": np.empty(0),
            "thd": np.empty((0, w)), "imbalance": np.empty(0)}


__all__ = ["Limits", "Seconds", "every_second", "from_rollups", "from_seconds", "plan",
           "reduce_seconds"]
