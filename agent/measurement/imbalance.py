"""Supply voltage unbalance.

References
----------
IEC 61000-4-30 Ed.3 clause 5.7: unbalance u2 = negative-sequence / positive-sequence ratio of
the fundamental components, over the 10/12-cycle interval; clause 5.7.2 gives an
approximation from line-to-line magnitudes, u2 = sqrt((1 - sqrt(3 - 6 beta)) /
(1 + sqrt(3 - 6 beta))) with beta = sum(U_ll^4) / (sum(U_ll^2))^2.
Split-phase |V1 - V2| / Vnom is common practice for 120/240 V services.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]

_A = np.exp(2j * np.pi / 3.0)


def split_phase_imbalance(v1: npt.ArrayLike, v2: npt.ArrayLike, nominal_v: float) -> F64:
    """|V1 - V2| / Vnom [fraction] for the two legs of a split-phase service (common practice)."""
    return np.asarray(np.abs(np.asarray(v1, float) - np.asarray(v2, float)) / nominal_v)


def negative_sequence_ratio(phasors: npt.ArrayLike) -> F64:
    """u2 = |V1 + a² V2 + a V3| / |V1 + a V2 + a² V3| from fundamental phasors (..., 3).

    Parameters
    ----------
    phasors : complex (..., 3), line-to-neutral fundamental phasors in sequence L1, L2, L3

    Returns
    -------
    u2 : [fraction], NaN where the positive sequence is zero

    References
    ----------
    IEC 61000-4-30 Ed.3 clause 5.7.1 (symmetrical components, Fortescue).
    """
    p = np.asarray(phasors, dtype=np.complex128)
    pos = np.abs(p[..., 0] + _A * p[..., 1] + _A * _A * p[..., 2])
    neg = np.abs(p[..., 0] + _A * _A * p[..., 1] + _A * p[..., 2])
    with np.errstate(divide="ignore", invalid="ignore"):
        return np.asarray(np.where(pos > 0, neg / pos, np.nan))


def u2_from_line_magnitudes(u12: npt.ArrayLike, u23: npt.ArrayLike, u31: npt.ArrayLike) -> F64:
    """IEC 61000-4-30 Ed.3 clause 5.7.2 magnitude-only approximation of u2 [fraction]."""
    a, b, c = (np.asarray(u, dtype=np.float64) for u in (u12, u23, u31))
    s2 = a**2 + b**2 + c**2
    with np.errstate(divide="ignore", invalid="ignore"):
        beta = (a**4 + b**4 + c**4) / (s2 * s2)
        root = np.sqrt(np.clip(3.0 - 6.0 * beta, 0.0, None))
        return np.asarray(np.sqrt((1.0 - root) / (1.0 + root)))
