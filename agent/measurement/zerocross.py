"""Fundamental zero-crossing detection robust to harmonics, noise and phase jumps.

The reference signal is low-passed by cascaded boxcars of T/3, T/5 and T/7 (T = nominal
period), which null the 3rd, 5th, 7th harmonics and their multiples with linear phase; the
known group delay is subtracted. Crossings need the filtered signal to pass a hysteresis band
(positive- and negative-going), are interpolated between samples, and crossings closer than
0.3 nominal half-periods to the previous one are rejected. Where there are none (signal below
the band, e.g. an interruption) synthetic crossings continue at the nominal half-period.

References
----------
IEC 61000-4-30 Ed.3 clause 5.1 (fundamental frequency from zero crossings with harmonics and
noise suppressed) and clause 5.4.2 (Urms(1/2) windows start at fundamental zero crossings).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from agent.measurement.conditioning import BoxcarCascade, boxcar_gain, boxcar_lengths

F64 = npt.NDArray[np.float64]

MIN_SPACING = 0.3      # of the nominal half-period: closer crossings are rejected
MAX_SPACING = 1.5      # of the nominal half-period: beyond this a synthetic crossing is inserted


def hysteresis_crossings(y: npt.NDArray[np.floating] | npt.NDArray[np.integer], band: float,
                         state0: int = 0) -> tuple[F64, int, int]:
    """Zero crossings of ``y`` that pass through the band ``[-band, +band]``.

    Parameters
    ----------
    y : (n,)  [V], a low-passed signal (any real dtype: integer samples keep exact compares)
    band : [V], half-width of the hysteresis band
    state0 : sign (+1/-1/0) of the signal before y[0]

    Returns
    -------
    t : (m,)  [sample index into y], sub-sample linear interpolation of each crossing
    last_out : index of the last sample outside the band (-1 if none)
    state : sign of that sample (state0 if none)
    """
    n = y.shape[0]
    if y.dtype.kind in "iu":
        band = math.floor(band)        # same decisions for integer y, without float casts
    side = (y > band).view(np.int8) - (y < -band).view(np.int8)  # +1 / 0 / -1 per sample
    # Work on runs of equal side (a few per half cycle) instead of on every sample.
    starts = (side[1:] != side[:-1]).nonzero()[0]
    starts += 1
    run_start = np.concatenate(([0], starts))
    run_side = side[run_start]
    out_run = run_side.nonzero()[0]
    if out_run.shape[0] == 0:
        return np.zeros(0), -1, state0
    sv = run_side[out_run]
    last_out = n - 1 if run_side[-1] else int(run_start[-1]) - 1
    prev = np.concatenate(([state0], sv[:-1]))
    ends = run_start[out_run[(sv != prev) & (prev != 0)]]   # first sample on the new side
    if ends.shape[0] == 0:
        return np.zeros(0), last_out, int(sv[-1])
    pos = y > 0
    zc = (pos[:-1] != pos[1:]).nonzero()[0]
    k = zc.searchsorted(ends) - 1      # last raw sign change before each exit
    if zc.shape[0] and k[0] >= 0:      # the usual case (ends ascending, so k is too)
        kk = zc[k]
        y0, y1 = y[kk], y[kk + 1]      # opposite signs: the ratio is inside [0, 1]
        t = y0 / (y0 - y1)
        t += kk
        return t, last_out, int(sv[-1])
    kk = np.maximum(ends - 1, 0)       # none (the in-band stretch began before y[0])
    if zc.shape[0]:
        kk = np.where(k >= 0, zc[np.maximum(k, 0)], kk)
    y0, y1 = y[kk], y[np.minimum(kk + 1, n - 1)]
    denom = np.where(y0 != y1, y0 - y1, 1)
    t = np.minimum(np.maximum(y0 / denom, 0.0), 1.0)
    t += kk
    return t, last_out, int(sv[-1])


@dataclass
class ChainState:
    """The accepted crossing chain's tail: its last time and whether it has started."""

    last: float | None
    anchor: float             # where a cold chain may start [sample index]


