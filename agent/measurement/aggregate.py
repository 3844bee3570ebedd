"""Time aggregation of 10/12-cycle values.

References
----------
IEC 61000-4-30 Ed.3 clause 4.5: 150/180-cycle values aggregate 15 basic intervals; 10-min
values aggregate the basic intervals of a 10-min clock interval, resynchronised at each tick;
aggregation is the square root of the arithmetic mean of the squared input values (from
memory). Clause 4.7: a flag on any input carries into the aggregate (from memory;
tests/SOURCES.md).
"""

from __future__ import annotations

import math

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]


def rms_aggregate(values: npt.ArrayLike, axis: int = 0) -> F64:
    """sqrt(mean(values²)) along ``axis``, ignoring NaN (NaN where all are NaN).

    Parameters
    ----------
    values : numeric  [V] or [fraction]
    """
    v = np.asarray(values, dtype=np.float64)
    sq = v * v
    if v.shape[axis] and not np.isnan(sq).any():   # the common case: the same values, faster
        return np.asarray(np.sqrt(sq.sum(axis=axis) / v.shape[axis]))
    n = np.sum(~np.isnan(sq), axis=axis)
    total = np.nansum(sq, axis=axis)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(np.where(n > 0, np.sqrt(total / np.maximum(n, 1)), np.nan))


def clock_period(t_utc: float, length_s: float) -> int:
    """Number of the clock-aligned interval of ``length_s`` seconds containing ``t_utc``."""
    return math.floor(t_utc / length_s)
