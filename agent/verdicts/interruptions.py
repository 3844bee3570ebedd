"""Interruption statistics: EN 50160 short/long counts and IEEE 1366 reliability indices over
the monitored homes, from outage windows (a home without supply from start to end).

* EN 50160: short interruptions last up to 3 min, long ones longer (public summaries).
* IEEE 1366: a sustained interruption lasts longer than 5 min (pub); SAIFI = customer
  interruptions / customers served, SAIDI = customer-minutes / customers served,
  CAIDI = SAIDI / SAIFI, MAIFI = momentary (≤ 5 min) customer interruptions / customers
  served (pub). Here a customer is a monitored home. IEEE 1366 leaves out major event days;
  with a handful of homes no day can be separated: all days count (common practice).
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from typing import Any

from agent.verdicts.base import Verdict

EN50160_SHORT_MAX_S = 180.0
IEEE1366_SUSTAINED_S = 300.0


def merge_windows(windows: Iterable[Mapping[str, Any]]) -> list[dict[str, Any]]:
    """One home's overlapping or touching windows (``device``, ``start_utc``, ``end_utc``)
    become one; returns windows sorted by (device, start)."""
    out: list[dict[str, Any]] = []
    for w in sorted(windows, key=lambda w: (str(w["device"]), float(w["start_utc"]))):
        last = out[-1] if out else None
        if last is not None and last["device"] == w["device"] \
                and float(w["start_utc"]) <= last["end_utc"]:
            last["end_utc"] = max(last["end_utc"], float(w["end_utc"]))
        else:
            out.append({"device": w["device"], "start_utc": float(w["start_utc"]),
                        "end_utc": float(w["end_utc"])})
    return out


def interruption_stats(windows: Iterable[Mapping[str, Any]], homes_monitored: int) -> Verdict:
    """EN 50160 counts and IEEE 1366 indices over one period.

    Parameters
    ----------
    windows : mappings with ``device``, ``start_utc``, ``end_utc`` [s]: each a home without
        supply (overlapping windows of one home are merged first)
    homes_monitored : int  customers served (N_T), homes monitored in the period

    Returns
    -------
    Verdict ``computed`` (descriptive: no limit applies; ``passed`` None) with ``details``
    ``en50160`` {short, long}, ``ieee1366`` {SAIFI, SAIDI_min, CAIDI_min, MAIFI,
    sustained, momentary}, ``per_home``.

    References
    ----------
    EN 50160 interruption definitions; IEEE 1366 indices and the 5-min threshold (pub).
    """
    if homes_monitored < 0:
        raise ValueError("homes_monitored must be >= 0")
    merged = merge_windows(windows)
    short = [w for w in merged if w["end_utc"] - w["start_utc"] <= EN50160_SHORT_MAX_S]
    sustained = [w for w in merged if w["end_utc"] - w["start_utc"] > IEEE1366_SUSTAINED_S]
    momentary = [w for w in merged if w["end_utc"] - w["start_utc"] <= IEEE1366_SUSTAINED_S]
    minutes = sum(w["end_utc"] - w["start_utc"] for w in sustained) / 60.0
    n = homes_monitored
    saifi = len(sustained) / n if n else None
    saidi = minutes / n if n else None
    per_home: dict[str, dict[str, Any]] = {}
    for w in merged:
        h = per_home.setdefault(str(w["device"]), {"short": 0, "long": 0, "sustained": 0,
                                                   "momentary": 0, "minutes": 0.0})
        d = w["end_utc"] - w["start_utc"]
        h["short" if d <= EN50160_SHORT_MAX_S else "long"] += 1
        h["sustained" if d > IEEE1366_SUSTAINED_S else "momentary"] += 1
        h["minutes"] = round(h["minutes"] + d / 60.0, 3)
    return Verdict(
        rule="EN 50160 short (≤ 3 min) / long interruptions; IEEE 1366 SAIFI, SAIDI, CAIDI, "
             "MAIFI (sustained > 5 min)", verdict="computed", passed=None, confidence="pub",
        basis={"values": "outage windows (power loss reports, interruption events)",
               "windows": len(merged), "homes_monitored": n,
               "period": "windows as given (the caller's period; not clipped)",
               "customers": "monitored homes", "major_event_days": "not separated"},
        details={"en50160": {"short": len(short), "long": len(merged) - len(short)},
                 "ieee1366": {"SAIFI": None if saifi is None else round(saifi, 4),
                              "SAIDI_min": None if saidi is None else round(saidi, 3),
                              "CAIDI_min": round(minutes / len(sustained), 3)
                              if sustained else None,
                              "MAIFI": round(len(momentary) / n, 4) if n else None,
                              "sustained": len(sustained), "momentary": len(momentary)},
                 "per_home": per_home})
