"""Harmonic subgroups and THD on 10/12-cycle windows.

References
----------
IEC 61000-4-7 Ed.2 clause 3 and 5.6: 10/12-cycle window (5 Hz bins), harmonic subgroup =
sqrt of the sum of squares of the harmonic bin and its two neighbours; THD = sqrt(sum over
h = 2..H of Ysg_h²) / Ysg_1, H = 40 (EN 50160's THD limit is up to the 40th, pub; 40 as
IEC 61000-4-7's default is from memory, tests/SOURCES.md). IEC 61000-4-30 Ed.3 clause 5.8.
Where the sample rate caps H below 40 the value covers fewer orders: :func:`thd_label`.
Catmull-Rom interpolation: Catmull & Rom (1974), "A class of local interpolating splines".
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]
C128 = npt.NDArray[np.complex128]


def max_harmonic_order(sample_rate: float, fundamental_hz: float, limit: int = 40,
                       usable_fraction: float = 0.45) -> int:
    """Highest harmonic order h with h * f1 < usable_fraction * fs, capped at ``limit``."""
    return int(min(limit, np.ceil(usable_fraction * sample_rate / fundamental_hz) - 1))


#: The highest order a THD covers when nothing caps it (EN 50160, IEC 61000-4-7).
THD_FULL_ORDER = 40


def thd_label(max_order: int | None) -> str:
    """``"THD"`` when it covers h2..h40, else ``"THD (h2–hN)"`` with N = ``max_order``
    (e.g. a low sample rate caps it, :func:`max_harmonic_order`); ``"THD"`` when unknown."""
    if max_order is None or max_order >= THD_FULL_ORDER:
        return "THD"
    if max_order < 2:
        return "THD (no harmonic within the sample rate)"
    return f"THD (h2–h{int(max_order)})"


def resample_points(n_samples: int) -> int:
    """The smallest 2^a·3^b >= the samples in the window (no decimation, so no aliasing):
    a length the FFT factors well (1728 for a 1707-sample window, where the next power of
    two, 2048, costs about 1.5x the transform and 1.2x the interpolation)."""
    n = max(int(n_samples), 2)
    best = 1 << int(np.ceil(np.log2(n)))
    p3 = 1
    while p3 < best:
        m = p3 << max(0, int(np.ceil(np.log2(n / p3))))
        best = min(best, m)
        p3 *= 3
    return int(best)


def catmull_rom(x: F64, positions: F64, dtype: type[np.floating] = np.float64
                ) -> npt.NDArray[np.floating]:
    """Catmull-Rom cubic interpolation of ``x`` (n, channels) at fractional ``positions``.

    ``positions`` may have any shape; the result has shape (channels,) + positions.shape.
    Positions must be >= 1 and leave two samples of margin on the right. ``dtype`` float32
    halves the cost at a relative rounding of about 1e-7.
    """
    return catmull_rom_rows(np.ascontiguousarray(x.T, dtype=dtype), positions)


def catmull_rom_rows(rows: npt.NDArray[np.floating], positions: F64
                     ) -> npt.NDArray[np.floating]:
    """:func:`catmull_rom` of channel-major samples ``rows`` (channels, n), computed in
    ``rows.dtype``; the result has shape (channels,) + positions.shape."""
    return _catmull_rom_rows_in_place(rows, np.array(positions, dtype=np.float64))


def _catmull_rom_rows_in_place(rows: npt.NDArray[np.floating], positions: F64,
                               out: npt.NDArray[np.floating] | None = None
                               ) -> npt.NDArray[np.floating]:
    """:func:`catmull_rom_rows`, using ``positions`` (float64) as scratch space; ``out``
    (channels,) + positions.shape receives the result (computed in rows.dtype, then cast)."""
    dtype = rows.dtype.type
    floor = np.floor(positions)                     # np.modf's values, several times faster
    frac = np.subtract(positions, floor, out=positions)  # exact (positions are >= 0)
    f = frac.astype(dtype)                          # the fraction rounded to dtype
    floor -= 1.0                                    # index of the left-most tap (exact)
    first = floor.astype(np.intp)
    del floor
    n = rows.shape[1]
    if first.size and (first.min() < 0 or first.max() + 3 >= n):
        raise ValueError("interpolation positions must lie in [1, n - 2)")
    f2 = f * f
    hf3 = f2 * f
    hf3 *= 0.5
    w0 = f2 - hf3                                   # Catmull-Rom weights of the 4 taps
    w0 -= 0.5 * f
    w1 = 3.0 * hf3
    w1 -= 2.5 * f2
    w1 += 1.0
    w3 = hf3 - 0.5 * f2
    w2 = 1.0 - w0
    w2 -= w1
    w2 -= w3                                        # the weights sum to one
    if out is None:
        out = np.empty((rows.shape[0], *first.shape), dtype=dtype)
    acc = np.empty(first.shape, dtype=dtype)
    tmp = np.empty(first.shape, dtype=dtype)
    for c in range(rows.shape[0]):
        row = rows[c]
        # Shifted views read taps i-1 .. i+2 with one index array. The indices were checked
        # above, so "wrap" never wraps; it is only the faster gather.
        np.multiply(w0, row.take(first, mode="wrap"), out=acc)
        acc += np.multiply(w1, row[1:n].take(first, mode="wrap"), out=tmp)
        acc += np.multiply(w2, row[2:n].take(first, mode="wrap"), out=tmp)
        np.multiply(w3, row[3:n].take(first, mode="wrap"), out=tmp)
        np.add(acc, tmp, out=out[c])    # summed in rows.dtype, stored in out.dtype
    return out


_GL_X, _GL_W = np.polynomial.legendre.leggauss(16)


def catmull_rom_response(omega: npt.ArrayLike) -> F64:
    """Frequency response K(omega) [dimensionless] of the Catmull-Rom kernel (omega in rad/sample).

    Resampling a tone exp(j omega n) with the kernel gives K(omega) times the tone plus images
    at omega + 2 pi m (Poisson summation); the images fall between harmonic subgroups or above
    the 40th, so dividing each subgroup by K restores its magnitude.
    Computed as 2 * integral_0^2 k(t) cos(omega t) dt by 16-point Gauss-Legendre per piece
    (exact for the cubic pieces to rounding at these frequencies).
    """
    w = np.asarray(omega, dtype=np.float64)[..., None]
    t1 = 0.5 * (_GL_X + 1.0)           # nodes on [0, 1]
    t2 = t1 + 1.0                      # nodes on [1, 2]
    k1 = 1.5 * t1**3 - 2.5 * t1**2 + 1.0
    k2 = -0.5 * t2**3 + 2.5 * t2**2 - 4.0 * t2 + 2.0
    return np.asarray(np.sum(_GL_W * (k1 * np.cos(w * t1) + k2 * np.cos(w * t2)), axis=-1))


_K_GRID = np.linspace(0.0, np.pi, 4097)
_K_TABLE = catmull_rom_response(_K_GRID)


def catmull_rom_response_fast(omega: npt.ArrayLike) -> F64:
    """:func:`catmull_rom_response` by linear interpolation in a 4097-point table over
    [0, pi] rad/sample (interpolation error < 1e-7)."""
    return np.asarray(np.interp(np.asarray(omega, dtype=np.float64), _K_GRID, _K_TABLE))


def window_spectra(x: F64, start: F64, end: F64, points: int,
                   dtype: type[np.floating] = np.float64) -> C128:
    """Spectra of windows [start, end) resampled to ``points`` equally spaced samples.

    Parameters
    ----------
    x : (n, channels)  [V]
    start, end : (m,)  [sample index into x]; each window is a whole number of cycles
    points : int, a length the FFT factors well (resample_points)
    dtype : interpolation precision (float32: about 1e-7 relative rounding, half the cost)

    Returns
    -------
    spectra : (m, channels, points//2 + 1) complex, scaled so a bin holds the peak amplitude
    """
    frac = np.arange(points) / points
    pos = start[:, None] + (end - start)[:, None] * frac[None, :]
    seg = catmull_rom(x, pos, dtype).astype(np.float64, copy=False)  # (channels, m, points)
    return np.asarray(np.fft.rfft(seg, axis=-1).transpose(1, 0, 2) * (2.0 / points))


def harmonic_subgroups(spectra: C128, cycles: npt.ArrayLike, max_order: int,
                       span: npt.ArrayLike | None = None) -> F64:
    """Harmonic subgroup magnitudes Ysg_h, h = 1..max_order.

    Parameters
    ----------
    spectra : (m, channels, bins)  amplitude spectra of windows of ``cycles`` cycles
    cycles : (m,) int, cycles per window (bin of harmonic h = h * cycles)
    span : (m,) window lengths [samples] of the original signal; when given, each subgroup is
        divided by the Catmull-Rom response at its frequency (see :func:`catmull_rom_response`)

    Returns
    -------
    ysg : (m, channels, max_order)  [V peak]

    References
    ----------
    IEC 61000-4-7 Ed.2 clause 5.6 (harmonic subgroup).
    """
    cyc = np.asarray(cycles, dtype=np.intp)
    h = np.arange(1, max_order + 1)
    centre = cyc[:, None] * h[None, :]                            # (m, H)
    idx = np.minimum(centre[:, :, None] + np.array([-1, 0, 1]), spectra.shape[-1] - 1)
    if np.all(cyc == cyc[0]):
        picked = spectra[:, :, idx[0]]                              # (m, channels, H, 3)
    else:
        rows = np.arange(spectra.shape[0])[:, None, None]
        picked = np.moveaxis(np.moveaxis(spectra, 1, 2)[rows, idx], 3, 1)
    ysg = np.sqrt(np.sum(picked.real**2 + picked.imag**2, axis=-1))  # (m, channels, H)
    if span is not None:
        omega = 2.0 * np.pi * centre / np.asarray(span, dtype=np.float64)[:, None]
        ysg = ysg / catmull_rom_response_fast(omega)[:, None, :]
    return np.asarray(ysg)


_BINS: dict[tuple[int, int, int], tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]] = {}


def _subgroup_bins(cycles: int, max_order: int, last: int
                   ) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
    """Bins of harmonics 1..H, (H,), and of their subgroups, (H, 3), clipped to ``last``."""
    key = (cycles, max_order, last)
    if key not in _BINS:
        centre = cycles * np.arange(1, max_order + 1)
        _BINS[key] = centre, np.minimum(centre[:, None] + np.array([-1, 0, 1]), last)
    return _BINS[key]


def window_subgroups(rows: npt.NDArray[np.floating], start: F64, end: F64,
                     cycles: npt.ArrayLike, max_order: int, points: int,
                     frac: F64 | None = None) -> tuple[F64, C128]:
    """Harmonic subgroups and fundamental phasors of windows of channel-major samples.

    The same values as ``harmonic_subgroups(window_spectra(rows.T, start, end, points,
    rows.dtype), cycles, max_order, end - start)`` without building the scaled spectra: only
    the 3 * ``max_order`` bins of the subgroups are picked from the transforms.

    Parameters
    ----------
    rows : (channels, n)  [V], float32 or float64 (the interpolation precision)
    start, end : (m,)  [sample index into rows]; each window is ``cycles`` whole cycles
    cycles : (m,) int
    max_order : highest harmonic order H (>= 1)
    points : int, a length the FFT factors well (resample_points)
    frac : ``np.arange(points) / points``, if the caller keeps it

    Returns
    -------
    ysg : (channels, m, H)  [V peak], subgroups divided by the Catmull-Rom response
    fundamental : (channels, m) complex  [V peak], the bin of the fundamental

    References
    ----------
    IEC 61000-4-7 Ed.2 clause 5.6 (harmonic subgroup).
    """
    if frac is None:
        frac = np.arange(points) / points
    if start.shape[0] == 0:
        return np.zeros((rows.shape[0], 0, max_order)), np.zeros((rows.shape[0], 0), complex)
    span = end - start
    seg = np.empty((rows.shape[0], span.shape[0], points))       # (channels, m, points)
    pos = span[:, None] * frac
    pos += start[:, None]
    _catmull_rom_rows_in_place(rows, pos, seg)
    spec = np.fft.rfft(seg, axis=-1)
    scale = 2.0 / points                    # applied last (one rounding)
    cyc = np.asarray(cycles, dtype=np.intp)
    last = spec.shape[-1] - 1
    m = cyc.shape[0]
    c0 = int(cyc[0])
    if cyc.min() == cyc.max():
        centre_h, idx = _subgroup_bins(c0, max_order, last)
        centre = centre_h[None, :]                                        # (1, H)
        picked = spec[:, :, idx]                                          # (channels, m, H, 3)
        fund = spec[:, :, min(c0, last)]
    else:
        centre = cyc[:, None] * np.arange(1, max_order + 1)[None, :]          # (m, H)
        idx = np.minimum(centre[:, :, None] + np.array([-1, 0, 1]), last)       # (m, H, 3)
        picked = spec[:, np.arange(m)[:, None, None], idx]
        fund = spec[:, np.arange(m), np.minimum(cyc, last)]
    picked *= scale
    ysg = np.sqrt((picked.real**2 + picked.imag**2).sum(axis=-1))        # (channels, m, H)
    omega = 2.0 * np.pi * centre / span[:, None]
    ysg /= catmull_rom_response_fast(omega)[None, :, :]
    return np.asarray(ysg), np.asarray(fund * scale)


def thd_from_subgroups(ysg: F64) -> F64:
    """THD [fraction] = sqrt(sum_{h>=2} Ysg_h²) / Ysg_1 along the last axis; NaN where Ysg_1 = 0.

    References
    ----------
    IEC 61000-4-7 Ed.2 clause 3 (THDS, subgroup total harmonic distortion).
    """
    return thd_from_squares(ysg[..., 0], ysg**2)


def thd_from_squares(fund: F64, squares: F64) -> F64:
    """:func:`thd_from_subgroups` given Ysg_1 and the squares of every Ysg_h (h = 1..H) along
    the last axis, when the caller needs the squares anyway."""
    rest = np.sqrt(squares[..., 1:].sum(axis=-1))
    return np.divide(rest, fund, out=np.full(fund.shape, np.nan), where=fund > 0)


def harmonic_ratios(ysg: F64) -> F64:
    """Individual harmonic subgroups h = 2..H as fractions of the fundamental subgroup.

    Parameters
    ----------
    ysg : (..., H)  [V], subgroups of orders 1..H

    Returns
    -------
    ratios : (..., H - 1)  [fraction of Ysg_1]; NaN where Ysg_1 = 0

    References
    ----------
    IEC 61000-4-7 Ed.2 clause 5.6 (harmonic subgroup); EN 50160 and IEEE 519 state individual
    harmonic voltages relative to the fundamental.
    """
    fund = ysg[..., :1]
    out = np.full(ysg[..., 1:].shape, np.nan)
    return np.divide(ysg[..., 1:], fund, out=out, where=fund > 0)


def window_thd(x: npt.ArrayLike, start: npt.ArrayLike, end: npt.ArrayLike, cycles: npt.ArrayLike,
               sample_rate: float, fundamental_hz: float, max_order: int = 40) -> F64:
    """THD [fraction] of each window of ``cycles`` whole cycles between ``start`` and ``end``.

    Parameters
    ----------
    x : (n,) or (n, channels)  [V]
    start, end : (m,)  [sample index]
    cycles : (m,) int
    sample_rate : [S/s]; fundamental_hz : [Hz], nominal, for the usable harmonic range

    Returns
    -------
    thd : (m, channels)  [fraction]
    """
    a = np.asarray(x, dtype=np.float64)
    if a.ndim == 1:
        a = a[:, None]
    s = np.atleast_1d(np.asarray(start, dtype=np.float64))
    e = np.atleast_1d(np.asarray(end, dtype=np.float64))
    points = resample_points(int(np.ceil(np.max(e - s))) + 1)
    order = max_harmonic_order(sample_rate, fundamental_hz, max_order)
    spec = window_spectra(a, s, e, points)
    return thd_from_subgroups(harmonic_subgroups(spec, cycles, order, e - s))
