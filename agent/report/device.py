"""One home's verdicts from its arrays: the report's per-device answers, composed in one place.

Takes what :mod:`agent.report.fleet` read from the store (per-second values, stored 10-min
aggregates, events, site model) and calls the pure verdicts of :mod:`agent.verdicts`; every
answer is a :meth:`agent.verdicts.Verdict.as_dict` so any renderer can show it generically.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from agent.report.seconds import Seconds
from agent.verdicts.base import Verdict
from agent.verdicts.inverter import inverter_trips, overvoltage_summary
from agent.verdicts.limits import service_band, standard_for
from agent.verdicts.nominal import Nominal, guard_inferred, infer_nominal, service_for_channels
from agent.verdicts.profile import voltage_profile
from agent.verdicts.series import iso, window_means
from agent.verdicts.supply import (
    frequency_from_counts,
    thd_en50160,
    unbalance_max_deviation,
    unbalance_u2,
)
from agent.verdicts.voltage import ANSI_WINDOWS_S, ansi_c84_1, en50160_weekly

Arrays = dict[str, np.ndarray]


@dataclass(frozen=True)
class TenMin:
    """Stored complete 10-min aggregates of one home: start [s], rms (n, ch) [V], thd (n, ch)
    [fraction], flagged (n,), and the THD's highest harmonic order where the edge says."""

    t: np.ndarray
    rms: np.ndarray
    thd: np.ndarray
    flagged: np.ndarray
    thd_max_order: int | None = None
    hz: np.ndarray | None = None
    """10-min mean frequencies [Hz] where the edge sent them (NaN where not)."""

    @property
    def size(self) -> int:
        return int(self.t.size)


EMPTY_TEN_MIN = TenMin(np.empty(0), np.empty((0, 0)), np.empty((0, 0)), np.empty(0, bool))


def pick_nominal(model: Mapping[str, Any], events: Sequence[Mapping[str, Any]],
                 trend: Arrays | None, ten_min: TenMin, hz: float | None,
                 default_nominal_v: float | None) -> Nominal | None:
    """Declared (site model), from events, assumed (``--nominal``), else inferred among the
    nominals of the detected frequency and service type (:mod:`agent.verdicts.nominal`) from
    the median of the stored 10-min means (of the per-second means without them)."""
    v = model.get("nominal_v")
    if isinstance(v, int | float) and not isinstance(v, bool) and v > 0:
        return Nominal(float(v), "declared")
    for ev in events:
        nv = (ev.get("payload") or {}).get("nominal_v")
        if isinstance(nv, int | float) and not isinstance(nv, bool) and nv > 0:
            return Nominal(float(nv), "from events")
    if default_nominal_v:
        return Nominal(float(default_nominal_v), "assumed")
    values = ten_min.rms if ten_min.size or trend is None else trend["mean"]
    if values.size and np.isfinite(values).any():
        med = float(np.nanmedian(values))
        if math.isfinite(med) and med > 0:
            service = model.get("service_type") or service_for_channels(values.shape[1])
            return infer_nominal(med, hz or (60.0 if med < 200.0 else 50.0), str(service))
    return None


def _ansi_means(trend: Arrays | None, ten_min: TenMin, window_s: float
                ) -> tuple[np.ndarray, np.ndarray, np.ndarray, str] | None:
    """Window means for C84.1: the edge's stored 10-min aggregates for a 10-min window, else
    clock-aligned means formed from the per-second values."""
    if window_s == 600.0 and ten_min.size:
        return ten_min.t, ten_min.rms, ten_min.flagged, "stored 10-min aggregates"
    if trend is not None:
        t, m, f = window_means(trend["t"], trend["mean"], window_s, flagged=trend["flagged"])
        return t, m, f, f"{window_s / 60:.0f}-min means of the per-second values"
    return None


