"""Verdicts on individual harmonic voltages (10-min values of one channel).

Inputs are the 10-min aggregates' individual harmonics (IEC 61000-4-7 subgroups, h2 upward,
fractions of the fundamental) and THD. Limits and sources (see ``tests/SOURCES.md``, "More
limits for the verdicts"):

- EN 50160, low-voltage supply: 95 % of the 10-min means of each week within the table of
  individual harmonic voltages [% of the fundamental] (values from memory: ``mem``);
- IEEE 519-2022, bus voltage at the point of common coupling up to 1 kV: individual
  harmonic ≤ 5.0 %, THD ≤ 8.0 % (limits ``pub``), judged here on the weekly 95th percentile
  of 10-min values (the percentile rule from memory: ``mem``).

Both are indicative (``agent.verdicts.INDICATIVE``): a home monitor is not a certified
instrument, and less than a week of data gives a provisional answer.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Verdict

F64 = npt.NDArray[np.float64]

#: 10-min values in a week.
WEEK_INTERVALS = 7 * 24 * 6

#: EN 50160 individual harmonic voltages, LV, [fraction of the fundamental] (from memory).
EN50160_LIMITS: dict[int, float] = {
    2: 0.02, 3: 0.05, 4: 0.01, 5: 0.06, 7: 0.05, 9: 0.015, 11: 0.035, 13: 0.03, 15: 0.005,
    17: 0.02, 19: 0.015, 21: 0.005, 23: 0.015, 25: 0.015,
    **{h: 0.005 for h in range(6, 25, 2)},
}

#: IEEE 519-2022 voltage distortion limits, bus voltage ≤ 1 kV [fraction] (published).
IEEE519_INDIVIDUAL = 0.05
IEEE519_THD = 0.08


def _clean(harmonics: npt.ArrayLike) -> F64:
    """10-min rows (intervals, orders) with every all-NaN row dropped."""
    h = np.asarray(harmonics, dtype=np.float64)
    if h.ndim != 2:
        raise ValueError(f"harmonics must be (intervals, orders), got shape {h.shape}")
    return np.asarray(h[~np.isnan(h).all(axis=1)])


def _percentile(h: F64, q: float) -> F64:
    with np.errstate(all="ignore"):
        return np.asarray(np.nanpercentile(h, q, axis=0)) if h.shape[0] else np.zeros(0)


def en50160_individual_harmonics(harmonics: npt.ArrayLike, *, first_order: int = 2
                                 ) -> Verdict:
    """EN 50160: the 95th percentile of the 10-min values of each harmonic within its limit.

    Parameters
    ----------
    harmonics : (intervals, orders)  [fraction of the fundamental], orders from
        ``first_order`` upward; NaN where not measured
    first_order : order of column 0 (2)

    Returns
    -------
    Verdict ``en50160_harmonics``: ``pass`` / ``fail`` (``provisional`` before a whole week of
    values), ``no_data`` when there is none; details list each judged order's 95th percentile
    and limit and the orders over their limit.

    References
    ----------
    EN 50160 (LV individual harmonic voltages, 95 % of 10-min means per week; from memory).
    """
    h = _clean(harmonics)
    rule = "en50160_harmonics"
    if h.shape[0] == 0:
        return Verdict(rule, "no_data", None, "mem", {"intervals": 0})
    p95 = _percentile(h, 95.0)
    orders: list[dict[str, Any]] = []
    over: list[int] = []
    for i, value in enumerate(p95):
        order = first_order + i
        limit = EN50160_LIMITS.get(order)
        if limit is None or not np.isfinite(value):
            continue
        orders.append({"order": order, "p95": round(float(value), 6), "limit": limit})
        if value > limit:
            over.append(order)
    passed = not over
    week = h.shape[0] >= WEEK_INTERVALS
    verdict = ("pass" if passed else "fail") if week else "provisional"
    notes = () if week else (f"{h.shape[0]} of {WEEK_INTERVALS} 10-min values of a week",)
    return Verdict(rule, verdict, passed, "mem",
                   {"intervals": int(h.shape[0]), "statistic": "95th percentile of 10-min values",
                    "complete_week": week, "source": "EN 50160 (limits from memory)"},
                   {"orders": orders, "over_limit": over}, notes)


def ieee519_voltage_distortion(harmonics: npt.ArrayLike, thd: npt.ArrayLike, *,
                               first_order: int = 2) -> Verdict:
    """IEEE 519-2022 voltage distortion at ≤ 1 kV: individual ≤ 5 %, THD ≤ 8 %, judged on
    the 95th percentile of the week's 10-min values.

    Parameters
    ----------
    harmonics : (intervals, orders)  [fraction of the fundamental], from ``first_order``
    thd : (intervals,)  [fraction], THD of the same 10-min values (up to the 40th here; the
        standard sums to the 50th)

    References
    ----------
    IEEE 519-2022 Table 1 (limits, published); weekly 95th percentile of 10-min values (from
    memory).
    """
    h = _clean(harmonics)
    t = np.asarray(thd, dtype=np.float64).reshape(-1)
    t = t[np.isfinite(t)]
    rule = "ieee519_voltage"
    if h.shape[0] == 0 and t.shape[0] == 0:
        return Verdict(rule, "no_data", None, "mem", {"intervals": 0})
    p95 = _percentile(h, 95.0)
    worst_i = int(np.nanargmax(p95)) if p95.shape[0] and np.isfinite(p95).any() else -1
    worst = float(p95[worst_i]) if worst_i >= 0 else float("nan")
    thd95 = float(np.percentile(t, 95.0)) if t.shape[0] else float("nan")
    over = [first_order + i for i, v in enumerate(p95) if np.isfinite(v) and v > IEEE519_INDIVIDUAL]
    thd_ok = not (np.isfinite(thd95) and thd95 > IEEE519_THD)
    passed = not over and thd_ok
    n = int(max(h.shape[0], t.shape[0]))
    week = n >= WEEK_INTERVALS
    verdict = ("pass" if passed else "fail") if week else "provisional"
    details: dict[str, Any] = {
        "worst_order": first_order + worst_i if worst_i >= 0 else None,
        "worst_p95": None if not np.isfinite(worst) else round(worst, 6),
        "individual_limit": IEEE519_INDIVIDUAL,
        "thd_p95": None if not np.isfinite(thd95) else round(thd95, 6),
        "thd_limit": IEEE519_THD, "over_limit": over, "thd_over_limit": not thd_ok,
    }
    notes = ["THD here sums harmonics to the 40th; IEEE 519 sums to the 50th"]
    if not week:
        notes.append(f"{n} of {WEEK_INTERVALS} 10-min values of a week")
    return Verdict(rule, verdict, passed, "mem",
                   {"intervals": n, "statistic": "95th percentile of 10-min values",
                    "complete_week": week,
                    "source": "IEEE 519-2022 (limits published; percentile rule from memory)"},
                   details, tuple(notes))


def harmonic_verdicts(per_channel: Mapping[str, tuple[npt.ArrayLike, npt.ArrayLike]]
                      ) -> dict[str, list[Verdict]]:
    """Both verdicts for each channel: ``{name: [EN 50160, IEEE 519]}`` from
    ``{name: (harmonics (intervals, orders), thd (intervals,))}``."""
    return {name: [en50160_individual_harmonics(h), ieee519_voltage_distortion(h, t)]
            for name, (h, t) in per_channel.items()}
