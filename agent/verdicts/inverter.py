"""Would the inverter have tripped? IEEE 1547-2018 default voltage trip settings and the
EN 50549-1 10-min mean rule, per event and per day; the installer's overvoltage figures.

Rules
-----
* IEEE 1547-2018 default over/undervoltage trip settings by abnormal-performance category
  (table in :data:`IEEE1547_DEFAULTS`, ``tests/SOURCES.md`` "IEEE 1547-2018 default trip
  settings", pub): a setting trips when the voltage is beyond its magnitude (strictly above
  an OV, strictly below a UV level) for at least its clearing time. For an RMS event the
  magnitude is its extreme (maximum of a swell, residual of a dip) and the time its duration
  above the swell / below the dip threshold — for a setting beyond that threshold this is an
  upper bound of the time beyond it, so a trip there reads ``may_trip`` (an interruption
  lies below every UV setting for its whole duration: a certain trip).
* Sustained over/undervoltage from per-second values: runs of seconds beyond a setting.
* EN 50549-1: trip when the 10-min moving mean exceeds 1.10 Un (from memory), for 230 V
  (50-Hz) homes.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.verdicts.base import Verdict
from agent.verdicts.series import as_f64, day_key, iso, moving_rms_mean, per_day, runs

#: IEEE 1547-2018 default trip settings: category → [(name, side, pu, clearing time s)].
IEEE1547_DEFAULTS: dict[str, tuple[tuple[str, str, float, float], ...]] = {
    "I": (("OV2", "over", 1.20, 0.16), ("OV1", "over", 1.10, 2.0),
          ("UV1", "under", 0.70, 2.0), ("UV2", "under", 0.45, 0.16)),
    "II": (("OV2", "over", 1.20, 0.16), ("OV1", "over", 1.10, 2.0),
           ("UV1", "under", 0.70, 10.0), ("UV2", "under", 0.45, 0.16)),
    "III": (("OV2", "over", 1.20, 0.16), ("OV1", "over", 1.10, 13.0),
            ("UV1", "under", 0.88, 21.0), ("UV2", "under", 0.50, 2.0)),
}
#: EN 50549-1 10-min moving mean trip level [pu] (from memory).
EN50549_TEN_MIN_PU = 1.10
#: Dip / swell detection thresholds [pu] the event durations are measured against.
EVENT_THRESHOLD_PU = {"over": 1.10, "under": 0.90}


def _beyond(side: str, value_pu: float, setting_pu: float) -> bool:
    return value_pu > setting_pu if side == "over" else value_pu < setting_pu


def ieee1547_event(kind: str, level_pu: float, duration_s: float, category: str = "II"
                   ) -> dict[str, Any]:
    """The IEEE 1547-2018 default settings an RMS event would have operated.

    Parameters
    ----------
    kind : ``swell``, ``dip`` or ``interruption``
    level_pu : float  [pu]  maximum for a swell, residual for a dip or interruption
    duration_s : float  [s]  time beyond the event threshold (for a dip: below 0.90 pu)
    category : ``I``, ``II`` or ``III``

    Returns
    -------
    dict: ``result`` ``trip`` / ``may_trip`` / ``ride_through``, ``settings`` operated
    (name, pu, clearing_s, certain).
    """
    if category not in IEEE1547_DEFAULTS:
        raise ValueError(f"IEEE 1547 category must be I, II or III, got {category!r}")
    side = "over" if kind == "swell" else "under"
    hit = []
    for name, s_side, pu, clearing in IEEE1547_DEFAULTS[category]:
        if s_side != side or not _beyond(side, level_pu, pu) or duration_s < clearing:
            continue
        # Time beyond the setting is known to be at least the event's duration when the
        # setting is the event threshold itself (OV1 = 1.10 pu = the swell threshold), or for
        # an interruption (below 0.05/0.10 pu, so below every UV setting the whole time).
        certain = pu == EVENT_THRESHOLD_PU[side] or kind == "interruption"
        hit.append({"setting": name, "pu": pu, "clearing_s": clearing, "certain": certain})
    result = ("trip" if any(h["certain"] for h in hit) else "may_trip") if hit else \
        "ride_through"
    return {"result": result, "settings": hit}


def sustained_trips(t_utc: npt.ArrayLike, values_pu: npt.ArrayLike, category: str = "II",
                    period_s: float = 1.0) -> list[dict[str, Any]]:
    """Runs of per-second values beyond an IEEE 1547-2018 default setting lasting at least
    its clearing time (a 1-s value is a mean: a lower bound of the time beyond it).

    ``values_pu`` (n,) or (n, ch): any channel beyond counts. Returns one entry per run and
    setting: ``{setting, pu, clearing_s, start, start_utc, duration_s, extreme_pu}``.
    """
    t = as_f64(t_utc).ravel()
    v = as_f64(values_pu)
    v = v[:, None] if v.ndim == 1 else v
    fin = np.isfinite(v)
    hi = np.where(fin, v, -np.inf).max(axis=1)
    lo = np.where(fin, v, np.inf).min(axis=1)
    out = []
    for name, side, pu, clearing in IEEE1547_DEFAULTS[category]:
        mask = hi > pu if side == "over" else lo < pu
        for i, j in runs(t, mask, period_s):
            duration = float(t[j - 1] - t[i] + period_s)
            if duration >= clearing:
                ext = float(hi[i:j].max()) if side == "over" else float(lo[i:j].min())
                out.append({"setting": name, "pu": pu, "clearing_s": clearing,
                            "start": iso(float(t[i])), "start_utc": float(t[i]),
                            "duration_s": duration, "extreme_pu": round(ext, 4)})
    return sorted(out, key=lambda e: (e["start_utc"], e["setting"]))


def en50549_ten_min(t_end_utc: npt.ArrayLike, ten_min_means_v: npt.ArrayLike,
                    nominal_v: float) -> dict[str, Any]:
    """10-min (moving) means above 1.10 Un, per UTC day (EN 50549-1, from memory)."""
    t = as_f64(t_end_utc).ravel()
    v = as_f64(ten_min_means_v)
    v = v.max(axis=1) if v.ndim == 2 else v
    limit = EN50549_TEN_MIN_PU * nominal_v
    above = np.isfinite(v) & (v > limit)
    days: dict[str, dict[str, Any]] = {}
    n_above = per_day(t[above], v[above])
    for key, (count, _, high, _) in per_day(t, v).items():
        days[key] = {"means": count, "above": n_above.get(key, (0,))[0],
                     "max_v": round(high, 3)}
    first = float(t[above][0]) if above.any() else None
    return {"threshold_v": round(limit, 3), "means": int(np.count_nonzero(np.isfinite(v))),
            "above": int(np.count_nonzero(above)), "first_above": iso(first),
            "per_day": days}


def inverter_trips(events: Sequence[Mapping[str, Any]], nominal_v: float, *,
                   category: str = "II", per_second: tuple[npt.ArrayLike, npt.ArrayLike]
                   | None = None, ten_min: tuple[npt.ArrayLike, npt.ArrayLike] | None = None,
                   en50549: bool = False) -> Verdict:
    """Would a grid-tied inverter at this home have tripped?

    Parameters
    ----------
    events : mappings with ``kind``, ``level_pu``, ``duration_s`` and optionally
        ``dip_duration_s`` (time below the dip threshold), ``start_utc``, ``event_id``
    nominal_v : float  [V]
    category : IEEE 1547-2018 abnormal-performance category the installer picks
    per_second : (t [s], RMS [V] (n,) or (n, ch)), optional  for sustained excursions
    ten_min : (t_end [s], 10-min (moving) means [V]), optional  for EN 50549-1
    en50549 : bool  also judge the EN 50549-1 10-min mean rule (230 V / 50-Hz homes)

    Returns
    -------
    Verdict ``trip`` (a certain trip), ``may_trip``, ``ride_through`` or ``no_data``;
    ``passed`` False on a trip; ``details``: ``per_event``, ``sustained``, ``en50549_1``,
    ``per_day`` {date: result}.

    References
    ----------
    IEEE 1547-2018 Table 11/12 default settings by category (tests/SOURCES.md, pub);
    EN 50549-1 10-min mean (from memory).
    """
    per_event = []
    by_day: dict[str, str] = {}
    order = ("ride_through", "may_trip", "trip")

    def mark(t: float | None, result: str) -> None:
        if t is None:
            return
        key = day_key(t)
        by_day[key] = max(by_day.get(key, "ride_through"), result, key=order.index)

    for ev in events:
        level, kind = ev.get("level_pu"), ev.get("kind")
        dur = ev.get("dip_duration_s") if kind != "swell" else None
        dur = ev.get("duration_s") if dur is None else dur
        if kind not in ("swell", "dip", "interruption") or level is None or dur is None:
            continue
        got = ieee1547_event(str(kind), float(level), float(dur), category)
        start = ev.get("start_utc")
        per_event.append({"event_id": ev.get("event_id"), "kind": kind,
                          "start": iso(start), "level_pu": round(float(level), 4),
                          "duration_s": round(float(dur), 4), **got})
        mark(start, got["result"])
    sustained: list[dict[str, Any]] = []
    if per_second is not None:
        t, v = per_second
        sustained = sustained_trips(t, as_f64(v) / nominal_v, category)
        for s in sustained:
            mark(s["start_utc"], "trip")
    en: dict[str, Any] | None = None
    if en50549:
        if ten_min is None and per_second is not None:
            t, v = per_second
            vv = as_f64(v)
            vv = vv.max(axis=1) if vv.ndim == 2 else vv
            ten_min = moving_rms_mean(t, vv)
        if ten_min is not None:
            en = en50549_ten_min(ten_min[0], ten_min[1], nominal_v)
            for day, d in en["per_day"].items():
                if d["above"]:
                    by_day[day] = "trip"
    results = [e["result"] for e in per_event] + ["trip"] * len(sustained)
    if en is not None and en["above"]:
        results.append("trip")
    judged_anything = bool(per_event or per_second is not None or en)
    if not judged_anything:
        verdict = "no_data"
    else:
        verdict = max(results, key=order.index, default="ride_through")
    rule = f"IEEE 1547-2018 category {category} default trip settings" + (
        "; EN 50549-1 10-min mean > 1.10 Un (from memory)" if en50549 else "")
    return Verdict(
        rule=rule, verdict=verdict,
        passed=None if verdict == "no_data" else verdict == "ride_through",
        confidence="mem" if en50549 else "pub",
        basis={"events": len(per_event), "category": category,
               "per_second": per_second is not None,
               "event_duration": "time beyond the event threshold (dip_duration_s where "
               "recorded)", "flagged_judged": True},
        details={"per_event": per_event, "sustained": sustained, "en50549_1": en,
                 "per_day": dict(sorted(by_day.items()))},
        notes=("may_trip: the magnitude passed a setting beyond the event threshold; the "
               "time beyond that setting is at most the event's duration",)
        if verdict == "may_trip" else ())


def overvoltage_summary(t_utc: npt.ArrayLike, rms_mean_v: npt.ArrayLike,
                        rms_max_v: npt.ArrayLike | None, nominal_v: float, *,
                        ten_min_means_v: npt.ArrayLike | None = None,
                        threshold_pu: float = EN50549_TEN_MIN_PU,
                        max_per_day_v: Mapping[str, float] | None = None) -> dict[str, Any]:
    """Overvoltage figures for a solar installer (every value counted, flagged included).

    Parameters
    ----------
    t_utc : numeric (n,)  [s]  start of each second
    rms_mean_v : numeric (n,) or (n, ch)  [V]  per-second RMS
    rms_max_v : numeric, optional, same shape  [V]  per-second highest Urms(1/2)
    nominal_v : float  [V]
    ten_min_means_v : numeric, optional  [V]  stored 10-min means; else 10-min moving means
        of the per-second values (full windows only)
    threshold_pu : float  1.10 (EN 50549-1 10-min level, from memory)
    max_per_day_v : {UTC date: V}, optional  the highest per-second mean or Urms(1/2)
        maximum per day over every second, where the caller has it (from rollups) and
        ``t_utc`` holds only the seconds the counts above the threshold need

    Returns
    -------
    dict: ``threshold_v``, ``seconds_above`` (seconds whose mean is above on any channel),
    ``seconds_peak_above``, ``ten_min_means``, ``ten_min_above``, ``max_ten_min_v``, ``max_v``,
    ``max_pu``, ``max_per_day`` {UTC date: V}, ``rule``.
    """
    if not (np.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    t = as_f64(t_utc).ravel()
    mean = as_f64(rms_mean_v)
    mean = mean[:, None] if mean.ndim == 1 else mean
    peak = mean if rms_max_v is None else as_f64(rms_max_v).reshape(mean.shape)
    limit = threshold_pu * nominal_v

    def rowmax(a: npt.NDArray[np.float64]) -> npt.NDArray[np.float64]:
        return np.where(np.isfinite(a), a, -np.inf).max(axis=1) if a.size else np.empty(0)

    m_row, p_row = rowmax(mean), rowmax(peak)
    highest = np.fmax(m_row, p_row)
    if ten_min_means_v is not None:
        ten = as_f64(ten_min_means_v).ravel()
        ten = ten[np.isfinite(ten)]
    else:
        ten = np.concatenate([moving_rms_mean(t, mean[:, c])[1] for c in range(mean.shape[1])]) \
            if t.size else np.empty(0)
    if max_per_day_v is None:
        ok = np.isfinite(highest) & np.isfinite(t)
        daily = {key: high for key, (_, _, high, _) in per_day(t[ok], highest[ok]).items()}
    else:
        daily = {k: float(v) for k, v in sorted(max_per_day_v.items()) if math.isfinite(v)}
    max_v = max(daily.values()) if daily else None
    return {
        "threshold_pu": threshold_pu, "threshold_v": limit,
        "seconds_above": int(np.count_nonzero(m_row > limit)),
        "seconds_peak_above": int(np.count_nonzero(p_row > limit)),
        "ten_min_means": int(ten.size), "ten_min_above": int(np.count_nonzero(ten > limit)),
        "max_ten_min_v": float(ten.max()) if ten.size else None,
        "max_v": max_v, "max_pu": None if max_v is None else max_v / nominal_v,
        "max_per_day": daily,
        "rule": "EN 50549-1 10-min mean above 1.10 Un (from memory); every value counted",
    }
