"""Verdict on flicker severity: EN 50160, Plt ≤ 1 for 95 % of the time of each week.

Input: the Plt values of one channel over a week (one per 2 h, from the 10-min aggregates at
the 2-h marks), flagged ones left out. Source: EN 50160 (published, ``tests/SOURCES.md``),
Plt from IEC 61000-4-15 (cube root of the mean of 12 Pst³, from memory). Indicative
(``agent.verdicts.INDICATIVE``): a home monitor, not a certified flickermeter.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Verdict

#: Plt values in a week (one per 2 h).
WEEK_PLT = 7 * 12
PLT_LIMIT = 1.0
SHARE = 0.95


def en50160_flicker(plt: npt.ArrayLike, pst: npt.ArrayLike | None = None) -> Verdict:
    """EN 50160: Plt ≤ 1 for 95 % of the week.

    Parameters
    ----------
    plt : (n,)  Plt values of one channel [1], NaN where not available (flagged)
    pst : optional (m,) Pst values of the same week [1], shown as context (largest, 95th
        percentile); not judged

    Returns
    -------
    Verdict ``en50160_flicker``: ``pass`` / ``fail`` (``provisional`` before a whole week of
    Plt values), ``no_data`` without any; details: share of Plt ≤ 1, largest Plt.

    References
    ----------
    EN 50160 (flicker severity Plt ≤ 1 for 95 % of the time; published); IEC 61000-4-15 Ed.2.
    """
    p = np.asarray(plt, dtype=np.float64).reshape(-1)
    p = p[np.isfinite(p)]
    rule = "en50160_flicker"
    details: dict[str, object] = {}
    if pst is not None:
        s = np.asarray(pst, dtype=np.float64).reshape(-1)
        s = s[np.isfinite(s)]
        if s.shape[0]:
            details["pst_max"] = round(float(s.max()), 4)
            details["pst_p95"] = round(float(np.percentile(s, 95.0)), 4)
            details["pst_count"] = int(s.shape[0])
    if p.shape[0] == 0:
        return Verdict(rule, "no_data", None, "pub", {"plt_values": 0}, details)
    share = float(np.mean(p <= PLT_LIMIT))
    passed = share >= SHARE
    week = p.shape[0] >= WEEK_PLT
    verdict = ("pass" if passed else "fail") if week else "provisional"
    details.update({"share_within": round(share, 4), "plt_max": round(float(p.max()), 4),
                    "limit": PLT_LIMIT, "required_share": SHARE})
    notes = () if week else (f"{p.shape[0]} of {WEEK_PLT} Plt values of a week",)
    return Verdict(rule, verdict, passed, "pub",
                   {"plt_values": int(p.shape[0]), "complete_week": week,
                    "source": "EN 50160 (Plt ≤ 1 for 95 % of the week); IEC 61000-4-15 Plt"},
                   details, notes)
