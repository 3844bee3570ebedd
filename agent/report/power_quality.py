"""Harmonics and flicker sections for a device's report and for ``halfcycle analyze --json``.

One place that turns 10-min aggregates (the engine's :class:`Aggregate` objects, or stored
aggregate payloads) into the ``harmonics`` and ``flicker`` sections; the verdicts themselves
live in :mod:`agent.verdicts.harmonics` and :mod:`agent.verdicts.flicker`, and renderers only
show these dicts.
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from typing import Any

import numpy as np

from agent.measurement.types import Aggregate
from agent.verdicts.flicker import en50160_flicker
from agent.verdicts.harmonics import harmonic_verdicts
from agent.wire.codec import aggregate_from_message

#: 10/12-cycle values in a whole 10-min interval (3000 at 50 and at 60 Hz); an interval with
#: fewer than 99.5 % of them is incomplete (start or end of a recording, a gap).
FULL_COUNT = 2985


def _num(x: float, nd: int = 4) -> float | None:
    return None if x is None or not math.isfinite(x) else round(float(x), nd)


def analysis_sections(ten_min: Iterable[Aggregate]) -> dict[str, Any]:
    """``flicker`` (one entry per complete 10-min interval: ``t``, ``pst`` per channel,
    ``flagged``) and ``plt`` (at the 2-h marks) for ``halfcycle analyze --json``."""
    flicker: list[dict[str, Any]] = []
    plt: list[dict[str, Any]] = []
    for agg in ten_min:
        if agg.kind != "10min" or not agg.pst or agg.count < FULL_COUNT:
            continue
        flicker.append({"t": round(agg.t_utc, 3), "pst": [_num(v) for v in agg.pst],
                        "flagged": bool(agg.flicker_flagged)})
        if agg.plt is not None and any(math.isfinite(v) for v in agg.plt):
            plt.append({"t": round(agg.t_utc + agg.duration_s, 3),
                        "plt": [_num(v) for v in agg.plt]})
    return {"flicker": flicker, "plt": plt}


def device_sections(payloads: Sequence[Mapping[str, Any]],
                    channel_names: Sequence[str] | None = None) -> dict[str, Any]:
    """``harmonics`` and ``flicker`` sections of one device from its stored 10-min aggregate
    payloads (schema v2; v1 payloads carry neither and give ``no_data``): per channel the
    EN 50160 / IEEE 519 harmonic verdicts and the EN 50160 flicker verdict, as dicts."""
    aggs = [aggregate_from_message(p) for p in payloads
            if p.get("kind") == "10min" and ("harmonics" in p or "flicker" in p)]
    names = list(channel_names or (payloads[0].get("channels", []) if payloads else []))
    per_h: dict[str, tuple[np.ndarray, np.ndarray]] = {}
    harm: dict[str, Any] = {}
    flick: dict[str, Any] = {}
    for c, name in enumerate(names):
        rows = [a.harmonics[c] for a in aggs if len(a.harmonics) > c and a.harmonics[c]
                and not a.flagged]
        thd = [a.thd[c] for a in aggs if len(a.thd) > c and len(a.harmonics) > c
               and a.harmonics[c] and not a.flagged]
        width = max((len(r) for r in rows), default=39)
        h = np.full((len(rows), width), np.nan)
        for i, r in enumerate(rows):
            h[i, :len(r)] = r
        per_h[name] = (h, np.asarray(thd, dtype=np.float64))
        pst = [a.pst[c] for a in aggs if len(a.pst) > c and not a.flicker_flagged]
        plt = [a.plt[c] for a in aggs if a.plt is not None and len(a.plt) > c
               and not a.flicker_flagged]
        flick[name] = en50160_flicker(np.asarray(plt, float), np.asarray(pst, float)).as_dict()
    for name, verdicts in harmonic_verdicts(per_h).items():
        harm[name] = [v.as_dict() for v in verdicts]
    # The report and analyze say INDICATIVE once at their top, for every verdict in them.
    return {"harmonics": {"channels": harm}, "flicker": {"channels": flick}}
