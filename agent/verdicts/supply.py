"""Frequency, THD and unbalance verdicts (where the site has the channels).

* :func:`frequency_en50160` — 10-s means within ±1 % of the nominal for 99.5 % of a year and
  within +4 % / −6 % always (EN 50160, interconnected LV systems, public summaries).
* :func:`thd_en50160` — 10-min THD ≤ 8 % for 95 % of each week (EN 50160, pub), labelled with
  the harmonic orders it covers (EN 50160 counts to the 40th).
* :func:`unbalance_u2` — three-phase: 10-min u2 ≤ 2 % for 95 % of each week (EN 50160, pub).
* :func:`unbalance_max_deviation` — split phase (or three-phase by magnitudes): the NEMA
  definition used with ANSI C84.1, maximum deviation from the average of the phase voltages
  over that average; C84.1 recommends ≤ 3 % at no load (from memory).
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Confidence, Verdict
from agent.verdicts.series import as_f64, iso, iso_week, week_start

YEAR_S = 365 * 86400.0
FREQ_BAND = (0.99, 1.01)
FREQ_ALL = (0.94, 1.04)
FREQ_SHARE = 0.995
THD_LIMIT = 0.08
U2_LIMIT = 0.02
WEEKLY_SHARE = 0.95
NEMA_LIMIT = 0.03
EN50160_THD_ORDER = 40


def ten_second_means(t_utc: npt.ArrayLike, hz: npt.ArrayLike, *, min_values: int = 9
                     ) -> tuple[npt.NDArray[np.float64], npt.NDArray[np.float64]]:
    """Clock-aligned 10-s means of per-second frequencies [Hz] (arithmetic mean, at least
    ``min_values`` of the 10 seconds present; common practice for per-second inputs — the
    edge's own 10-s values count whole cycles, IEC 61000-4-30, from memory)."""
    t = as_f64(t_utc).ravel()
    f = as_f64(hz).ravel()
    ok = np.isfinite(t) & np.isfinite(f)
    t, f = t[ok], f[ok]
    if not t.size:
        return np.empty(0), np.empty(0)
    slot = np.floor(t / 10.0 + 1e-9).astype(np.int64)
    slots, inv = np.unique(slot, return_inverse=True)
    n = np.bincount(inv, minlength=slots.size)
    s = np.bincount(inv, weights=f, minlength=slots.size)
    keep = n >= min_values
    return (slots[keep] * 10.0).astype(np.float64), s[keep] / n[keep]


def frequency_en50160(t_utc: npt.ArrayLike, ten_s_hz: npt.ArrayLike, nominal_hz: float
                      ) -> Verdict:
    """EN 50160 power frequency on 10-s means.

    Parameters
    ----------
    t_utc : numeric (n,)  [s]  start of each 10-s interval
    ten_s_hz : numeric (n,)  [Hz]  10-s mean frequencies
    nominal_hz : float  [Hz]  50 or 60

    Returns
    -------
    Verdict ``fail`` (a value outside +4/−6 %: certain), ``provisional_pass`` /
    ``provisional_fail`` (the 99.5 % share over less than a year), ``pass`` / ``fail`` over a
    year or more, ``no_data``.

    References
    ----------
    EN 50160, power frequency, systems with synchronous connection (public summaries).
    """
    t = as_f64(t_utc).ravel()
    f = as_f64(ten_s_hz).ravel()
    ok = np.isfinite(f)
    t, f = t[ok], f[ok]
    n = int(f.size)
    lo, hi = FREQ_BAND[0] * nominal_hz, FREQ_BAND[1] * nominal_hz
    alo, ahi = FREQ_ALL[0] * nominal_hz, FREQ_ALL[1] * nominal_hz
    return frequency_from_counts({
        "n": n, "inside": int(np.count_nonzero((f >= lo) & (f <= hi))),
        "outside_all": int(np.count_nonzero((f < alo) | (f > ahi))),
        "t_first": float(t.min()) if n else None, "t_last": float(t.max()) if n else None,
        "min_hz": float(f.min()) if n else None, "max_hz": float(f.max()) if n else None},
        nominal_hz)


def frequency_from_counts(counts: Mapping[str, Any], nominal_hz: float) -> Verdict:
    """:func:`frequency_en50160` from additive counts of the 10-s means (as rollups keep
    them per interval): ``n``, ``inside`` (within +-1 %), ``outside_all`` (outside
    +4 %/-6 %), ``t_first``/``t_last`` [s] first and last 10-s interval, ``min_hz``/``max_hz``.
    """
    n, inside, outside_all = int(counts["n"]), int(counts["inside"]), int(counts["outside_all"])
    lo, hi = FREQ_BAND[0] * nominal_hz, FREQ_BAND[1] * nominal_hz
    alo, ahi = FREQ_ALL[0] * nominal_hz, FREQ_ALL[1] * nominal_hz
    span = float(counts["t_last"] - counts["t_first"] + 10.0) if n else 0.0
    if n == 0:
        verdict, passed = "no_data", None
    else:
        passed = outside_all == 0 and inside / n >= FREQ_SHARE
        certain = outside_all > 0 or span >= YEAR_S
        verdict = ("" if certain else "provisional_") + ("pass" if passed else "fail")
    return Verdict(
        rule="EN 50160 frequency: 10-s means within ±1 % for 99.5 % of a year, "
             "+4 %/-6 % always", verdict=verdict, passed=passed, confidence="pub",
        basis={"values": "10-s means", "count": n, "span_s": span,
               "period_rule": "a year (shorter periods are provisional)"},
        details={"nominal_hz": nominal_hz, "fraction_within_1pct":
                 round(inside / n, 6) if n else None, "outside_4_6pct": outside_all,
                 "min_hz": round(float(counts["min_hz"]), 4) if n else None,
                 "max_hz": round(float(counts["max_hz"]), 4) if n else None,
                 "band_hz": [round(lo, 3), round(hi, 3)], "all_hz": [round(alo, 3),
                                                                     round(ahi, 3)]})


def _weekly_share(t_start: npt.ArrayLike, values: npt.ArrayLike, limit: float, share: float
                  ) -> tuple[list[dict[str, Any]], int]:
    t = as_f64(t_start).ravel()
    v = as_f64(values)
    v = np.where(np.isfinite(v), v, -np.inf).max(axis=1) if v.ndim == 2 else v
    ok = np.isfinite(v)
    t, v = t[ok], v[ok]
    weeks = []
    starts = np.array([week_start(x) for x in t]) if t.size else np.empty(0)
    for w in np.unique(starts):
        x = v[starts == w]
        within = int(np.count_nonzero(x <= limit))
        complete = x.size >= 1008
        certain_fail = x.size - within > (1 - share) * 1008
        passed = within / x.size >= share
        weeks.append({"week": iso_week(float(w)), "start": iso(float(w)), "count": int(x.size),
                      "fraction_within": round(within / x.size, 6),
                      "max": round(float(x.max()), 6), "passed": bool(passed),
                      "provisional": not complete and not certain_fail})
    return weeks, int(t.size)


def _weekly_verdict(rule: str, weeks: list[dict[str, Any]], n: int, confidence: Confidence,
                    basis: dict[str, Any], details: dict[str, Any],
                    notes: tuple[str, ...] = ()) -> Verdict:
    if not weeks:
        verdict, passed = "no_data", None
    else:
        failed = [w for w in weeks if not w["passed"]]
        passed = not failed
        deciding = failed or weeks
        provisional = all(w["provisional"] for w in deciding) if failed else any(
            w["provisional"] for w in weeks)
        verdict = ("provisional_" if provisional else "") + ("pass" if passed else "fail")
    return Verdict(rule=rule, verdict=verdict, passed=passed, confidence=confidence,
                   basis={"count": n, "weeks": len(weeks), **basis},
                   details={**details, "weeks": weeks}, notes=notes)


def thd_en50160(t_start_utc: npt.ArrayLike, thd_10min: npt.ArrayLike, *,
                max_order: int | None = None) -> Verdict:
    """EN 50160 voltage THD: 10-min values ≤ 8 % for 95 % of each calendar week.

    Parameters
    ----------
    t_start_utc : numeric (n,)  [s]
    thd_10min : numeric (n,) or (n, ch)  [fraction]  (the worst channel counts)
    max_order : int, optional  highest harmonic order the THD covers (the sample rate caps
        it); below 40 the rule is named as a partial THD

    References
    ----------
    EN 50160 THD ≤ 8 % including harmonics up to order 40 (public summaries).
    """
    weeks, n = _weekly_share(t_start_utc, thd_10min, THD_LIMIT, WEEKLY_SHARE)
    order = EN50160_THD_ORDER if max_order is None else int(max_order)
    label = "THD" if order >= EN50160_THD_ORDER else f"THD to order {order} (partial)"
    notes = () if order >= EN50160_THD_ORDER else (
        f"the sample rate caps the harmonic order at {order}; EN 50160 counts to 40",)
    return _weekly_verdict(f"EN 50160 {label} ≤ 8 % for 95 % of each week", weeks, n, "pub",
                           {"values": "10-min THD", "orders": [2, order],
                            "orders_known": max_order is not None},
                           {"limit": THD_LIMIT}, notes)


def unbalance_u2(t_start_utc: npt.ArrayLike, u2_10min: npt.ArrayLike) -> Verdict:
    """EN 50160 three-phase unbalance: 10-min u2 ≤ 2 % for 95 % of each week (pub).

    ``u2_10min`` [fraction], negative/positive sequence (IEC 61000-4-30 clause 5.7)."""
    weeks, n = _weekly_share(t_start_utc, u2_10min, U2_LIMIT, WEEKLY_SHARE)
    return _weekly_verdict("EN 50160 unbalance u2 ≤ 2 % for 95 % of each week", weeks, n,
                           "pub", {"values": "10-min u2"}, {"limit": U2_LIMIT})


def max_deviation_unbalance(means_v: npt.ArrayLike) -> npt.NDArray[np.float64]:
    """NEMA voltage unbalance [fraction]: max |V_i − V_avg| / V_avg per row of (n, ch) means."""
    v = as_f64(means_v)
    avg = v.mean(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(np.abs(v - avg[:, None]).max(axis=1) / avg)


def unbalance_max_deviation(means_v: npt.ArrayLike) -> Verdict:
    """Split-phase (or magnitude-only) unbalance by the NEMA maximum-deviation definition,
    as used with ANSI C84.1: every 10-min value ≤ 3 % (C84.1's no-load recommendation,
    from memory).

    ``means_v`` (n, ch ≥ 2) [V] 10-min means of the legs / phases (line to neutral)."""
    v = as_f64(means_v)
    if v.ndim != 2 or v.shape[1] < 2:
        raise ValueError("unbalance needs at least two channels of means, shape (n, ch)")
    u = max_deviation_unbalance(v)
    u = u[np.isfinite(u)]
    n = int(u.size)
    passed = None if n == 0 else bool(np.all(u <= NEMA_LIMIT))
    verdict = "no_data" if passed is None else ("pass" if passed else "fail")
    return Verdict(
        rule="voltage unbalance, NEMA max deviation from average (as used with ANSI C84.1) "
             "≤ 3 %", verdict=verdict, passed=passed, confidence="mem",
        basis={"values": "10-min means of each leg", "count": n,
               "definition": "max |V_i - V_avg| / V_avg (NEMA)"},
        details={"limit": NEMA_LIMIT, "max": round(float(u.max()), 6) if n else None,
                 "above": int(np.count_nonzero(u > NEMA_LIMIT))})
