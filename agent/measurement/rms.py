"""RMS values over fractional-sample windows.

References
----------
IEC 61000-4-30 Ed.3 clause 3.35 and 5.4.2 (Urms(1/2): RMS over one fundamental cycle, commencing
at a fundamental zero crossing, refreshed each half cycle) and clause 5.2 (10/12-cycle RMS).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]


def rms(x: npt.ArrayLike, axis: int = 0) -> F64:
    """Root mean square of the samples along ``axis``.

    Parameters
    ----------
    x : numeric  [V]

    Returns
    -------
    rms : numeric  [V]
    """
    a = np.asarray(x, dtype=np.float64)
    return np.asarray(np.sqrt(np.mean(a * a, axis=axis)))


def cumulative_square_integral(x: F64) -> tuple[F64, F64]:
    """Running trapezoidal integral of x² along axis 0.

    Returns ``(q, Q)`` with ``q = x**2`` and ``Q[i]`` = integral of the piecewise-linear
    interpolant of q from sample 0 to sample i [V² · samples].
    """
    return cumulative_integral(x * x)


def cumulative_integral(q: F64) -> tuple[F64, F64]:
    """Running trapezoidal integral of ``q`` along axis 0: returns ``(q, Q)``, Q[0] = 0."""
    big_q = np.empty_like(q)
    big_q[0] = 0.0
    np.cumsum(0.5 * (q[1:] + q[:-1]), axis=0, out=big_q[1:])
    return q, big_q


def square_integral_at(q: F64, big_q: F64, t: F64) -> F64:
    """Integral of x² from sample 0 to fractional positions ``t`` [V² · samples].

    ``t`` has shape (m,) with ``0 <= t <= len(q) - 1``; returns shape (m, channels).
    """
    i = np.minimum(np.floor(t).astype(np.intp), q.shape[0] - 2)
    f = (t - i)[:, None] if q.ndim == 2 else (t - i)
    q0 = q[i]
    q1 = q[i + 1]
    return np.asarray(big_q[i] + q0 * f + (q1 - q0) * (0.5 * f * f))


def window_rms(x: npt.ArrayLike, start: npt.ArrayLike, end: npt.ArrayLike) -> F64:
    """RMS over windows [start, end) given in fractional samples.

    The square of the signal is integrated with the trapezoid rule and linear interpolation
    at the window edges, so a window that is not a whole number of samples is still exact to
    the sampling accuracy.

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]
    start, end : (m,)  [sample index relative to x[0]], 0 <= start < end <= n - 1

    Returns
    -------
    rms : (m,) or (m, channels)  [V]
    """
    a = np.asarray(x, dtype=np.float64)
    s = np.atleast_1d(np.asarray(start, dtype=np.float64))
    e = np.atleast_1d(np.asarray(end, dtype=np.float64))
    if np.any(s < 0) or np.any(e > a.shape[0] - 1) or np.any(e <= s):
        raise ValueError("windows must satisfy 0 <= start < end <= len(x) - 1")
    q, big_q = cumulative_square_integral(a)
    span = (e - s)[:, None] if a.ndim == 2 else (e - s)
    energy = square_integral_at(q, big_q, e) - square_integral_at(q, big_q, s)
    return np.asarray(np.sqrt(np.maximum(energy, 0.0) / span))


def segment_integrals(v: F64, t: F64) -> F64:
    """Integrals of the piecewise-linear interpolant of ``v`` between consecutive positions.

    Parameters
    ----------
    v : (n, channels)  [V or V²], samples
    t : (m,)  [sample index], strictly increasing with distinct floors, 0 <= t <= n - 2

    Returns
    -------
    integrals : (m-1, channels)  [unit of v · samples]; row j integrates from t[j] to t[j+1]
        (trapezoid rule inside, linear interpolation at the fractional edges)
    """
    i = np.floor(t).astype(np.intp)
    f = (t - i)[:, None]
    seg = np.add.reduceat(v[: i[-1] + 1], i, axis=0)[:-1]     # sums over [i_j, i_j+1)
    v0 = v[i]
    part = v0 * f + (v[i + 1] - v0) * (0.5 * f * f)             # integral from i_j to t_j
    return np.asarray(seg + 0.5 * (v0[1:] - v0[:-1]) + part[1:] - part[:-1])


def rms_without_dc(mean_square: F64, mean: F64, dc: F64) -> F64:
    """RMS [V] of ``x - dc`` from the window's mean of x² [V²] and mean of x [V].

    sqrt(E[x²] - 2 dc E[x] + dc²), clipped at zero against rounding.
    """
    return np.asarray(np.sqrt(np.maximum(mean_square - 2.0 * dc * mean + dc * dc, 0.0)))


def half_cycle_rms(x: npt.ArrayLike, crossings: npt.ArrayLike) -> tuple[F64, F64, F64]:
    """Urms(1/2): RMS from crossing k to crossing k+2 for every k.

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]
    crossings : (m,)  [sample index], positive- and negative-going zero crossings in order

    Returns
    -------
    start, end : (m-2,)  [sample index]
    urms : (m-2,) or (m-2, channels)  [V]

    References
    ----------
    IEC 61000-4-30 Ed.3 clause 5.4.2.
    """
    c = np.asarray(crossings, dtype=np.float64)
    start, end = c[:-2], c[2:]
    return start, end, window_rms(x, start, end)
