"""Service-voltage bands: the one table of limits the verdicts, alerts and pages share.

Values and confidence (``tests/SOURCES.md``, "Service-voltage ranges" and "EN 50160"):
ANSI C84.1 Range A *service* 114–126 V on a 120 V base is from public summaries of the
standard; Range A utilization 108–125 V and both Range B rows are from memory. EN 50160's
±10 % band (95 % of each week) and +10 % / −15 % (all 10-min means) are from public summaries.
Values equal to a limit are inside.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from agent.verdicts.base import Confidence

#: ANSI C84.1 limits on a 120 V base [V]: (range, point of delivery) → (low, high).
ANSI_C84_1_120V: dict[tuple[str, str], tuple[float, float]] = {
    ("A", "service"): (114.0, 126.0),
    ("A", "utilization"): (108.0, 125.0),
    ("B", "service"): (110.0, 127.0),
    ("B", "utilization"): (104.0, 127.0),
}
ANSI_CONFIDENCE: dict[tuple[str, str], Confidence] = {
    ("A", "service"): "pub",
    ("A", "utilization"): "mem",
    ("B", "service"): "mem",
    ("B", "utilization"): "mem",
}
#: ``measurement_point`` of agent.site.Site → the ANSI C84.1 point of delivery it stands for.
POINT_FOR_MEASUREMENT = {"service": "service", "outlet": "utilization"}

#: EN 50160 LV supply voltage [pu of Un] (public summaries of EN 50160).
EN50160_BAND_PU = (0.90, 1.10)
EN50160_ALL_PU = (0.85, 1.10)


@dataclass(frozen=True)
class Band:
    """A voltage band [V] with the rule it comes from."""

    low_v: float
    high_v: float
    rule: str
    confidence: Confidence

    def contains(self, value_v: float) -> bool:
        return self.low_v <= value_v <= self.high_v


def standard_for(nominal_v: float, nominal_hz: float | None) -> str:
    """``ansi`` for 60-Hz (North American) supplies, ``en50160`` for 50-Hz ones; without a
    frequency, by voltage (below 200 V: ANSI). Common practice."""
    if nominal_hz is not None:
        return "ansi" if nominal_hz == 60.0 else "en50160"
    return "ansi" if nominal_v < 200.0 else "en50160"


def ansi_band(nominal_v: float, range_name: str, measurement_point: str) -> Band:
    """ANSI C84.1 Range A or B [V] scaled from the 120 V base to ``nominal_v``.

    ``measurement_point`` ``service`` (service entrance) takes the service-voltage limits,
    ``outlet`` (downstream of branch wiring) the utilization-voltage limits.

    References
    ----------
    ANSI C84.1, Range A service 114–126 V on 120 V (public summaries); Range A utilization
    108–125 V, Range B service 110–127 V and utilization 104–127 V (from memory).
    """
    point = POINT_FOR_MEASUREMENT.get(measurement_point)
    if point is None:
        raise ValueError(f"measurement_point must be one of {tuple(POINT_FOR_MEASUREMENT)}, "
                         f"got {measurement_point!r}")
    if range_name not in ("A", "B"):
        raise ValueError(f"ANSI C84.1 range must be A or B, got {range_name!r}")
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    low, high = ANSI_C84_1_120V[(range_name, point)]
    scale = nominal_v / 120.0
    return Band(low * scale, high * scale, f"ANSI C84.1 Range {range_name} {point}",
                ANSI_CONFIDENCE[(range_name, point)])


def en50160_band(nominal_v: float, *, all_values: bool = False) -> Band:
    """EN 50160 LV band [V]: Un ±10 % (95 % of each week's 10-min means), or with
    ``all_values`` +10 % / −15 % (every 10-min mean).

    References
    ----------
    EN 50160, supply voltage variations for LV (public summaries).
    """
    if not (math.isfinite(nominal_v) and nominal_v > 0):
        raise ValueError(f"nominal_v must be > 0, got {nominal_v!r}")
    lo, hi = EN50160_ALL_PU if all_values else EN50160_BAND_PU
    rule = ("EN 50160 all 10-min means within +10 %/-15 % Un" if all_values
            else "EN 50160 10-min means within ±10 % Un")
    return Band(lo * nominal_v, hi * nominal_v, rule, "pub")


def service_band(nominal_v: float, standard: str, measurement_point: str = "service") -> Band:
    """The band a single 10-min mean is held against "now": ANSI C84.1 Range A at the
    measurement point for ``ansi``, EN 50160 ±10 % for ``en50160``."""
    if standard == "ansi":
        return ansi_band(nominal_v, "A", measurement_point)
    if standard == "en50160":
        return en50160_band(nominal_v)
    raise ValueError(f"standard must be ansi or en50160, got {standard!r}")
