"""Per-second trend as the store keeps it: each summary's packed arrays as received (msgpack),
decoded many rows at a time into numpy arrays, and the per-interval rollups computed from them
at commit time.

A stored trend row is the summary message without its envelope (``device``, ``site``,
``epoch`` and ``seq`` are columns of the row), msgpack-encoded: the delta-coded, bit-packed
arrays stay as the edge packed them (about a tenth of the same seconds as JSON text).

:func:`decode_rows` turns a run of rows into one :class:`TrendChunk`: the headers of all
packed arrays are read in Python, the bit streams are decoded together by
:func:`agent.wire.packing.unpack_units_many` (one numpy pass per field), giving exactly the
values :func:`agent.wire.codec.summary_arrays` gives row by row.

:func:`rollup` reduces a chunk to per-interval counts, extremes and sums per channel (the
figures a verdict over a period needs without reading every second).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import msgpack
import numpy as np
import numpy.typing as npt

from agent.verdicts.supply import FREQ_ALL, FREQ_BAND
from agent.wire.packing import MAX_WIDTH, _gather_bits
from agent.wire.records import FLAG_EVENT

F64 = npt.NDArray[np.float64]
I64 = npt.NDArray[np.int64]
BOOL = npt.NDArray[np.bool_]

#: Envelope fields kept as columns of the trend row, not inside its packed body.
ROW_COLUMNS = ("device", "site", "epoch", "seq")
_PER_CHANNEL = ("rms_min", "rms_mean", "rms_max", "thd")
_SINGLE = ("hz", "imbalance", "flags")
#: Thresholds of the rollup counts [pu of the unit's nominal]: below the first three, above
#: the last two (IEEE 1159 sag 0.9 / swell 1.1; ANSI C84.1-style +-5 %; 0.85 as a deep band;
#: common practice for histogram edges).
LOW_PU = (0.85, 0.90, 0.95)
HIGH_PU = (1.05, 1.10)
#: Rollup span kept at commit time [s]: the 10-min interval (IEC 61000-4-30 aggregation
#: interval). Longer spans (UTC days) are folded from these rows when read (:func:`fold`).
SPANS = (600,)


def _plain(value: Any) -> Any:
    if hasattr(value, "tolist"):  # numpy arrays and scalars from in-process callers
        return value.tolist()
    if isinstance(value, tuple | set | frozenset):
        return list(value)
    raise TypeError(f"cannot store {type(value).__name__} in a trend row")


def pack_row(message: Mapping[str, Any]) -> bytes:
    """The stored form of one summary message: its body (no envelope ids) as msgpack."""
    body = {k: v for k, v in message.items() if k not in ROW_COLUMNS}
    packed: bytes = msgpack.packb(body, use_bin_type=True, default=_plain)
    return packed


def unpack_row(data: bytes, device: str, site: str, epoch: str, seq: int) -> dict[str, Any]:
    """The summary message of a stored row, envelope restored."""
    body = msgpack.unpackb(bytes(data), raw=False, strict_map_key=False)
    if not isinstance(body, dict):
        raise ValueError("a trend row must hold a map")
    return {**body, "device": device, "site": site, "epoch": epoch, "seq": seq}


@dataclass
class TrendChunk:
    """Per-second values of consecutive stored summaries of one device, in row order.

    ``t`` [s UTC] (m,); ``rms_min``, ``rms_mean``, ``rms_max`` [V] and ``thd`` [fraction]
    (m, channels); ``hz`` [Hz], ``imbalance`` [fraction], ``flags`` (int) (m,); ``present``:
    the second was measured (its flags value is not missing). Missing values are NaN.
    ``errors``: rows that could not be decoded (counted, left out).
    """

    t: F64
    rms_min: F64
    rms_mean: F64
    rms_max: F64
    thd: F64
    hz: F64
    imbalance: F64
    flags: I64
    present: BOOL
    errors: int = 0

    @property
    def size(self) -> int:
        return int(self.t.size)


def _physical(units: I64, missing: BOOL, exps: I64) -> F64:
    """:func:`agent.wire.packing.to_physical` row-wise with one exponent per row."""
    neg = exps < 0
    div = np.where(neg, 10.0 ** np.where(neg, -exps, 0), 1.0)[:, None]
    mul = np.where(neg, 1.0, 10.0 ** np.where(neg, 0, exps))[:, None]
    out = np.where(neg[:, None], units / div, units * mul)
    out[missing] = np.nan
    return out


def _units_many(arrays: Sequence[Sequence[Any]], n: int) -> tuple[I64, BOOL, I64]:
    """Units, missing masks and exponents of stored packed arrays of ``n`` values each.

    The rows were validated against the schema when they arrived, so only what keeps the
    bit gather inside its buffer is checked here (stream and mask lengths, width range), with
    the headers read column-wise; the full checks are
    :func:`agent.wire.packing.unpack_units_many`'s.
    """
    count = n - 1
    rows = len(arrays)
    exps, firsts, widths, datas = zip(*[a[:4] for a in arrays], strict=True)
    head = np.array([widths, firsts], dtype=np.int64)
    width = head[0]
    lengths = np.fromiter(map(len, datas), dtype=np.int64, count=rows)
    if ((width < 0) | (width > MAX_WIDTH)).any() or (lengths != (count * width + 7) // 8).any():
        raise ValueError("a packed array is malformed")
    buf = b"".join(datas)  # TypeError for anything but bytes
    units = np.empty((rows, n), dtype=np.int64)
    missing = np.zeros((rows, n), dtype=bool)
    units[:, 0] = head[1]
    if count and rows:
        starts = 8 * (np.cumsum(lengths) - lengths)
        z = _gather_bits(buf, starts[:, None], width[:, None], count)
        np.cumsum((z >> 1) ^ -(z & 1), axis=1, out=units[:, 1:])  # unzigzag, then sum
        units[:, 1:] += head[1][:, None]
    mask_rows = [i for i, a in enumerate(arrays) if len(a) > 4]
    if mask_rows:
        masks = [arrays[i][4] for i in mask_rows]
        if any(type(m) is not bytes or len(m) != (n + 7) // 8 for m in masks):
            raise ValueError("a packed array has a malformed mask")
        stacked = np.frombuffer(b"".join(masks), dtype=np.uint8).reshape(len(masks), -1)
        missing[mask_rows] = np.unpackbits(stacked, axis=1, count=n, bitorder="little")
    return units, missing, np.array(exps, dtype=np.int64)


def _decode_group(bodies: Sequence[Mapping[str, Any]], n: int, nch: int,
                  fields: frozenset[str]) -> dict[str, Any]:
    """Arrays of summaries that share ``n`` and channel count, decoded together (fields not
    in ``fields`` are left NaN)."""
    rows = len(bodies)
    out: dict[str, Any] = {}
    for name in (*_PER_CHANNEL, *_SINGLE):
        width = nch if name in _PER_CHANNEL else 1
        values = np.full((rows * width, n), np.nan)
        if name in fields:
            # Every (row, channel) array in order; None where the edge sent none.
            flat = ([a for b in bodies for a in b[name]] if name in _PER_CHANNEL
                    else [b[name] for b in bodies])
            if len(flat) != rows * width:
                raise ValueError(f"{name}: arrays do not match {width} channels")
            where = [i for i, a in enumerate(flat) if a is not None]
            if where:
                packed = flat if len(where) == len(flat) else [flat[i] for i in where]
                units, missing, exps = _units_many(packed, n)
                values[where] = _physical(units, missing, exps)
        # (rows, width, n) -> (rows * n, width): row after row, second after second.
        out[name] = values.reshape(rows, width, n).transpose(0, 2, 1).reshape(rows * n, width)
    t0 = np.array([float(b["t0"]) for b in bodies])
    period = np.array([float(b["period_s"]) for b in bodies])
    out["t"] = (t0[:, None] + period[:, None] * np.arange(n, dtype=np.float64)).ravel()
    return out


#: Every per-second field of a summary; :func:`decode_rows` may be asked for fewer.
ALL_FIELDS = frozenset((*_PER_CHANNEL, *_SINGLE))
#: What the voltage figures need (RMS and flags): thd, hz and imbalance stay packed.
VOLTAGE_FIELDS = frozenset(("rms_min", "rms_mean", "rms_max", "flags"))
#: What the commit-time rollups read: the voltage figures, frequency and imbalance.
ROLLUP_FIELDS = VOLTAGE_FIELDS | {"hz", "imbalance"}


def decode_rows(bodies: Iterable[Mapping[str, Any] | None],
                fields: frozenset[str] = ALL_FIELDS) -> TrendChunk:
    """One chunk from stored summary bodies (None for a row that could not be unpacked);
    fields not in ``fields`` are NaN (``flags`` is always decoded: it marks presence).

    Rows are decoded in groups of equal length and channel count; a group that fails is
    decoded row by row so one bad row costs only itself (counted in ``errors``).
    """
    items = list(bodies)
    fields = fields | {"flags"}
    errors = 0
    good: list[tuple[int, Mapping[str, Any]]] = []
    for i, b in enumerate(items):
        try:
            if b is None:
                raise ValueError("unreadable")
            key = (int(b["n"]), len(b["channels"]))
            if key[0] < 1 or key[1] < 1:
                raise ValueError("empty summary")
            good.append((i, b))
        except (KeyError, TypeError, ValueError):
            errors += 1
    nch = max((len(b["channels"]) for _, b in good), default=1)
    parts: list[tuple[int, dict[str, Any]]] = []
    groups: dict[tuple[int, int], list[tuple[int, Mapping[str, Any]]]] = {}
    for i, b in good:
        groups.setdefault((int(b["n"]), len(b["channels"])), []).append((i, b))
    for (n, ch), members in groups.items():
        try:
            part = _decode_group([b for _, b in members], n, ch, fields)
            parts.append((members[0][0], part | {"_rows": [i for i, _ in members], "_n": n}))
        except Exception:
            for i, b in members:
                try:
                    parts.append((i, _decode_group([b], n, ch, fields)
                                  | {"_rows": [i], "_n": n}))
                except Exception:
                    errors += 1
    return _assemble(parts, nch, errors)


def _assemble(parts: list[tuple[int, dict[str, Any]]], nch: int, errors: int) -> TrendChunk:
    if not parts:
        empty = np.empty((0, nch))
        return TrendChunk(np.empty(0), empty, empty.copy(), empty.copy(), empty.copy(),
                          np.empty(0), np.empty(0), np.empty(0, dtype=np.int64),
                          np.empty(0, dtype=bool), errors)
    if len(parts) > 1:
        # Split each part into its rows and put every row back in stored order.
        pieces: list[tuple[int, dict[str, Any]]] = []
        for _, part in parts:
            n = part["_n"]
            for k, r in enumerate(part["_rows"]):
                pieces.append((r, {name: v[k * n:(k + 1) * n] for name, v in part.items()
                                   if not name.startswith("_")}))
        pieces.sort(key=lambda p: p[0])
        parts = pieces

    def cat(name: str, width: int | None) -> F64:
        arrays = []
        for _, part in parts:
            v = part[name]
            if width is not None and v.shape[1] < width:
                v = np.concatenate([v, np.full((v.shape[0], width - v.shape[1]), np.nan)], 1)
            arrays.append(v if width is not None else v.reshape(-1))
        return np.concatenate(arrays)

    flags_f = cat("flags", None)
    present = ~np.isnan(flags_f)
    return TrendChunk(
        t=cat("t", None), rms_min=cat("rms_min", nch), rms_mean=cat("rms_mean", nch),
        rms_max=cat("rms_max", nch), thd=cat("thd", nch), hz=cat("hz", None),
        imbalance=cat("imbalance", None),
        flags=np.where(present, flags_f, 0).astype(np.int64), present=present, errors=errors)


def select(chunk: TrendChunk, keep: BOOL) -> TrendChunk:
    """The seconds of ``chunk`` where ``keep`` (a boolean mask over its seconds)."""
    return TrendChunk(t=chunk.t[keep], rms_min=chunk.rms_min[keep],
                      rms_mean=chunk.rms_mean[keep], rms_max=chunk.rms_max[keep],
                      thd=chunk.thd[keep], hz=chunk.hz[keep], imbalance=chunk.imbalance[keep],
                      flags=chunk.flags[keep], present=chunk.present[keep], errors=chunk.errors)


# --- rollups ----------------------------------------------------------------------------------


@dataclass(frozen=True)
class RollupRow:
    """Counts, extremes and sums of one channel's per-second values over one interval.

    ``t_utc`` [s UTC] interval start, ``span_s`` [s] its length; ``seconds``: measured seconds
    with a value on this channel; ``flagged``: of those, seconds flagged by an RMS event;
    ``sum_v``/``sum_sq_v2`` [V, V^2]: sums of the per-second means (for means and RMS);
    ``min_v``/``max_v`` [V]: extremes of the per-second means; ``low_v``/``peak_v`` [V]: lowest
    Urms(1/2) minimum and highest maximum; ``below``/``above``: seconds whose mean is below
    each of :data:`LOW_PU` / above each of :data:`HIGH_PU` times ``nominal_v`` (None when the
    unit's nominal was unknown at commit time).
    """

    t_utc: float
    span_s: int
    channel: int
    seconds: int
    flagged: int
    sum_v: float
    sum_sq_v2: float
    min_v: float | None
    max_v: float | None
    low_v: float | None
    peak_v: float | None
    nominal_v: float | None
    below: tuple[int, ...] | None
    above: tuple[int, ...] | None


def _opt(x: float) -> float | None:
    return None if not np.isfinite(x) else float(x)


def rollup(chunk: TrendChunk, nominal_v: float | None,
           spans: Sequence[int] = SPANS) -> list[RollupRow]:
    """Per-channel rollups of a chunk's measured seconds, one row per (span, interval,
    channel) that holds at least one second (vectorised: one sort, then ``ufunc.reduceat``).

    References
    ----------
    IEC 61000-4-30 Ed.3 cl. 4.5 (10-min aggregation intervals); thresholds: IEEE 1159-2019
    (0.9 / 1.1 pu), the rest common practice.
    """
    keep = chunk.present
    t = chunk.t[keep]
    out: list[RollupRow] = []
    if t.size == 0:
        return out
    mean, low, high = chunk.rms_mean[keep], chunk.rms_min[keep], chunk.rms_max[keep]
    flagged = (chunk.flags[keep] & FLAG_EVENT) != 0
    add, fmin, fmax = np.add.reduceat, np.fmin.reduceat, np.fmax.reduceat
    for span in spans:
        slot = np.floor(t / span).astype(np.int64)
        order = np.argsort(slot, kind="stable")
        slot = slot[order]
        starts = np.flatnonzero(np.r_[True, slot[1:] != slot[:-1]])
        for c in range(mean.shape[1]):
            v, lv, hv = mean[order, c], low[order, c], high[order, c]
            has = np.isfinite(v)
            vv = np.where(has, v, 0.0)
            seconds = add(has.astype(np.int64), starts)
            fl = add((has & flagged[order]).astype(np.int64), starts)
            s1, s2 = add(vv, starts), add(vv * vv, starts)
            mn, mx, lo, pk = fmin(v, starts), fmax(v, starts), fmin(lv, starts), fmax(hv, starts)
            if nominal_v:
                below = [add((has & (vv < p * nominal_v)).astype(np.int64), starts)
                         for p in LOW_PU]
                above = [add((vv > p * nominal_v).astype(np.int64), starts) for p in HIGH_PU]
            for j, first in enumerate(starts):
                if seconds[j] == 0 and not np.isfinite(lo[j]) and not np.isfinite(pk[j]):
                    continue
                out.append(RollupRow(
                    t_utc=float(slot[first] * span), span_s=int(span), channel=c,
                    seconds=int(seconds[j]), flagged=int(fl[j]), sum_v=float(s1[j]),
                    sum_sq_v2=float(s2[j]), min_v=_opt(mn[j]), max_v=_opt(mx[j]),
                    low_v=_opt(lo[j]), peak_v=_opt(pk[j]),
                    nominal_v=float(nominal_v) if nominal_v else None,
                    below=tuple(int(b[j]) for b in below) if nominal_v else None,
                    above=tuple(int(a[j]) for a in above) if nominal_v else None))
    return out


#: Nominal frequencies whose EN 50160 band counts a unit rollup keeps [Hz].
NOMINAL_HZ = (50.0, 60.0)
#: A 10-s frequency mean needs this many of its ten seconds (as
#: :func:`agent.verdicts.supply.ten_second_means`).
TEN_S_MIN_VALUES = 9


@dataclass(frozen=True)
class UnitRollupRow:
    """What one unit's seconds in one 10-min interval give, channel by channel apart.

    ``t_utc`` [s UTC] interval start; ``seconds``: measured seconds (any channel);
    ``flagged``: of those, flagged by an RMS event; ``hz_n``: seconds with a frequency;
    ``f10_n``: clock-aligned 10-s frequency means formed (at least nine of ten seconds);
    ``f10_in`` / ``f10_out``: of those, inside EN 50160's +-1 % band / outside its +4/-6 %
    band, per nominal of :data:`NOMINAL_HZ`; ``f10_min``/``f10_max`` [Hz] their extremes;
    ``f10_first``/``f10_last`` [s UTC] the first and last such 10-s interval; ``f10_open``:
    10-s intervals whose seconds may still be arriving (fewer than ten here, at commit time:
    the report reads such an interval's seconds itself); ``imb_n``/``imb_sq``: seconds with
    an imbalance value and the sum of its squares (10-min RMS means).
    """

    t_utc: float
    seconds: int
    flagged: int
    hz_n: int
    f10_n: int
    f10_in: tuple[int, ...]
    f10_out: tuple[int, ...]
    f10_min: float | None
    f10_max: float | None
    f10_first: float | None
    f10_last: float | None
    f10_open: int
    imb_n: int
    imb_sq: float


def unit_rollup(chunk: TrendChunk, *, final: bool = False,
                span_s: int = 600) -> list[UnitRollupRow]:
    """Per-interval figures of a chunk that do not belong to one channel: measured and
    flagged seconds, 10-s frequency means against the EN 50160 bands, imbalance sums.

    ``final``: the chunk holds every second of its intervals (a report's own read), so a 10-s
    interval with nine seconds makes a mean; at commit time (``final`` False) only ten
    seconds make a mean there and then, fewer leave the 10-s interval open (its other seconds
    may come in another batch).

    References
    ----------
    EN 50160 power frequency (10-s means, +-1 % / +4 %/-6 %); IEC 61000-4-30 cl. 4.5
    (10-min aggregation); nine-of-ten rule: common practice.
    """
    keep = chunk.present
    t = chunk.t[keep]
    out: list[UnitRollupRow] = []
    if t.size == 0:
        return out
    hz, imb = chunk.hz[keep], chunk.imbalance[keep]
    flagged = (chunk.flags[keep] & FLAG_EVENT) != 0
    slot = np.floor(t / span_s).astype(np.int64)
    slots, inv = np.unique(slot, return_inverse=True)
    m = slots.size

    def count(mask: npt.NDArray[np.bool_], on: I64 = inv, size: int = m) -> I64:
        return np.bincount(on, weights=mask.astype(np.float64), minlength=size).astype(np.int64)

    seconds = np.bincount(inv, minlength=m)
    fl = count(flagged)
    has_hz, has_imb = np.isfinite(hz), np.isfinite(imb)
    hz_n, imb_n = count(has_hz), count(has_imb)
    imb_sq = np.bincount(inv, weights=np.where(has_imb, imb, 0.0) ** 2, minlength=m)
    # 10-s means of the seconds with a frequency (slot as ten_second_means forms it).
    th, fh = t[has_hz], hz[has_hz]
    s10 = np.floor(th / 10.0 + 1e-9).astype(np.int64)
    u10, i10 = np.unique(s10, return_inverse=True)
    n10 = np.bincount(i10, minlength=u10.size)
    mean10 = np.bincount(i10, weights=fh, minlength=u10.size) / np.maximum(n10, 1)
    made = n10 >= (TEN_S_MIN_VALUES if final else 10)
    open10 = (n10 < 10) & ~made if not final else np.zeros(u10.size, bool)
    owner = np.searchsorted(slots, np.floor(u10 * 10.0 / span_s).astype(np.int64))
    f10_n = count(made, owner)
    f10_open = count(open10, owner)
    inside = [count(made & (mean10 >= FREQ_BAND[0] * f) & (mean10 <= FREQ_BAND[1] * f), owner)
              for f in NOMINAL_HZ]
    outside = [count(made & ((mean10 < FREQ_ALL[0] * f) | (mean10 > FREQ_ALL[1] * f)), owner)
               for f in NOMINAL_HZ]
    fmin = np.full(m, np.inf)
    fmax = np.full(m, -np.inf)
    first = np.full(m, np.inf)
    last = np.full(m, -np.inf)
    np.minimum.at(fmin, owner[made], mean10[made])
    np.maximum.at(fmax, owner[made], mean10[made])
    np.minimum.at(first, owner[made], u10[made] * 10.0)
    np.maximum.at(last, owner[made], u10[made] * 10.0)
    for j in range(m):
        out.append(UnitRollupRow(
            t_utc=float(slots[j] * span_s), seconds=int(seconds[j]), flagged=int(fl[j]),
            hz_n=int(hz_n[j]), f10_n=int(f10_n[j]),
            f10_in=tuple(int(x[j]) for x in inside), f10_out=tuple(int(x[j]) for x in outside),
            f10_min=_opt(fmin[j]), f10_max=_opt(fmax[j]), f10_first=_opt(first[j]),
            f10_last=_opt(last[j]), f10_open=int(f10_open[j]), imb_n=int(imb_n[j]),
            imb_sq=float(imb_sq[j])))
    return out


def fold(rows: Sequence[Mapping[str, Any]], span_s: int) -> list[dict[str, Any]]:
    """Rollup rows (dicts as :meth:`RecorderStore.rollups` returns them, one span) folded into
    intervals of ``span_s`` [s] (a multiple of theirs): counts and sums add, extremes keep
    the extreme, pu counts add where known. Ordered by device, interval start, channel."""
    out: dict[tuple[str, float, int], dict[str, Any]] = {}

    def ext(fn: Any, a: float | None, b: float | None) -> float | None:
        return b if a is None else a if b is None else fn(a, b)

    for r in rows:
        key = (r["device"], math.floor(r["t_utc"] / span_s) * float(span_s), r["channel"])
        acc = out.get(key)
        if acc is None:
            out[key] = {**r, "t_utc": key[1], "span_s": span_s,
                        "below": None if r["below"] is None else dict(r["below"]),
                        "above": None if r["above"] is None else dict(r["above"])}
            continue
        for k in ("seconds", "flagged", "sum_v", "sum_sq_v2"):
            acc[k] += r[k]
        for k, fn in (("min_v", min), ("max_v", max), ("low_v", min), ("peak_v", max)):
            acc[k] = ext(fn, acc[k], r[k])
        if acc["nominal_v"] is None:
            acc["nominal_v"] = r["nominal_v"]
        for k in ("below", "above"):
            if r[k] is not None:
                acc[k] = {p: (acc[k] or {}).get(p, 0) + c for p, c in r[k].items()}
    return [out[k] for k in sorted(out)]


__all__ = ["ALL_FIELDS", "HIGH_PU", "LOW_PU", "NOMINAL_HZ", "ROLLUP_FIELDS", "SPANS",
           "VOLTAGE_FIELDS", "RollupRow", "TrendChunk", "UnitRollupRow", "decode_rows", "fold",
           "pack_row", "rollup", "select", "unit_rollup", "unpack_row"]
