"""Service-voltage verdicts: ANSI C84.1 on window means with sustained excursions, and
EN 50160 supply-voltage variations per calendar week.

Every value is judged, flagged ones included: flagging (IEC 61000-4-30, from memory) keeps a
dip from being counted twice in *event* statistics; the voltage-variation rules judge every
10-min value. The flagged share is stated in each verdict's basis.

A value equal to a limit is inside. With several channels (each a line-to-neutral voltage) an
interval is outside when any channel is.

References
----------
ANSI C84.1 Range A/B (limits and confidence in :mod:`agent.verdicts.limits`); the averaging
window for "sustained" is not fixed by the standard: 10-min means are common practice,
1, 5 or 15 min also used (``tests/SOURCES.md``, "More limits for the verdicts").
EN 50160 LV supply voltage variations: 95 % of the 10-min means of each week within Un ±10 %,
all within +10 % / −15 % (public summaries).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Verdict
from agent.verdicts.limits import EN50160_ALL_PU, EN50160_BAND_PU, ansi_band
from agent.verdicts.series import as_f64, iso, iso_week, runs, week_start

#: Averaging windows accepted for C84.1 [s] (1, 5, 10, 15 min; 10 min the default, cp).
ANSI_WINDOWS_S = (60.0, 300.0, 600.0, 900.0)
#: Sustained-excursion lists: longer than 1 min and longer than 10 min (issue rule, cp).
EXCURSION_LISTS_S = (60.0, 600.0)
EN50160_SHARE = 0.95
TEN_MINUTES_PER_WEEK = 1008


def _matrix(values: npt.ArrayLike) -> npt.NDArray[np.float64]:
    v = as_f64(values)
    return v[:, None] if v.ndim == 1 else v


def _flag_basis(n: int, flagged: npt.ArrayLike | None) -> dict[str, Any]:
    k = 0 if flagged is None else int(np.count_nonzero(np.asarray(flagged, bool)))
    return {"flagged": k, "flagged_share": round(k / n, 4) if n else None,
            "flagged_judged": True}


def range_counts(values: npt.ArrayLike, low_v: float, high_v: float, *, interval_s: float,
                 rule: str, confidence: str) -> dict[str, Any]:
    """How many intervals lie below, inside, above ``[low_v, high_v]`` (any channel outside
    makes the interval outside; NaN channels ignored; an all-NaN interval is not counted)."""
    v = _matrix(values)
    have = np.isfinite(v).any(axis=1)
    lo = np.where(np.isfinite(v), v, np.inf).min(axis=1)
    hi = np.where(np.isfinite(v), v, -np.inf).max(axis=1)
    n = int(np.count_nonzero(have))
    below = int(np.count_nonzero(have & (lo < low_v)))
    above = int(np.count_nonzero(have & (hi > high_v)))
    outside = int(np.count_nonzero(have & ((lo < low_v) | (hi > high_v))))
    return {"rule": rule, "confidence": confidence, "low_v": round(low_v, 3),
            "high_v": round(high_v, 3), "count": n,
            "fraction_inside": round((n - outside) / n, 6) if n else None,
            "time_below_s": below * interval_s, "time_above_s": above * interval_s,
            "worst_low_v": round(float(lo[have].min()), 3) if n else None,
            "worst_high_v": round(float(hi[have].max()), 3) if n else None,
            "passed": outside == 0 if n else None}


def sustained_excursions(t_utc: npt.ArrayLike, values_v: npt.ArrayLike, low_v: float,
                         high_v: float, *, longer_than_s: float, period_s: float = 1.0
                         ) -> list[dict[str, Any]]:
    """Runs of consecutive values outside ``[low_v, high_v]`` lasting longer than
    ``longer_than_s`` [s].

    Parameters
    ----------
    t_utc : numeric (n,)  [s]  start of each value's period, increasing
    values_v : numeric (n,) or (n, ch)  [V]  per-second RMS (any channel outside counts)
    low_v, high_v : float  [V]
    longer_than_s : float  [s]  strictly longer (a run of exactly 60 s is not > 1 min)
    period_s : float  [s]  spacing; a gap in time ends a run

    Returns
    -------
    list of ``{start, end, start_utc, duration_s, side (low|high|both), extreme_v}``.
    """
    t = as_f64(t_utc).ravel()
    v = _matrix(values_v)
    fin = np.isfinite(v)
    lo = np.where(fin, v, np.inf).min(axis=1)
    hi = np.where(fin, v, -np.inf).max(axis=1)
    low, high = lo < low_v, hi > high_v
    out = []
    for i, j in runs(t, low | high, period_s):
        duration = float(t[j - 1] - t[i] + period_s)
        if duration <= longer_than_s:
            continue
        any_low, any_high = bool(low[i:j].any()), bool(high[i:j].any())
        side = "both" if any_low and any_high else ("low" if any_low else "high")
        extreme = float(lo[i:j].min()) if side == "low" else float(hi[i:j].max())
        out.append({"start": iso(float(t[i])), "end": iso(float(t[j - 1] + period_s)),
                    "start_utc": float(t[i]), "duration_s": duration, "side": side,
                    "extreme_v": round(extreme, 3)})
    return out


def ansi_c84_1(means_v: npt.ArrayLike, nominal_v: float, measurement_point: str = "service",
               *, window_s: float = 600.0, flagged: npt.ArrayLike | None = None,
               per_second: tuple[npt.ArrayLike, npt.ArrayLike] | None = None) -> Verdict:
    """ANSI C84.1 Range A / Range B on sustained voltages (window means).

    Parameters
    ----------
    means_v : numeric (n,) or (n, ch)  [V]  window means (10-min by default), every one
        judged, flagged included
    nominal_v : float  [V]  the 120 V limits are scaled by nominal_v / 120
    measurement_point : str  ``service`` or ``outlet`` (service or utilization limits)
    window_s : float  [s]  the averaging window the means stand for (1/5/10/15 min)
    flagged : bool (n,), optional  intervals that overlap an RMS event (counted, not dropped)
    per_second : (t [s], values [V]), optional  per-second values for the sustained-excursion
        lists (longer than 1 min and 10 min outside Range A)

    Returns
    -------
    Verdict ``range_a`` (all means inside A), ``range_b`` (outside A, inside B),
    ``outside_b`` or ``no_data``; ``passed`` True only for ``range_a``. An excursion outside
    Range A longer than the averaging window also decides the verdict (its means may straddle
    two aligned windows). ``details``: ``standard``, ``point``, ``range_a``, ``range_b``,
    ``excursions`` {``longer_than_60s``, ``longer_than_600s``}.

    References
    ----------
    ANSI C84.1 (Range A service pub; utilization and Range B from memory); window: common
    practice.
    """
    if window_s not in ANSI_WINDOWS_S:
        raise ValueError(f"averaging window must be one of {ANSI_WINDOWS_S} s, got {window_s}")
    band_a = ansi_band(nominal_v, "A", measurement_point)
    band_b = ansi_band(nominal_v, "B", measurement_point)
    point = band_a.rule.rsplit(" ", 1)[-1]
    a = range_counts(means_v, band_a.low_v, band_a.high_v, interval_s=window_s,
                     rule=band_a.rule, confidence=band_a.confidence)
    b = range_counts(means_v, band_b.low_v, band_b.high_v, interval_s=window_s,
                     rule=band_b.rule, confidence=band_b.confidence)
    excursions: dict[str, list[dict[str, Any]]] = {}
    longest_outside = {"A": 0.0, "B": 0.0}
    if per_second is not None:
        t, v = per_second
        for limit in EXCURSION_LISTS_S:
            found = sustained_excursions(t, v, band_a.low_v, band_a.high_v,
                                         longer_than_s=limit)
            for e in found:
                e["outside_b"] = not band_b.contains(e["extreme_v"])
            excursions[f"longer_than_{limit:.0f}s"] = found
        for e in excursions.get("longer_than_60s", []):
            longest_outside["A"] = max(longest_outside["A"], e["duration_s"])
            if e["outside_b"]:
                longest_outside["B"] = max(longest_outside["B"], e["duration_s"])
    notes: list[str] = []
    if a["count"] == 0 and longest_outside["A"] <= window_s:
        verdict = "no_data"  # no window mean and no excursion as long as a window
    elif b["passed"] is False or longest_outside["B"] > window_s:
        verdict = "outside_b"
    elif a["passed"] is False or longest_outside["A"] > window_s:
        verdict = "range_b"
    else:
        verdict = "range_a"
    if verdict != "no_data" and (longest_outside["A"] > window_s) and a["passed"] is not False:
        notes.append("an excursion longer than the averaging window decides the verdict")
    n_ex = len(excursions.get("longer_than_60s", []))
    if n_ex and verdict == "range_a":
        notes.append(f"{n_ex} excursion(s) outside Range A longer than 1 min, shorter than the "
                     f"{window_s / 60:.0f}-min averaging window (listed)")
    # range_a rests on Range A; range_b (outside A, inside B) and outside_b on Range B.
    rule = a["rule"] if verdict in ("range_a", "no_data") else b["rule"]
    return Verdict(
        rule=f"ANSI C84.1 on {window_s / 60:.0f}-min means ({rule})", verdict=verdict,
        passed=None if verdict == "no_data" else verdict == "range_a",
        confidence=band_a.confidence if verdict in ("range_a", "no_data") else band_b.confidence,
        basis={"values": f"{window_s / 60:.0f}-min means", "window_s": window_s,
               "window_rule": "averaging window: common practice (cp)",
               "count": a["count"], **_flag_basis(a["count"], flagged)},
        details={"standard": "ANSI C84.1", "point": point, "nominal_v": float(nominal_v),
                 "range_a": a, "range_b": b, "excursions": excursions},
        notes=tuple(notes))


def _week(t_start: float, v: npt.NDArray[np.float64], nominal_v: float) -> dict[str, Any]:
    band = range_counts(v, EN50160_BAND_PU[0] * nominal_v, EN50160_BAND_PU[1] * nominal_v,
                        interval_s=600.0, rule="EN 50160 10-min means within Un ±10 %",
                        confidence="pub")
    every = range_counts(v, EN50160_ALL_PU[0] * nominal_v, EN50160_ALL_PU[1] * nominal_v,
                         interval_s=600.0, rule="EN 50160 all 10-min means within "
                         "Un +10 %/-15 %", confidence="pub")
    n = band["count"]
    outside = n - round((band["fraction_inside"] or 0.0) * n)
    complete = n >= TEN_MINUTES_PER_WEEK
    # Definite whatever the rest of the week holds: a mean outside +10/-15 %, or more
    # outside ±10 % than 5 % of a whole week (50.4 of 1008).
    definite_fail = every["passed"] is False or outside > (1 - EN50160_SHARE) * TEN_MINUTES_PER_WEEK
    if n == 0:
        passed, failed_rule = None, None
    elif every["passed"] is False:
        passed, failed_rule = False, every["rule"]
    elif (band["fraction_inside"] or 0.0) < EN50160_SHARE:
        passed, failed_rule = False, "EN 50160 95 % of 10-min means within Un ±10 %"
    else:
        passed, failed_rule = True, None
    return {"week": iso_week(t_start), "start": iso(t_start), "count": n,
            "complete": complete, "provisional": n > 0 and not complete and not definite_fail,
            "fraction_within_10pct": band["fraction_inside"], "outside_10pct": outside,
            "outside_all_band": every["count"] - round((every["fraction_inside"] or 0) * n),
            "passed": passed, "failed_rule": failed_rule,
            "worst_low_v": band["worst_low_v"], "worst_high_v": band["worst_high_v"]}


def en50160_weekly(t_start_utc: npt.ArrayLike, means_v: npt.ArrayLike, nominal_v: float, *,
                   flagged: npt.ArrayLike | None = None) -> Verdict:
    """EN 50160 supply-voltage variations, judged per calendar week (Monday 00:00 UTC).

    A week passes when at least 95 % of its 10-min means lie within Un ±10 % and all within
    Un +10 % / −15 %; a bad week fails the whole period (it cannot hide among good ones). A
    week with fewer than 1008 means is ``provisional`` unless its failure is already certain
    (a mean outside +10/−15 %, or more than 50 means outside ±10 %).

    Parameters
    ----------
    t_start_utc : numeric (n,)  [s]  start of each 10-min interval
    means_v : numeric (n,) or (n, ch)  [V]  10-min means, every one judged (flagged included)
    nominal_v : float  [V]  Un
    flagged : bool (n,), optional  counted in the basis

    Returns
    -------
    Verdict ``pass`` / ``fail`` / ``provisional_pass`` / ``provisional_fail`` / ``no_data``;
    ``passed`` the verdict on the values at hand (None without data); ``details["weeks"]``
    one entry per calendar week; ``details["band"]`` / ``["all"]`` over the whole period.

    References
    ----------
    EN 50160, LV supply voltage variations (public summaries).
    """
    if not (np.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    t = as_f64(t_start_utc).ravel()
    v = _matrix(means_v)
    if v.shape[0] != t.size:
        raise ValueError("t_start_utc and means_v must have the same length")
    weeks = []
    starts = np.array([week_start(x) for x in t]) if t.size else np.empty(0)
    for w in np.unique(starts):
        weeks.append(_week(float(w), v[starts == w], nominal_v))
    band = range_counts(v, EN50160_BAND_PU[0] * nominal_v, EN50160_BAND_PU[1] * nominal_v,
                        interval_s=600.0, rule="EN 50160 10-min means within Un ±10 %",
                        confidence="pub")
    every = range_counts(v, EN50160_ALL_PU[0] * nominal_v, EN50160_ALL_PU[1] * nominal_v,
                         interval_s=600.0, rule="EN 50160 all 10-min means within "
                         "Un +10 %/-15 %", confidence="pub")
    judged = [w for w in weeks if w["passed"] is not None]
    failed = [w for w in judged if w["passed"] is False]
    if not judged:
        verdict, passed = "no_data", None
        rule = "EN 50160 supply voltage variations"
    else:
        passed = not failed
        deciding = failed or judged
        provisional = any(w["provisional"] for w in deciding) and not any(
            not w["provisional"] for w in failed)
        verdict = ("provisional_" if provisional else "") + ("pass" if passed else "fail")
        rule = failed[0]["failed_rule"] if failed else "EN 50160 supply voltage variations"
    notes = []
    if failed and len(judged) > 1:
        notes.append(f"{len(failed)} of {len(judged)} calendar weeks fail")
    return Verdict(
        rule=f"{rule}, per calendar week", verdict=verdict, passed=passed, confidence="pub",
        basis={"values": "10-min means", "window_s": 600.0, "weeks": len(weeks),
               "count": band["count"], **_flag_basis(band["count"], flagged)},
        details={"standard": "EN 50160", "nominal_v": float(nominal_v), "weeks": weeks,
                 "band": band, "all": every, "count": band["count"],
                 "complete_week": any(w["complete"] for w in weeks)},
        notes=tuple(notes))
