"""Voltage profile of one home: what its 10-min means looked like over the period.

Descriptive (no limit applies, ``passed`` None): the 1/5/50/95/99 % percentiles of the 10-min
means, each UTC day's lowest and highest mean, a time-of-day profile (percentiles of the
means of each UTC hour) and the sustained out-of-range periods (runs of consecutive 10-min
means outside the home's service band). Percentiles use numpy's linear interpolation (the
method is common practice; EN 50160 and C84.1 state shares, not an interpolation).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Verdict
from agent.verdicts.limits import Band
from agent.verdicts.series import as_f64, day_key, iso, percentiles, runs

PROFILE_PERCENTILES = (1.0, 5.0, 50.0, 95.0, 99.0)
HOURLY_PERCENTILES = (5.0, 50.0, 95.0)


def voltage_profile(t_start_utc: npt.ArrayLike, means_v: npt.ArrayLike, band: Band | None,
                    *, window_s: float = 600.0, nominal_v: float | None = None) -> Verdict:
    """The voltage profile of 10-min means.

    Parameters
    ----------
    t_start_utc : numeric (n,)  [s]  start of each mean
    means_v : numeric (n,) or (n, ch)  [V]  every channel's values pooled for percentiles
    band : Band, optional  the service band out-of-range periods are held against
    window_s : float  [s]  the window the means stand for
    nominal_v : float, optional  [V]  adds pu to the percentiles

    Returns
    -------
    Verdict ``computed`` with ``details``: ``percentiles_v``, ``percentiles_pu``, ``daily``
    {date: {min_v, max_v, means}}, ``hourly`` {"00".."23": percentiles}, ``out_of_range``
    [{start, end, duration_s, side, extreme_v}].
    """
    t = as_f64(t_start_utc).ravel()
    v = as_f64(means_v)
    v = v[:, None] if v.ndim == 1 else v
    if v.shape[0] != t.size:
        raise ValueError("t_start_utc and means_v must have the same length")
    fin = np.isfinite(v)
    pooled = v[fin]
    pct = percentiles(pooled, PROFILE_PERCENTILES)
    daily: dict[str, dict[str, Any]] = {}
    hourly: dict[str, Any] = {}
    lo_row = np.where(fin, v, np.inf).min(axis=1)
    hi_row = np.where(fin, v, -np.inf).max(axis=1)
    have = fin.any(axis=1)
    for k in np.nonzero(have)[0]:
        d = daily.setdefault(day_key(float(t[k])), {"min_v": np.inf, "max_v": -np.inf,
                                                    "means": 0})
        d["min_v"] = min(d["min_v"], round(float(lo_row[k]), 3))
        d["max_v"] = max(d["max_v"], round(float(hi_row[k]), 3))
        d["means"] += 1
    hours = ((t % 86400.0) // 3600.0).astype(int)
    for h in range(24):
        sel = (hours == h) & have
        if sel.any():
            hourly[f"{h:02d}"] = percentiles(v[sel][fin[sel]], HOURLY_PERCENTILES)
    periods = []
    if band is not None:
        outside = have & ((lo_row < band.low_v) | (hi_row > band.high_v))
        for i, j in runs(t, outside, window_s):
            low = bool((lo_row[i:j] < band.low_v).any())
            high = bool((hi_row[i:j] > band.high_v).any())
            periods.append({"start": iso(float(t[i])), "end": iso(float(t[j - 1] + window_s)),
                            "duration_s": float(t[j - 1] - t[i] + window_s),
                            "side": "both" if low and high else ("low" if low else "high"),
                            "extreme_v": round(float(lo_row[i:j].min() if low and not high
                                                     else hi_row[i:j].max()), 3)})
    pu = ({k: None if x is None else round(x / nominal_v, 4) for k, x in pct.items()}
          if nominal_v else None)
    return Verdict(
        rule=f"voltage profile of {window_s / 60:.0f}-min means (descriptive)",
        verdict="computed",
        passed=None, confidence="cp",
        basis={"values": f"{window_s / 60:.0f}-min means", "count": int(have.sum()),
               "time_of_day": "UTC hours", "band": None if band is None else band.rule,
               "flagged_judged": True},
        details={"percentiles_v": pct, "percentiles_pu": pu, "daily": daily,
                 "hourly": hourly, "out_of_range": periods})