def compliance(standard: str, nominal: Nominal, point: str, trend: Arrays | None,
               ten_min: TenMin, window_s: float) -> tuple[Verdict, tuple[np.ndarray,
                                                                         np.ndarray] | None]:
    """The service-voltage verdict (ANSI C84.1 or EN 50160) and the means it judged."""
    per_second = None if trend is None else (trend["t"], trend["mean"])
    if standard == "ansi":
        got = _ansi_means(trend, ten_min, window_s)
        empty = np.empty((0, 1))
        t, m, f, source = got if got is not None else (np.empty(0), empty, np.empty(0, bool),
                                                        "no values")

        def judge(n: float) -> Verdict:
            return ansi_c84_1(m, n, point, window_s=window_s, flagged=f, per_second=per_second)
    else:
        if ten_min.size:
            t, m, f, source = ten_min.t, ten_min.rms, ten_min.flagged, "stored 10-min aggregates"
        elif trend is not None:
            t, m, f = window_means(trend["t"], trend["mean"], 600.0, flagged=trend["flagged"])
            source = "10-min means of the per-second values"
        else:
            t, m, f, source = np.empty(0), np.empty((0, 1)), np.empty(0, bool), "no values"

        def judge(n: float) -> Verdict:
            return en50160_weekly(t, m, n, flagged=f)
    v = guard_inferred(judge(nominal.volts), nominal, judge)
    v = Verdict(v.rule, v.verdict, v.passed, v.confidence, {**v.basis, "source": source},
                dict(v.details), v.notes)
    return v, ((t, m) if t.size else None)


def summarise(c: Mapping[str, Any]) -> str:
    """One line for a compliance verdict dict."""
    verdict = str(c.get("verdict", "no_data")).replace("_", " ")
    basis = c.get("basis") or {}
    flagged = basis.get("flagged")
    share = basis.get("flagged_share")
    tail = (f"; {flagged} flagged ({100 * share:.0f} %) judged too" if flagged and share
            else "")
    if c.get("standard") == "ANSI C84.1":
        a = c["range_a"]
        inside = "-" if a["fraction_inside"] is None else f"{100 * a['fraction_inside']:.1f} %"
        runs = (c.get("excursions") or {}).get("longer_than_60s", [])
        beyond_b = sum(1 for e in runs if e.get("outside_b"))
        ex = (f"; {len(runs)} sustained excursion(s) > 1 min outside Range A"
              + (f", {beyond_b} outside Range B" if beyond_b else "")) if runs else ""
        return (f"{verdict} ({inside} of {basis.get('count', 0)} {basis.get('values')} inside "
                f"Range A {c['point']} {a['low_v']:.1f}-{a['high_v']:.1f} V{ex}{tail})")
    band = c.get("band") or {}
    inside = "-" if band.get("fraction_inside") is None else \
        f"{100 * band['fraction_inside']:.1f} %"
    weeks = c.get("weeks") or []
    bad = [w["week"] for w in weeks if w.get("passed") is False]
    provisional = "" if c.get("complete_week") else \
        f", provisional: {c.get('count', 0)} of 1008 means"
    return (f"{verdict} ({inside} within Un ±10 % over {len(weeks)} week(s)"
            + (f"; failing weeks {', '.join(bad)}" if bad else "") + provisional + tail + ")")


