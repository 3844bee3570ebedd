"""Power frequency from zero crossings.

References
----------
IEC 61000-4-30 Ed.3 clause 5.1: the frequency reading is the number of integral cycles
counted during the 10-s time clock interval divided by the cumulative duration of the
integer cycles (from memory, tests/SOURCES.md).
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]


def whole_cycles(times_s: npt.ArrayLike,
                 synthetic: npt.ArrayLike | None = None) -> tuple[int, float]:
    """Count whole cycles and their total duration from consecutive half-cycle crossings.

    Parameters
    ----------
    times_s : (m,)  [s], positive- and negative-going crossings in order; NaN marks a break
        in the record (a cycle never spans it)
    synthetic : (m,) bool, crossings that are not measured; cycles touching them are skipped

    Returns
    -------
    cycles : int; duration : [s]
    """
    t = np.asarray(times_s, dtype=np.float64)
    syn = np.zeros(t.shape, bool) if synthetic is None else np.asarray(synthetic, bool)
    brk = np.flatnonzero(np.isnan(t))
    cycles, duration = 0, 0.0
    for seg in np.split(np.arange(t.shape[0]), brk):
        seg = seg[~np.isnan(t[seg])]
        if seg.shape[0] < 3:
            continue
        a = seg[:-2:2]
        ok = ~(syn[a] | syn[a + 1] | syn[a + 2])
        cycles += int(ok.sum())
        duration += float(np.sum(t[a + 2][ok] - t[a][ok]))
    return cycles, duration


def frequency_from_crossings(times_s: npt.ArrayLike,
                             synthetic: npt.ArrayLike | None = None) -> float:
    """Frequency [Hz]: whole cycles divided by their cumulative duration (NaN if none).

    References
    ----------
    IEC 61000-4-30 Ed.3 clause 5.1 (the method from memory).
    """
    n, d = whole_cycles(times_s, synthetic)
    return n / d if n and d > 0 else float("nan")
