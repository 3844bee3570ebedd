"""Service-voltage compliance and overvoltage summaries: pure functions over numpy arrays.

* :func:`ansi_c84_1` — per-second or 10-min RMS values against ANSI C84.1 Range A and Range B,
  service or utilization limits chosen by the site's ``measurement_point``.
* :func:`en50160_voltage` — 10-min means against EN 50160 (Un ±10 % for 95 % of the week,
  all within +10 % / −15 %).
* :func:`overvoltage_summary` — what a solar installer asks: seconds and 10-min (moving) means
  above 1.10 pu, the highest value per UTC day.

Limit values and their confidence (see each docstring): ANSI C84.1 Range A *service*
114–126 V is taken from public summaries of the standard; the Range A utilization and all
Range B limits are from memory. EN 50160's 10-min rule is from public summaries; the
EN 50549-1 10-min-mean trip rule (1.10 Un) is from memory.

Values are compared inclusive of the limits (a value equal to a limit is inside).
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import asdict, dataclass
from datetime import UTC, datetime
from typing import Any

import numpy as np
import numpy.typing as npt

F64 = npt.NDArray[np.float64]

#: ANSI C84.1 limits on a 120 V base [V]: (range, point) → (low, high).
#: Range A service 114–126 V: public summaries of ANSI C84.1. Range A utilization 108–125 V and
#: Range B service 110–127 V / utilization 104–127 V: from memory.
ANSI_C84_1_120V: dict[tuple[str, str], tuple[float, float]] = {
    ("A", "service"): (114.0, 126.0),
    ("A", "utilization"): (108.0, 125.0),
    ("B", "service"): (110.0, 127.0),
    ("B", "utilization"): (104.0, 127.0),
}
ANSI_CONFIDENCE: dict[tuple[str, str], str] = {
    ("A", "service"): "pub",
    ("A", "utilization"): "from memory",
    ("B", "service"): "from memory",
    ("B", "utilization"): "from memory",
}
#: measurement_point of agent.site.Site → the ANSI C84.1 point of delivery it corresponds to.
POINT_FOR_MEASUREMENT = {"service": "service", "outlet": "utilization"}

#: EN 50160 LV supply voltage: 10-min means within ±10 % of Un for 95 % of each week, and all
#: 10-min means within +10 % / −15 % (public summaries of EN 50160).
EN50160_BAND_PU = (0.90, 1.10)
EN50160_ALL_PU = (0.85, 1.10)
EN50160_SHARE = 0.95
TEN_MINUTES_PER_WEEK = 7 * 24 * 6
#: EN 50549-1 generator protection: 10-min moving mean above 1.10 Un (from memory).
OVERVOLTAGE_PU = 1.10


def _clean(values: npt.ArrayLike, exclude: npt.ArrayLike | None) -> F64:
    """1-D float array of the finite values not excluded."""
    v = np.asarray(values, dtype=np.float64).ravel()
    keep = np.isfinite(v)
    if exclude is not None:
        ex = np.asarray(exclude, dtype=bool).ravel()
        if ex.shape != v.shape:
            raise ValueError(f"exclude has {ex.size} entries for {v.size} values")
        keep &= ~ex
    return v[keep]


@dataclass(frozen=True)
class RangeResult:
    """RMS values compared with one voltage range.

    ``low_v``/``high_v`` the limits [V]; ``count`` values compared; ``fraction_inside``
    share within ``[low_v, high_v]`` (None without values); ``time_below_s`` /
    ``time_above_s`` [s] = values outside × ``interval_s``; ``worst_low_v`` /
    ``worst_high_v`` the lowest and highest value [V]; ``passed`` True when every value is
    inside (None without values); ``rule`` names the standard, range and point;
    ``confidence`` says where the limits come from.
    """

    rule: str
    low_v: float
    high_v: float
    count: int
    fraction_inside: float | None
    time_below_s: float
    time_above_s: float
    worst_low_v: float | None
    worst_high_v: float | None
    passed: bool | None
    confidence: str

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def range_check(values_v: npt.ArrayLike, low_v: float, high_v: float, *, rule: str,
                confidence: str, interval_s: float = 1.0,
                exclude: npt.ArrayLike | None = None) -> RangeResult:
    """Compare RMS values with ``[low_v, high_v]`` (limits inclusive).

    Parameters
    ----------
    values_v : numeric  [V]  RMS values, one per ``interval_s``; NaN values are skipped
    low_v, high_v : float  [V]
    rule, confidence : str  names carried into the result
    interval_s : float  [s]  time each value stands for (1 for per-second, 600 for 10-min)
    exclude : bool array, optional  True where a value is not to be judged (e.g. flagged by
        a dip, swell or interruption, IEC 61000-4-30 Ed.3 flagging)
    """
    if not low_v < high_v:
        raise ValueError(f"low limit {low_v} must be below high limit {high_v}")
    if not interval_s > 0:
        raise ValueError("interval_s must be > 0")
    v = _clean(values_v, exclude)
    n = int(v.size)
    below = int(np.count_nonzero(v < low_v))
    above = int(np.count_nonzero(v > high_v))
    return RangeResult(
        rule=rule, low_v=float(low_v), high_v=float(high_v), count=n,
        fraction_inside=(n - below - above) / n if n else None,
        time_below_s=below * interval_s, time_above_s=above * interval_s,
        worst_low_v=float(v.min()) if n else None, worst_high_v=float(v.max()) if n else None,
        passed=(below == 0 and above == 0) if n else None, confidence=confidence,
    )


def ansi_limits(nominal_v: float, range_name: str, measurement_point: str) -> tuple[float, float]:
    """ANSI C84.1 limits [V] scaled from the 120 V base to ``nominal_v``.

    ``measurement_point`` ``service`` (service entrance) uses the service-voltage limits,
    ``outlet`` (downstream of branch wiring) the utilization-voltage limits.

    References
    ----------
    ANSI C84.1, Range A service 114–126 V on 120 V (public summaries); Range A utilization
    108–125 V, Range B service 110–127 V and utilization 104–127 V (from memory).
    """
    if measurement_point not in POINT_FOR_MEASUREMENT:
        raise ValueError(f"measurement_point must be one of {tuple(POINT_FOR_MEASUREMENT)}, "
                         f"got {measurement_point!r}")
    if range_name not in ("A", "B"):
        raise ValueError(f"ANSI C84.1 range must be A or B, got {range_name!r}")
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    low, high = ANSI_C84_1_120V[(range_name, POINT_FOR_MEASUREMENT[measurement_point])]
    scale = nominal_v / 120.0
    return low * scale, high * scale


def ansi_c84_1(values_v: npt.ArrayLike, nominal_v: float, measurement_point: str = "service",
               *, interval_s: float = 1.0,
               exclude: npt.ArrayLike | None = None) -> dict[str, Any]:
    """Service-voltage compliance against ANSI C84.1 Range A and Range B.

    Parameters
    ----------
    values_v : numeric  [V]  per-second or 10-min RMS values (NaN skipped)
    nominal_v : float  [V]  declared nominal; the 120 V limits are scaled by nominal_v / 120
    measurement_point : str  ``service`` or ``outlet`` (agent.site.Site.measurement_point)
    interval_s : float  [s]  time each value stands for
    exclude : bool array, optional  values not judged (flagged by an RMS event)

    Returns
    -------
    dict with ``standard``, ``point`` (service or utilization), ``range_a`` and ``range_b``
    (:meth:`RangeResult.as_dict`), ``verdict``: ``range_a`` (all inside Range A),
    ``range_b`` (outside A, all inside B), ``outside_b`` or ``no_data``; ``passed`` True
    only for ``range_a``, and ``rule`` naming the range the verdict rests on.

    References
    ----------
    ANSI C84.1 (Range A service limits public; the others from memory, see ``ansi_limits``).
    """
    point = POINT_FOR_MEASUREMENT.get(measurement_point)
    if point is None:
        raise ValueError(f"measurement_point must be service or outlet, got {measurement_point!r}")
    results = {}
    for name in ("A", "B"):
        low, high = ansi_limits(nominal_v, name, measurement_point)
        results[name] = range_check(
            values_v, low, high, rule=f"ANSI C84.1 Range {name} {point}",
            confidence=ANSI_CONFIDENCE[(name, point)], interval_s=interval_s, exclude=exclude)
    a, b = results["A"], results["B"]
    if a.passed is None:
        verdict, rule = "no_data", a.rule
    elif a.passed:
        verdict, rule = "range_a", a.rule
    elif b.passed:
        verdict, rule = "range_b", b.rule
    else:
        verdict, rule = "outside_b", b.rule
    return {"standard": "ANSI C84.1", "point": point, "nominal_v": float(nominal_v),
            "range_a": a.as_dict(), "range_b": b.as_dict(), "verdict": verdict,
            "passed": verdict == "range_a" if verdict != "no_data" else None, "rule": rule}


def en50160_voltage(ten_min_means_v: npt.ArrayLike, nominal_v: float = 230.0,
                    *, exclude: npt.ArrayLike | None = None) -> dict[str, Any]:
    """Supply-voltage variations of 10-min means against EN 50160.

    Passes when at least 95 % of the 10-min means lie within Un ±10 % and all lie within
    Un +10 % / −15 %. The standard judges a whole week (1008 means); with fewer the result
    says ``complete_week: False`` and the verdict is provisional.

    Parameters
    ----------
    ten_min_means_v : numeric  [V]  10-min RMS means (NaN skipped)
    nominal_v : float  [V]  Un (230 V for the public LV network)
    exclude : bool array, optional  means not judged (e.g. flagged intervals)

    Returns
    -------
    dict with ``band`` (±10 %) and ``all`` (+10/−15 %) :meth:`RangeResult.as_dict`,
    ``passed`` (None without data), ``rule`` (the clause that failed, or the whole rule),
    ``count``, ``complete_week``.

    References
    ----------
    EN 50160, LV supply voltage variations (public summaries).
    """
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    band = range_check(ten_min_means_v, EN50160_BAND_PU[0] * nominal_v,
                       EN50160_BAND_PU[1] * nominal_v, rule="EN 50160 10-min means Un ±10 %",
                       confidence="pub", interval_s=600.0, exclude=exclude)
    every = range_check(ten_min_means_v, EN50160_ALL_PU[0] * nominal_v,
                        EN50160_ALL_PU[1] * nominal_v,
                        rule="EN 50160 all 10-min means Un +10 %/-15 %", confidence="pub",
                        interval_s=600.0, exclude=exclude)
    if band.fraction_inside is None:
        passed, rule = None, "EN 50160 supply voltage variations"
    elif every.passed is False:
        passed, rule = False, every.rule
    elif band.fraction_inside < EN50160_SHARE:
        passed, rule = False, "EN 50160 95 % of 10-min means within Un ±10 %"
    else:
        passed, rule = True, "EN 50160 supply voltage variations"
    return {"standard": "EN 50160", "nominal_v": float(nominal_v), "band": band.as_dict(),
            "all": every.as_dict(), "count": band.count,
            "complete_week": band.count >= TEN_MINUTES_PER_WEEK, "passed": passed,
            "rule": rule}


def moving_rms_mean(t_utc: npt.ArrayLike, values_v: npt.ArrayLike,
                    window_s: float = 600.0, period_s: float = 1.0) -> tuple[F64, F64]:
    """Moving RMS mean over ``window_s`` of regularly spaced values, full windows only.

    A window ends at each value's time and holds the values in ``(t - window_s, t]``; it is
    kept only when all ``window_s / period_s`` values are present (no gap).

    Parameters
    ----------
    t_utc : numeric  [s]  value times, increasing
    values_v : numeric  [V]  RMS values (NaN = missing)
    window_s, period_s : float  [s]

    Returns
    -------
    (t_end [s], mean [V]) of the full windows; mean = sqrt(mean of squares), the
    IEC 61000-4-30 Ed.3 aggregation (from memory).
    """
    t = np.asarray(t_utc, dtype=np.float64).ravel()
    v = np.asarray(values_v, dtype=np.float64).ravel()
    if t.shape != v.shape:
        raise ValueError("t_utc and values_v must have the same length")
    good = np.isfinite(v) & np.isfinite(t)
    t, v = t[good], v[good]
    need = round(window_s / period_s)
    if t.size < need or need < 1:
        return np.empty(0), np.empty(0)
    order = np.argsort(t, kind="stable")
    t, v = t[order], v[order]
    csum = np.concatenate([[0.0], np.cumsum(v * v)])
    # First index inside each window (t - window, t].
    first = np.searchsorted(t, t - window_s + 0.5 * period_s, side="left")
    count = np.arange(t.size) + 1 - first
    full = count == need
    idx = np.nonzero(full)[0]
    mean = np.sqrt((csum[idx + 1] - csum[first[idx]]) / need)
    return t[idx], mean


def ten_minute_means(t_utc: npt.ArrayLike, values_v: npt.ArrayLike,
                     flagged: npt.ArrayLike | None = None, *, period_s: float = 1.0,
                     min_coverage: float = 0.99) -> tuple[F64, F64, npt.NDArray[np.bool_]]:
    """Clock-aligned 10-min RMS means of regularly spaced values (e.g. per-second RMS).

    Intervals start on multiples of 600 s UTC; one is kept when at least ``min_coverage``
    of its values are present. An interval holding a flagged value is flagged (the flag
    carries into longer aggregates, IEC 61000-4-30 Ed.3, from memory).

    Parameters
    ----------
    t_utc : numeric  [s]  start of each value's period
    values_v : numeric  [V]  RMS values (NaN = missing)
    flagged : bool array, optional  values overlapping an RMS event
    period_s : float  [s]  spacing of the values
    min_coverage : float  share of the interval's values needed (common practice: 99 %)

    Returns
    -------
    (interval start [s], mean [V] = sqrt(mean of squares), flagged) per kept interval.
    """
    t = np.asarray(t_utc, dtype=np.float64).ravel()
    v = np.asarray(values_v, dtype=np.float64).ravel()
    fl = (np.zeros(t.shape, dtype=bool) if flagged is None
          else np.asarray(flagged, dtype=bool).ravel())
    if not (t.shape == v.shape == fl.shape):
        raise ValueError("t_utc, values_v and flagged must have the same length")
    good = np.isfinite(t) & np.isfinite(v)
    t, v, fl = t[good], v[good], fl[good]
    if not t.size:
        return np.empty(0), np.empty(0), np.empty(0, dtype=bool)
    slot = np.floor(t / 600.0).astype(np.int64)
    slots, inverse = np.unique(slot, return_inverse=True)
    count = np.bincount(inverse, minlength=slots.size)
    square = np.bincount(inverse, weights=v * v, minlength=slots.size)
    any_flag = np.bincount(inverse, weights=fl.astype(float), minlength=slots.size) > 0
    keep = count >= min_coverage * 600.0 / period_s
    mean = np.sqrt(square[keep] / count[keep]).astype(np.float64)
    return (slots[keep] * 600.0).astype(np.float64), mean, any_flag[keep]


def overvoltage_summary(t_utc: npt.ArrayLike, rms_mean_v: npt.ArrayLike,
                        rms_max_v: npt.ArrayLike | None, nominal_v: float, *,
                        ten_min_means_v: npt.ArrayLike | None = None,
                        threshold_pu: float = OVERVOLTAGE_PU) -> dict[str, Any]:
    """Overvoltage figures for a solar installer.

    Parameters
    ----------
    t_utc : numeric  [s]  start of each second
    rms_mean_v : numeric  [V]  per-second RMS (10/12-cycle values aggregated)
    rms_max_v : numeric, optional  [V]  per-second highest Urms(1/2) (swell peaks)
    nominal_v : float  [V]
    ten_min_means_v : numeric, optional  [V]  stored 10-min aggregates; when absent the 10-min
        moving mean is formed from the per-second values (full windows only)
    threshold_pu : float  [pu]  1.10: EN 50549-1 10-min mean trip level (from memory)

    Returns
    -------
    dict: ``threshold_v``, ``seconds_above`` (per-second means above the threshold),
    ``seconds_peak_above`` (seconds whose highest Urms(1/2) is above it),
    ``ten_min_means`` (how many were available), ``ten_min_above``, ``max_ten_min_v``,
    ``max_v`` / ``max_pu`` (highest value seen), ``max_per_day`` {UTC date: max [V]}.
    """
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    t = np.asarray(t_utc, dtype=np.float64).ravel()
    mean = np.asarray(rms_mean_v, dtype=np.float64).ravel()
    peak = mean if rms_max_v is None else np.asarray(rms_max_v, dtype=np.float64).ravel()
    if not (t.shape == mean.shape == peak.shape):
        raise ValueError("t_utc, rms_mean_v and rms_max_v must have the same length")
    limit = threshold_pu * nominal_v
    if ten_min_means_v is not None:
        ten = _clean(ten_min_means_v, None)
    else:
        ten = moving_rms_mean(t, mean)[1]
    highest = np.fmax(mean, peak)
    per_day: dict[str, float] = {}
    ok = np.isfinite(highest) & np.isfinite(t)
    if ok.any():
        days = (t[ok] // 86400).astype(np.int64)
        vals = highest[ok]
        for day in np.unique(days):
            date = datetime.fromtimestamp(int(day) * 86400, tz=UTC).date().isoformat()
            per_day[date] = float(vals[days == day].max())
    max_v = float(np.nanmax(highest)) if ok.any() else None
    return {
        "threshold_pu": threshold_pu, "threshold_v": limit,
        "seconds_above": int(np.count_nonzero(mean > limit)),
        "seconds_peak_above": int(np.count_nonzero(peak > limit)),
        "ten_min_means": int(ten.size),
        "ten_min_above": int(np.count_nonzero(ten > limit)),
        "max_ten_min_v": float(ten.max()) if ten.size else None,
        "max_v": max_v, "max_pu": None if max_v is None else max_v / nominal_v,
        "max_per_day": per_day,
        "rule": "EN 50549-1 10-min mean above 1.10 Un (from memory)",
    }


def standard_for(nominal_v: float, nominal_hz: float | None) -> str:
    """``ansi`` for 60-Hz (North American) supplies, ``en50160`` for 50-Hz ones; without a
    frequency, by voltage (below 200 V: ANSI). Common practice."""
    if nominal_hz is not None:
        return "ansi" if nominal_hz == 60.0 else "en50160"
    return "ansi" if nominal_v < 200.0 else "en50160"


def summarise(result: Mapping[str, Any]) -> str:
    """One line for a compliance result of :func:`ansi_c84_1` or :func:`en50160_voltage`."""
    if result.get("passed") is None:
        return f"{result['standard']}: no data"
    if result["standard"] == "ANSI C84.1":
        a = result["range_a"]
        inside = 100.0 * (a["fraction_inside"] or 0.0)
        return (f"{result['verdict'].replace('_', ' ')} ({inside:.1f} % inside Range A "
                f"{result['point']} {a['low_v']:.1f}-{a['high_v']:.1f} V)")
    band = result["band"]
    inside = 100.0 * (band["fraction_inside"] or 0.0)
    tag = "" if result["complete_week"] else f", provisional: {result['count']} of 1008 means"
    return f"{'pass' if result['passed'] else 'fail'} ({inside:.1f} % within Un ±10 %{tag})"