def supply_verdicts(seconds: Seconds | None, ten_min: TenMin, hz: float | None,
                    service: str, channels: int, thd_max_order: int | None = None
                    ) -> dict[str, Any]:
    """Frequency, THD and unbalance where the home has the channels (else absent);
    ``thd_max_order`` the highest harmonic order the edge's THD covers, where known."""
    order = ten_min.thd_max_order if ten_min.thd_max_order is not None else thd_max_order
    trend = None if seconds is None else seconds.arrays
    out: dict[str, Any] = {}
    counts = None if seconds is None or not hz else seconds.frequency(hz)
    if counts is not None and hz:
        v = frequency_from_counts(counts, hz)
        notes = v.notes + (("EN 50160 rule shown for a 60-Hz supply (no ANSI C84.1 "
                            "counterpart)",) if hz == 60.0 else ())
        out["frequency"] = Verdict(v.rule, v.verdict, v.passed, v.confidence, v.basis,
                                   dict(v.details), notes).as_dict()
    if ten_min.size and np.isfinite(ten_min.thd).any():
        out["thd"] = thd_en50160(ten_min.t, ten_min.thd, max_order=order).as_dict()
    elif trend is not None and seconds is not None and seconds.complete \
            and np.isfinite(trend["thd"]).any():
        t, m, _ = window_means(trend["t"], trend["thd"], 600.0)
        if t.size:
            out["thd"] = thd_en50160(t, m, max_order=order).as_dict()
    imbalance = None if seconds is None else seconds.imbalance_means()
    if channels >= 3 and service != "120/240" and imbalance is not None:
        t, m = imbalance
        if t.size:
            out["unbalance"] = unbalance_u2(t, m).as_dict()
    elif channels == 2:
        means = ten_min.rms if ten_min.size else (
            window_means(trend["t"], trend["mean"], 600.0)[1] if trend is not None
            else np.empty((0, 2)))
        if means.ndim == 2 and means.shape[0] and means.shape[1] == 2:
            out["unbalance"] = unbalance_max_deviation(means).as_dict()
    return out


def dip_duration(ev: Mapping[str, Any]) -> float | None:
    """An event's time below the dip threshold [s] where the store gives it (the event row,
    else its payload); None when absent or not a number >= 0 (older events)."""
    for value in (ev.get("dip_duration_s"), (ev.get("payload") or {}).get("dip_duration_s")):
        if isinstance(value, int | float) and not isinstance(value, bool) \
                and math.isfinite(value) and value >= 0:
            return float(value)
    return None


