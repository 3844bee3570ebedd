"""Per-second records and the batcher that turns them into summary messages.

The edge computes, for each UTC second, per channel: the lowest and highest Urms(1/2)
(IEC 61000-4-30 Ed.3 cl. 5.4.2) and the RMS of the 10/12-cycle values (cl. 5.2) that start in
it, plus frequency, THD, imbalance and a flags bitmask. :class:`SummaryBatcher` collects them
and emits one ``summary`` body (see ``schemas/summary.schema.json``) per K seconds, aligned
to multiples of K seconds of UTC. Missing seconds inside a batch travel as masked values.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from agent.measurement.types import BasicIntervals, HalfCycleRms
from agent.wire.errors import WireError
from agent.wire.packing import pack_values

F64 = npt.NDArray[np.float64]

# Flag bits of the per-second bitmask (documented in the summary schema).
FLAG_EVENT = 1
FLAG_BITS = {
    "event": 1, "clipping": 2, "flatline": 4, "sample_gap": 8, "crc_error": 16,
    "sequence_gap": 32, "unsynced_clock": 64, "clock_step": 128,
}

# Units of each summary field as exponents of ten: 10 mV, 1 mHz, 1e-4 (0.01 %), 1.
DEFAULT_EXPONENTS = {"rms": -2, "hz": -3, "thd": -4, "imbalance": -4, "flags": 0}
DEFAULT_K = 60


def default_rms_exponent(channels: int) -> int:
    """RMS unit of the summaries as a power of ten [V]: 10 mV up to two channels, 0.1 V for
    three. 0.1 V quantises to ±0.05 V, i.e. ±0.04 % of 120 V, inside the ±0.1 % Udin
    magnitude uncertainty of the IEC 61000-4-30 Class A methods (from memory, tests/SOURCES.md),
    and keeps a three-phase monitor within the 1.5 MB/day budget
    (tests/bench/bench_bandwidth.py)."""
    return -2 if channels <= 2 else -1


@dataclass
class SecondRecord:
    """One second of values. ``t`` is the start of the second, UTC [s]; per-channel
    sequences in channel order [V] / [fraction]; NaN where a value is not available."""

    t: float
    rms_min: Sequence[float]
    rms_mean: Sequence[float]
    rms_max: Sequence[float]
    hz: float
    thd: Sequence[float]
    imbalance: float = math.nan
    flags: int = 0


class SummaryBatcher:
    """Accumulates per-second values and emits a summary body every ``k`` seconds.

    Batches cover ``[m*k, (m+1)*k)`` seconds of UTC (times are rounded to whole periods);
    a batch is emitted when a record falls outside the current batch or time goes backwards
    (clock step), or by :meth:`flush`. A record for a second already held raises WireError
    rather than overwrite it.
    """

    def __init__(self, channels: Sequence[str], k: int = DEFAULT_K, period_s: float = 1.0,
                 exponents: dict[str, int] | None = None) -> None:
        if not 1 <= k <= 3600:
            raise WireError(f"K = {k} seconds is outside 1..3600", "encode")
        if not channels or len(channels) > 4:
            raise WireError("1 to 4 channels required", "encode")
        self.channels = tuple(channels)
        self.k = k
        self.period_s = float(period_s)
        self.exp = {**DEFAULT_EXPONENTS, **(exponents or {})}
        self._slot0: int | None = None  # absolute period number of the batch's first slot
        self._held = 0
        nch = len(self.channels)
        self._rms = np.full((3, k, nch), np.nan)  # min, mean, max
        self._thd = np.full((k, nch), np.nan)
        self._hz = np.full(k, np.nan)
        self._imb = np.full(k, np.nan)
        self._flags = np.full(k, np.nan)
        self._last = -1

    def add(self, rec: SecondRecord) -> list[dict[str, object]]:
        """Add one record; returns the summary bodies it completed (usually none)."""
        nch = len(self.channels)
        row = [np.asarray(rec.rms_min, float), np.asarray(rec.rms_mean, float),
               np.asarray(rec.rms_max, float), np.asarray(rec.thd, float)]
        if any(r.shape != (nch,) for r in row):
            raise WireError(f"a record needs {nch} values per channel", "encode")
        return self.add_many(
            np.array([rec.t]), row[0][None, :], row[1][None, :], row[2][None, :],
            np.array([rec.hz], float), row[3][None, :], np.array([rec.imbalance], float),
            np.array([rec.flags]),
        )

    def add_many(self, t: F64, rms_min: F64, rms_mean: F64, rms_max: F64, hz: F64,
                 thd: F64, imbalance: F64, flags: npt.ArrayLike) -> list[dict[str, object]]:
        """Vectorised :meth:`add` for m seconds at once (arrays of m rows, per-channel
        arrays shape (m, channels)). Returns the summary bodies completed, oldest first."""
        t = np.asarray(t, dtype=np.float64)
        fl = np.asarray(flags, dtype=np.float64)
        if not np.all(np.isfinite(t)):
            raise WireError("record times must be finite", "non_finite")
        if np.any((fl < 0) | (fl > 65535) | (fl != np.floor(fl))):
            raise WireError("flags must be integers in 0..65535", "encode")
        slots = np.rint(t / self.period_s).astype(np.int64)
        out: list[dict[str, object]] = []
        for i in range(t.shape[0]):
            slot = int(slots[i])
            batch = slot - slot % self.k
            if self._slot0 is not None and (batch != self._slot0 or slot <= self._last):
                if slot == self._last:
                    raise WireError(f"second at t={t[i]} was already added", "encode")
                self._emit(out)
            if self._slot0 is None:
                self._slot0 = batch
            j = slot - self._slot0
            self._rms[0, j], self._rms[1, j], self._rms[2, j] = rms_min[i], rms_mean[i], rms_max[i]
            self._thd[j] = thd[i]
            self._hz[j], self._imb[j], self._flags[j] = hz[i], imbalance[i], fl[i]
            self._held += 1
            self._last = slot
            if j == self.k - 1:
                self._emit(out)
        return out

    def _emit(self, out: list[dict[str, object]]) -> None:
        body = self.flush()
        if body is not None:
            out.append(body)

    def flush(self) -> dict[str, object] | None:
        """Emit what is held (from the first to the last held second); None when empty."""
        if self._slot0 is None or self._held == 0:
            self._slot0 = None
            return None
        present = ~np.isnan(self._flags)
        first = int(np.argmax(present))
        last = self._last - self._slot0
        sl = slice(first, last + 1)
        n = last - first + 1
        exp = self.exp

        def per_channel(values: F64, e: int) -> list[object]:
            return [None if np.isnan(values[sl, c]).all() else pack_values(values[sl, c], e)
                    for c in range(len(self.channels))]

        def single(values: F64, e: int) -> object:
            return None if np.isnan(values[sl]).all() else pack_values(values[sl], e)

        def rms_list(values: F64) -> list[object]:
            # RMS arrays are never null: all-missing channels pack as a fully masked array.
            return [pack_values(values[sl, c], exp["rms"]) for c in range(len(self.channels))]

        body: dict[str, object] = {
            "v": 1, "type": "summary",
            "t0": (self._slot0 + first) * self.period_s,
            # An integral period packs as a 1-byte int instead of a 9-byte float64.
            "period_s": int(self.period_s) if self.period_s.is_integer() else self.period_s,
            "n": n,
            "channels": list(self.channels),
            "rms_min": rms_list(self._rms[0]), "rms_mean": rms_list(self._rms[1]),
            "rms_max": rms_list(self._rms[2]),
            "thd": per_channel(self._thd, exp["thd"]),
            "hz": single(self._hz, exp["hz"]), "imbalance": single(self._imb, exp["imbalance"]),
            "flags": pack_values(self._flags[sl], exp["flags"]),
        }
        self._rms[:] = np.nan
        self._thd[:] = np.nan
        self._hz[:] = np.nan
        self._imb[:] = np.nan
        self._flags[:] = np.nan
        self._slot0 = None
        self._held = 0
        self._last = -1
        return body


def per_second(
    half: HalfCycleRms,
    intervals: BasicIntervals,
    edges: F64,
) -> tuple[F64, F64, F64, F64, F64, F64, npt.NDArray[np.int64]]:
    """Per-second values from one block's measurement output.

    ``edges`` are the sample indices of m+1 consecutive second boundaries. A Urms(1/2) row
    belongs to the second its window ends in, (edge k, edge k+1] (a window ending exactly on
    an edge holds only samples before it); a 10/12-cycle value to the second it starts in,
    [edge k, edge k+1). Returns ``rms_min, rms_mean, rms_max`` (m, ch) [V], ``hz`` (m,)
    [Hz], ``thd`` (m, ch), ``imbalance`` (m,) and ``flags`` (m,) with :data:`FLAG_EVENT`
    where a 10/12-cycle value is flagged. ``rms_mean`` is the RMS of the 10/12-cycle values
    (sqrt of the mean square, the IEC 61000-4-30 Ed.3 cl. 4.5 aggregation); thd, hz and
    imbalance are their means. Seconds without values are NaN.

    Parameters
    ----------
    half : HalfCycleRms
        Urms(1/2) rows [V].
    intervals : BasicIntervals
        10/12-cycle values [V, fraction, Hz].
    edges : numeric
        Second boundaries [sample index], increasing.

    References
    ----------
    IEC 61000-4-30 Ed.3 cl. 5.2 (10/12-cycle magnitude), cl. 4.5 (aggregation), cl. 5.4.2
    (Urms(1/2)).
    """
    edges = np.asarray(edges, dtype=np.float64)
    m = edges.shape[0] - 1
    hb = np.searchsorted(edges, half.end, side="left") - 1
    ib = np.searchsorted(edges, intervals.start, side="right") - 1

    def grouped(bins: npt.NDArray[np.intp], values: F64, how: str) -> F64:
        out = np.full((m, *values.shape[1:]), np.nan)
        ok = (bins >= 0) & (bins < m)
        if not ok.any():
            return out
        b, v = bins[ok], values[ok]
        if how == "min":
            filled = np.full_like(out, np.inf)
            np.fmin.at(filled, b, v)  # fmin: a NaN value does not hide the others
        elif how == "max":
            filled = np.full_like(out, -np.inf)
            np.fmax.at(filled, b, v)
        else:
            total = np.zeros_like(out)
            count = np.zeros_like(out)
            good = ~np.isnan(v)
            np.add.at(total, b, np.where(good, v if how == "mean" else v * v, 0.0))
            np.add.at(count, b, good.astype(float))
            with np.errstate(invalid="ignore", divide="ignore"):
                filled = total / count
            if how == "rms":
                filled = np.sqrt(filled)
            return filled
        filled[np.isinf(filled)] = np.nan
        return filled

    rms_min = grouped(hb, half.urms, "min")
    rms_max = grouped(hb, half.urms, "max")
    rms_mean = grouped(ib, intervals.rms, "rms")
    thd = grouped(ib, intervals.thd, "mean")
    hz = grouped(ib, intervals.hz, "mean")
    imbalance = grouped(ib, intervals.imbalance, "mean")
    flagged = grouped(ib, intervals.flagged.astype(float), "max")
    flags = np.where(np.nan_to_num(flagged) > 0, FLAG_EVENT, 0).astype(np.int64)
    return rms_min, rms_mean, rms_max, hz, thd, imbalance, flags