def extend_chain(cands: list[F64], horizons: list[float], state: ChainState, half_period: float,
                 first_wait: float) -> tuple[F64, npt.NDArray[np.bool_]]:
    """Extend the crossing chain from per-channel candidate crossings.

    The lowest-index channel with a crossing in ``(last + 0.3 H, last + 1.5 H]`` supplies the
    next crossing; if every channel is known to have none there, a synthetic crossing is put
    at ``last + H``. Candidates must be final up to each channel's ``horizons`` entry (no later
    detection can add crossings before it). ``first_wait`` [samples] is how long after the
    anchor a cold chain waits for a real crossing before going synthetic.

    Returns the new crossing times and their synthetic flags; ``state`` is updated in place.
    """
    hp = half_period
    lo_k, hi_k = MIN_SPACING * hp, MAX_SPACING * hp
    out_t: list[F64] = []
    out_s: list[F64] = []
    last = state.last
    if last is None:
        limit = state.anchor + first_wait
        for c, cand in enumerate(cands):
            if cand.shape[0] and cand[0] <= limit:
                last = float(cand[0])
                out_t.append(np.array([last]))
                out_s.append(np.zeros(1))
                break
            if horizons[c] < limit:
                return np.zeros(0), np.zeros(0, dtype=bool)
        else:
            last = state.anchor
            out_t.append(np.array([last]))
            out_s.append(np.ones(1))
    while True:
        # Fast path: a run of well-spaced crossings on channel 0.
        c0 = cands[0]
        i = int(c0.searchsorted(last + lo_k))
        if i < c0.shape[0] and c0[i] <= last + hi_k:
            run = c0[i:]
            d = np.empty_like(run)
            d[0] = run[0] - last
            np.subtract(run[1:], run[:-1], out=d[1:])
            bad = ((d < lo_k) | (d > hi_k)).nonzero()[0]
            n = int(bad[0]) if bad.shape[0] else run.shape[0]
            out_t.append(run[:n])
            out_s.append(np.zeros(n))
            last = float(run[n - 1])
            continue
        chosen: float | None = None
        undecided = False
        for c, cand in enumerate(cands):
            j = int(cand.searchsorted(last + lo_k))
            if j < cand.shape[0] and cand[j] <= last + hi_k:
                chosen = float(cand[j])
                break
            if horizons[c] < last + hi_k:
                undecided = True
                break
        if chosen is not None:
            last = chosen
            out_t.append(np.array([last]))
            out_s.append(np.zeros(1))
        elif undecided:
            break
        else:
            last = last + hp
            out_t.append(np.array([last]))
            out_s.append(np.ones(1))
    state.last = last
    if not out_t:
        return np.zeros(0), np.zeros(0, dtype=bool)
    return np.concatenate(out_t), np.concatenate(out_s).astype(bool)


def fundamental_zero_crossings(x: npt.ArrayLike, sample_rate: float, nominal_hz: float,
                               nominal_peak: float, band_fraction: float = 0.08
                               ) -> tuple[F64, npt.NDArray[np.bool_]]:
    """Fundamental zero crossings of a whole record (see the module notes for the method).

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]; channel 0 is the reference, later channels stand in
        where it has no signal
    sample_rate : [S/s]
    nominal_hz : [Hz]
    nominal_peak : [V], sqrt(2) * Udin
    band_fraction : hysteresis half-width as a fraction of the (filtered) nominal peak

    Returns
    -------
    t : (m,)  [sample index], positive- and negative-going crossings in order
    synthetic : (m,) bool, True for nominal-period fallback crossings
    """
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    lengths = boxcar_lengths(sample_rate, nominal_hz)
    casc = BoxcarCascade(lengths, a.shape[1])
    y = casc.process(a)
    y[:casc.settle] = 0.0
    band = band_fraction * nominal_peak * boxcar_gain(lengths, nominal_hz, sample_rate)
    cands = []
    for c in range(a.shape[1]):
        t, _, _ = hysteresis_crossings(y[:, c], band)
        cands.append(t - casc.delay)
    hp = sample_rate / (2.0 * nominal_hz)
    end = a.shape[0] - 1 - casc.delay
    state = ChainState(last=None, anchor=casc.delay)
    return extend_chain(cands, [end] * a.shape[1], state, hp, 3.0 * hp)