def event_inputs(events: Sequence[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """Closed events as the inverter verdict reads them; the time below the dip threshold
    where the event recorded it (``dip_duration_s``), else the event's duration."""
    out = []
    for ev in events:
        if ev.get("state") != "closed" or ev.get("level_pu") is None:
            continue
        out.append({"event_id": ev.get("event_id"), "kind": ev.get("kind"),
                    "level_pu": ev.get("level_pu"), "duration_s": ev.get("duration_s"),
                    "dip_duration_s": dip_duration(ev),
                    "start_utc": ev.get("start_utc")})
    return out


def channel_count(seconds: Seconds | None, ten_min: TenMin) -> int:
    """Channels of a home: of its per-second values and stored 10-min aggregates."""
    from_seconds = 0 if seconds is None else max(
        seconds.channels, seconds.arrays["mean"].shape[1]
        if seconds.complete and seconds.arrays is not None else 0)
    return max(from_seconds, ten_min.rms.shape[1] if ten_min.size else 0)


def device_verdicts(model: Mapping[str, Any], events: Sequence[Mapping[str, Any]],
                    seconds: Seconds | None, ten_min: TenMin, *, nominal: Nominal | None,
                    hz: float | None, point: str, window_s: float = 600.0,
                    inverter_category: str = "II",
                    thd_max_order: int | None = None) -> dict[str, Any]:
    """Every verdict of one home (plain JSON-ready dicts).

    ``seconds``: the home's per-second values (:mod:`agent.report.seconds`); when they are
    not ``complete`` they hold the intervals the excursion, trip and overvoltage counts need,
    and the stored 10-min aggregates give the window means (``window_s`` 600)."""
    if window_s not in ANSI_WINDOWS_S:
        raise ValueError(f"averaging window must be one of {ANSI_WINDOWS_S} s")
    trend = None if seconds is None else seconds.arrays
    if seconds is not None and not seconds.complete and (window_s != 600.0 or not ten_min.size):
        raise ValueError("window means other than the stored 10-min aggregates need every "
                         "second")
    out: dict[str, Any] = {"compliance": None, "overvoltage": None, "profile": None,
                           "inverter": None, "supply": {}, "standard": None}
    if nominal is None:
        return out
    standard = standard_for(nominal.volts, hz)
    out["standard"] = standard
    verdict, judged = compliance(standard, nominal, point, trend, ten_min, window_s)
    c = verdict.as_dict()
    c["summary"] = summarise(c)
    out["compliance"] = c
    band = service_band(nominal.volts, standard, point)
    if judged is not None:
        out["profile"] = voltage_profile(judged[0], judged[1], band,
                                         window_s=600.0 if standard != "ansi" else window_s,
                                         nominal_v=nominal.volts).as_dict()
    if trend is not None and seconds is not None:
        ov = overvoltage_summary(trend["t"], trend["mean"], trend["peak"], nominal.volts,
                                 ten_min_means_v=ten_min.rms.ravel() if ten_min.size else None,
                                 max_per_day_v=seconds.max_per_day())
        ov["flagged_seconds"] = seconds.flagged
        out["overvoltage"] = ov
    elif ten_min.size:
        out["overvoltage"] = overvoltage_summary(np.empty(0), np.empty((0, 1)), None,
                                                 nominal.volts,
                                                 ten_min_means_v=ten_min.rms.ravel())
    inputs = event_inputs(events)
    if inputs or trend is not None or ten_min.size:
        out["inverter"] = inverter_trips(
            inputs, nominal.volts, category=inverter_category,
            per_second=None if trend is None else (trend["t"], trend["mean"]),
            ten_min=(ten_min.t + 600.0, ten_min.rms) if ten_min.size else None,
            en50549=standard == "en50160").as_dict()
    channels = channel_count(seconds, ten_min)
    service = str(model.get("service_type") or service_for_channels(max(1, channels)))
    out["supply"] = supply_verdicts(seconds, ten_min, hz, service, channels, thd_max_order)
    return out


def period_reasons(section: Mapping[str, Any]) -> list[str]:
    """What happened in the period that a property manager or installer should look at."""
    reasons = []
    c = section.get("compliance")
    if c is not None and c.get("passed") is False:
        if c.get("verdict") == "range_b":
            reasons.append(f"outside ANSI C84.1 Range A {c['point']} (within Range B) on "
                           f"{c['basis']['values']}")
        elif c.get("verdict") == "outside_b":
            reasons.append(f"outside ANSI C84.1 Range B {c['point']} on {c['basis']['values']}")
        else:
            reasons.append(f"fails {c['rule']}")
    if c is not None and c.get("verdict") == "undetermined":
        reasons.append("compliance undetermined: nominal inferred; declare it with --nominal")
    for e in ((c or {}).get("excursions") or {}).get("longer_than_60s", []):
        beyond = "Range B" if e.get("outside_b") else "Range A"
        reasons.append(f"{e['extreme_v']:.1f} V for {e['duration_s']:.0f} s from {e['start']} "
                       f"(outside {beyond}, sustained > 1 min)")
    inv = section.get("inverter")
    if inv is not None:
        # Overvoltage trips are the installer's concern; undervoltage ones follow the sags and
        # interruptions already listed.
        over = [e["start"] for e in inv["per_event"]
                if e["kind"] == "swell" and e["result"] != "ride_through"]
        over += [e["start"] for e in inv["sustained"] if e["setting"].startswith("OV")]
        en = inv.get("en50549_1") or {}
        if en.get("above"):
            over.append(en["first_above"])
        if over:
            days = sorted({str(t)[:10] for t in over if t})
            reasons.append(f"overvoltage would trip an inverter ({inv['rule']}) on "
                           f"{', '.join(days)}")
    if section.get("power_loss_events"):
        reasons.append("monitor lost power (event closed by power loss)")
    elif section.get("interruptions"):
        reasons.append("supply interrupted")
    if section.get("partial_outages"):
        reasons.append("partial outage (a leg or phase lost)")
    return reasons


__all__ = ["EMPTY_TEN_MIN", "TenMin", "channel_count", "device_verdicts", "dip_duration", "iso",
           "period_reasons", "pick_nominal", "summarise"]
