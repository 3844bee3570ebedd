"""INVENTED history for ``halfcycle demo``: quiet days before the live run.

A labelled synthesiser: for each invented home it makes the 10-min aggregate messages an
agent would have sent over the past days (the same wire messages, built with the wire codec
and checked by the wire validator) and commits them through the recorder store's own batch
commit, so the profile and compliance views have something to show. Nothing in it happens
on the wire's sample path: every event of the demo still comes from samples through the real
pipeline during the live run. Epoch ``invented-history`` marks these messages in the store.

The shapes are invented, not measured: a daily swing with an evening low, a midday rise at
the home with rooftop solar on sunny days, small noise.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Sequence
from datetime import datetime, tzinfo
from typing import Any

import numpy as np

from agent.measurement.types import Aggregate
from agent.wire import codec
from agent.wire.validate import validate

EPOCH = "invented-history"
TEN_MIN_S = 600.0
#: 10/12-cycle values in a full 10-min interval at 60 Hz (3000; at 50 Hz also 3000).
FULL_COUNT = 3000


def _level_pu(role: dict[str, Any], hour: float, sunny: float, rng: np.random.Generator
              ) -> float:
    """Invented per-unit level of one home at a local hour of day."""
    base = float(role.get("level_pu", 1.0)) if role["role"] in ("solar", "plain") else 1.0
    if role["role"] == "solar":
        # The solar home's steady level includes its export at midday; at night it sits
        # lower. Its peak stays near the live run's level (inside ANSI C84.1 Range B).
        base -= 0.028
        base += 0.025 * sunny * max(0.0, math.sin(math.pi * (hour - 7.0) / 10.0)) \
            if 7.0 <= hour <= 17.0 else 0.0
    evening = -0.018 * math.exp(-((hour - 19.0) / 2.0) ** 2)  # evening load peak
    night = 0.008 * math.exp(-((hour - 3.5) / 2.5) ** 2)  # light load before dawn
    return base + evening + night + float(rng.normal(0.0, 0.0015))


def history_messages(devices: Sequence[str], roles: Sequence[dict[str, Any]], site: str,
                     nominal_v: float, end_utc: float, days: float,
                     tz: tzinfo, seed: int = 7) -> Iterator[dict[str, Any]]:
    """The invented 10-min aggregate messages of every home over ``days`` before
    ``end_utc`` (interval starts on 10-min ticks), each validated against the wire schema."""
    rng = np.random.default_rng(seed)
    last = math.floor(end_utc / TEN_MIN_S) * TEN_MIN_S - TEN_MIN_S
    n = int(days * 86400 / TEN_MIN_S)
    starts = [last - TEN_MIN_S * (n - 1 - i) for i in range(n)]
    sunny = {datetime.fromtimestamp(t, tz).date(): float(rng.uniform(0.3, 1.0))
             for t in starts}
    for device, role in zip(devices, roles, strict=True):
        for seq, t in enumerate(starts, 1):
            local = datetime.fromtimestamp(t + TEN_MIN_S / 2, tz)
            hour = local.hour + local.minute / 60.0
            pu = _level_pu(role, hour, sunny[local.date()], rng)
            legs = (pu * nominal_v, (pu + float(rng.normal(0.0, 0.001))) * nominal_v)
            agg = Aggregate(kind="10min", t_utc=t, duration_s=TEN_MIN_S,
                            rms=tuple(round(v, 3) for v in legs),
                            thd=(round(float(rng.uniform(0.018, 0.03)), 4),) * 2,
                            hz=None, flagged=False, count=FULL_COUNT)
            msg = {**codec.aggregate_body(agg, ("L1", "L2")), "device": device, "site": site,
                   "epoch": EPOCH, "seq": seq,
                   "clock": {"sync": "synced", "error_s": 0.005}}
            validate(msg)
            yield msg
