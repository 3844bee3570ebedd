"""Signal conditioning: counts to volts, DC-offset removal, harmonic-null low-pass filters.

References
----------
IEC 61000-4-30 Ed.3 clause 4.2 (measurement chain) and clause 5.1 (the fundamental frequency
must be determined with harmonics, interharmonics and noise suppressed). The boxcar
(moving-average) filter's frequency response ``sin(pi f L/fs) / (L sin(pi f/fs))`` is standard
DSP (e.g. Oppenheim & Schafer, Discrete-Time Signal Processing, FIR filter examples).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]


def counts_to_volts(counts: npt.ArrayLike, volts_per_count: npt.ArrayLike,
                    gain: npt.ArrayLike = 1.0) -> F64:
    """Convert ADC counts to volts at the mains side.

    Parameters
    ----------
    counts : (n, channels) integer  [count]
    volts_per_count : (channels,)  [V/count]
    gain : (channels,) or scalar  [dimensionless], calibration gain

    Returns
    -------
    volts : (n, channels)  [V], ``counts * volts_per_count * gain``
    """
    scale = np.asarray(volts_per_count, dtype=np.float64) * np.asarray(gain, dtype=np.float64)
    return np.asarray(counts, dtype=np.float64) * scale


def grouped_dc_estimate(cycle_means: F64, first_index: int, group: int, history: int
                        ) -> F64:
    """DC estimate per one-cycle window, refreshed every ``group`` windows.

    Window k (global index ``first_index`` + row) gets the median of the means of windows
    g-history .. g-1 where g = group * floor(k / group) (zero for g = 0). Each window is one
    whole fundamental cycle, so its mean is the DC offset plus whatever asymmetry a transient
    adds; the median ignores those few transient cycles.

    Parameters
    ----------
    cycle_means : (m, channels)  [V]; rows are windows ``first_index - context`` .. where
        the caller passes ``context`` earlier rows first (see ``rows_out``)
    first_index : global index of row 0 of ``cycle_means``
    group, history : [windows]

    Returns
    -------
    dc : (m, channels)  [V], NaN for rows whose history is not inside ``cycle_means``
    """
    m = cycle_means.shape[0]
    if m == 0:
        return np.zeros(cycle_means.shape)
    g0 = (first_index // group) * group
    values = np.arange(g0, first_index + m, group)          # group starts touching the rows
    inverse = (first_index + np.arange(m) - g0) // group
    lo = np.maximum(values - history, 0) - first_index
    hi = values - first_index
    est = np.full((values.shape[0], *cycle_means.shape[1:]), np.nan)
    est[values == 0] = 0.0
    ok = (lo >= 0) & (values > 0)
    sel = np.flatnonzero(ok & (values >= history))
    if sel.shape[0]:            # the common case: a full history, one vectorised median
        idx = lo[sel, None] + np.arange(history)[None, :]
        srt = np.sort(cycle_means[idx], axis=1)
        est[sel] = 0.5 * (srt[:, (history - 1) // 2] + srt[:, history // 2])
    for j in np.flatnonzero(ok & (values < history)):       # just after a start
        est[j] = np.median(cycle_means[lo[j]:hi[j]], axis=0)
    return np.asarray(est[inverse])


def remove_dc_blockwise(x: npt.ArrayLike, block_len: int) -> F64:
    """Subtract the mean of each consecutive block of ``block_len`` rows (last block may be short).

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]
    block_len : int  [samples]; a whole number of nominal cycles keeps the AC out of the mean.

    Returns
    -------
    x_ac : same shape as x  [V]
    """
    a = np.asarray(x, dtype=np.float64)
    if block_len < 1:
        raise ValueError("block_len must be >= 1")
    out = a.copy()
    for s in range(0, a.shape[0], block_len):
        out[s:s + block_len] -= a[s:s + block_len].mean(axis=0)
    return out


def boxcar_lengths(sample_rate: float, nominal_hz: float,
                   orders: tuple[int, ...] = (3, 5, 7)) -> tuple[int, ...]:
    """Lengths [samples] of moving averages spanning T/k of the nominal period T.

    A boxcar of length L has zeros at multiples of fs/L, so T/3, T/5, T/7 null the 3rd, 5th
    and 7th harmonics (and their multiples) at nominal frequency.
    """
    return tuple(max(1, round(sample_rate / (k * nominal_hz))) for k in orders)


def boxcar_gain(lengths: tuple[int, ...], freq_hz: float, sample_rate: float) -> float:
    """Magnitude response [dimensionless] of cascaded boxcars at ``freq_hz``."""
    w = np.pi * freq_hz / sample_rate
    g = 1.0
    for length in lengths:
        g *= abs(np.sin(w * length) / (length * np.sin(w))) if w else 1.0
    return float(g)


def group_delay(lengths: tuple[int, ...]) -> float:
    """Group delay [samples] of cascaded causal boxcars: sum of (L-1)/2 (linear phase)."""
    return float(sum((length - 1) / 2.0 for length in lengths))


def moving_sum(x: F64, length: int, tail: F64) -> tuple[F64, F64]:
    """Causal moving sum of ``length`` samples along axis 0 (``tail``: the previous
    ``length-1`` input rows); returns the sums and the new tail."""
    z = np.concatenate([tail, x], axis=0)
    cs = np.cumsum(z, axis=0)
    y = cs[length - 1:].copy()
    y[1:] -= cs[: cs.shape[0] - length]
    return y, z[z.shape[0] - (length - 1):]


def boxcar(x: npt.ArrayLike, length: int, tail: F64 | None = None) -> tuple[F64, F64]:
    """Causal moving average of ``length`` samples along axis 0, computed with a cumulative sum.

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]
    length : int  [samples]
    tail : the last ``length-1`` input rows of the previous call (zeros at a start).

    Returns
    -------
    y : same shape as x  [V]; y[i] is the mean of the ``length`` inputs ending at x[i]
    tail : the new tail to pass to the next call
    """
    a = np.asarray(x, dtype=np.float64)
    if tail is None:
        tail = np.zeros((length - 1, *a.shape[1:]))
    z = np.concatenate([tail, a], axis=0)
    cs = np.empty((z.shape[0] + 1, *z.shape[1:]))
    cs[0] = 0.0
    np.cumsum(z, axis=0, out=cs[1:])
    y = (cs[length:] - cs[:-length]) * (1.0 / length)
    return y, z[z.shape[0] - (length - 1):].copy()


class BoxcarCascade:
    """Streaming cascade of causal boxcars with the carry-over needed for block invariance."""

    def __init__(self, lengths: tuple[int, ...], channels: int) -> None:
        self.lengths = lengths
        self.delay = group_delay(lengths)
        self.settle = int(sum(length - 1 for length in lengths))  # startup transient [samples]
        self._tails: list[F64] = [np.zeros((length - 1, channels)) for length in lengths]
        self._norm = 1.0 / float(np.prod(lengths))

    def process(self, x: F64) -> F64:
        y = x
        for i, length in enumerate(self.lengths):
            y, self._tails[i] = moving_sum(y, length, self._tails[i])
        return y * self._norm


class IntegerBoxcarCascade:
    """Streaming cascade of causal moving *sums* over integer samples, in exact int64.

    The output is the boxcar cascade of :class:`BoxcarCascade` times ``prod(lengths)``, with
    no rounding at all, so it cannot depend on how the samples were split into blocks.
    """

    def __init__(self, lengths: tuple[int, ...], channels: int) -> None:
        self.lengths = lengths
        self.delay = group_delay(lengths)
        self.settle = int(sum(length - 1 for length in lengths))  # startup transient [samples]
        self.norm = 1.0 / float(np.prod(lengths))
        """Factor from the sums to the moving averages [1/samples]."""
        self._tails: list[npt.NDArray[np.int64]] = [
            np.zeros((length - 1, channels), np.int64) for length in lengths]
        self._sums_tail: npt.NDArray[np.int64] | None = None

    def process(self, x: npt.NDArray[np.integer]) -> npt.NDArray[np.int64]:
        """Moving sums [count · samples^k] of ``x`` (n, channels), continuing the last call."""
        return self._stages(x, 0)

    def process_running_sums(self, sums: npt.NDArray[np.int64]) -> npt.NDArray[np.int64]:
        """:meth:`process` of the block whose running sums are ``sums`` (n+1, channels):
        row k = sum of all samples before block row k (int64, may wrap around).

        The first boxcar is then one difference of running sums. Do not mix with
        :meth:`process` on the same instance.
        """
        length = self.lengths[0]
        if self._sums_tail is None:           # nothing before: the sums were flat
            self._sums_tail = np.repeat(sums[:1], length - 1, axis=0)
        ext = np.concatenate([self._sums_tail, sums])
        n = sums.shape[0] - 1
        self._sums_tail = ext[n:n + length - 1]
        return self._stages(ext[length:] - ext[:n], 1)

    def _stages(self, x: npt.NDArray[np.integer], first: int) -> npt.NDArray[np.int64]:
        y: npt.NDArray[np.integer] = x
        for i, length in enumerate(self.lengths):
            if i < first:
                continue
            # z = [0, tail, y] accumulated: row j + length - z row j is the sum of `length` rows.
            z = np.empty((y.shape[0] + length, y.shape[1]), np.int64)
            z[0] = 0
            z[1:length] = self._tails[i]
            z[length:] = y
            tail = z[z.shape[0] - (length - 1):].copy()
            z[1:].cumsum(axis=0, out=z[1:])
            y = z[length:] - z[:-length]
            self._tails[i] = tail
        return np.asarray(y, dtype=np.int64)
