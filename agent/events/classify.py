"""Classification of RMS events against published tables and curves.

A pure library (no I/O): the edge agent tags each ended event, and the collector reuses it to
re-classify stored events. Every boundary used lives in ONE table, :data:`BOUNDARY_RULES`;
the code only evaluates it, and :func:`boundary_table_markdown` renders it for the docs.

Schemes
-------
- ``ieee1159``: IEEE 1159 category and duration class (IEEE 1159-2009 Table 2).
  Which row applies follows the magnitude: a dip whose residual is below 0.1 pu is an
  interruption in IEEE 1159 terms even if the detector (EN 50160 5 % threshold) called it a
  dip. Where the table has no category the result is ``unclassified``.
- ``itic``: ITIC (CBEMA) curve, 2000 revision. For RMS events only the part from 20 ms on is
  used: below 20 ms the lower curve is at 0 % and the upper one at 120 % (the 140/200/500 %
  left edge is for peak/transient values, not RMS).
- ``semi_f47``: SEMI F47 ride-through curve, sags only, 50 ms to 1 s; ``inside`` = the
  equipment must ride through, ``outside`` = deeper or longer than required; None where F47
  says nothing (swells, below 50 ms, beyond 1 s).
- ``en50160_dip`` / ``en50160_swell``: row and column of the IEC 61000-2-8 / EN 50160
  tables (the 5 > u row holds short interruptions).
- ``ieee1564_curve``: the reference curve of the IEEE 1564 sag severity
  Se = (1 − V) / (1 − V_curve(d)); None outside 20 ms–10 s and for swells.

Magnitudes are in pu of Udin (residual for dips/interruptions, maximum for swells),
durations in seconds or cycles of ``nominal_hz``. Closed bounds use a tolerance of 1e-6 (in
pu, seconds or cycles) so that e.g. 0.5 cycle computed as 0.5 / 60 · 60 still counts as 0.5,
and a duration taken as the difference of two present-day UTC floats (which resolve only
about 0.24 µs) lands on the side of the bound it was measured on.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Any, Literal

from agent.events.types import Event

CLASSIFIER_VERSION = "1.1.0"  # 1.1: IEEE 1159 upper bounds kept; dip duration for dip tables

Direction = Literal["low", "high"]
_EPS = 1e-6


@dataclass(frozen=True)
class Interval:
    """An interval with open/closed ends; bounds in ``s``, ``ms``, ``cyc`` or ``pu``."""

    lo: float
    lo_unit: str
    lo_closed: bool
    hi: float
    hi_unit: str
    hi_closed: bool
    text: str

    @classmethod
    def parse(cls, text: str) -> Interval:
        """``"[0.5 cyc, 3 s)"``, ``"(1.1, 1.8]"`` (pu), ``"(60 s, inf)"``."""
        m = re.fullmatch(r"\s*([\[(])\s*([^,]+),\s*([^\])]+)([\])])\s*", text)
        if m is None:
            raise ValueError(f"bad interval {text!r}")

        def bound(s: str) -> tuple[float, str]:
            parts = s.split()
            value = math.inf if parts[0] == "inf" else float(parts[0])
            return value, parts[1] if len(parts) > 1 else "pu"

        lo, lo_unit = bound(m.group(2))
        hi, hi_unit = bound(m.group(3))
        return cls(lo, lo_unit, m.group(1) == "[", hi, hi_unit, m.group(4) == "]", text.strip())

    @staticmethod
    def _value(x: float, unit: str, hz: float) -> float:
        """Bound in the quantity's base unit: seconds for durations, pu for magnitudes."""
        if unit == "ms":
            return x / 1000.0
        if unit == "cyc":
            return x / hz
        return x

    def contains(self, x: float, hz: float = 50.0) -> bool:
        lo = self._value(self.lo, self.lo_unit, hz)
        hi = self._value(self.hi, self.hi_unit, hz)
        # The tolerance is taken in the bound's own unit (cycles for cycle bounds).
        lo_eps = _EPS / hz if self.lo_unit == "cyc" else _EPS
        hi_eps = _EPS / hz if self.hi_unit == "cyc" else _EPS
        above_lo = x >= lo - lo_eps if self.lo_closed else x > lo + lo_eps
        below_hi = x <= hi + hi_eps if self.hi_closed else x < hi - hi_eps
        return above_lo and below_hi


@dataclass(frozen=True)
class Rule:
    """One row of :data:`BOUNDARY_RULES`: in ``scheme``, an event of ``direction`` whose
    duration and magnitude fall in the intervals gets ``outcome`` (and ``detail``/``value``)."""

    scheme: str
    direction: Direction
    duration: Interval
    magnitude: Interval
    outcome: str
    detail: str = ""
    value: float | None = None
    source: str = ""


def _r(scheme: str, direction: Direction, duration: str, magnitude: str, outcome: str,
       detail: str = "", value: float | None = None, source: str = "") -> Rule:
    return Rule(scheme, direction, Interval.parse(duration), Interval.parse(magnitude),
                outcome, detail, value, source)


_1159 = "IEEE 1159-2009 Table 2 (pub)"
# The table writes 30 cycles in both the instantaneous and the momentary row; read like its
# explicit "> 3 s" and "> 1 min": the shorter class keeps its upper bound.
_1159_30 = _1159 + "; exactly 30 cyc read as instantaneous (project reading of the table)"
_ITIC = "ITIC curve, 2000 revision (pub)"
_F47 = "SEMI F47 (pub)"
_EN = "IEC 61000-2-8 / EN 50160 dip table (pub)"
_ENS = "EN 50160 swell table (from memory)"
_1564 = "IEEE 1564-2014 reference curve (from memory)"
_ANY = "[0, inf)"

#: Every boundary the classifier uses. First matching rule of a scheme wins. ``[``/``]`` =
#: bound included, ``(``/``)`` = excluded. Units: cyc (cycles of nominal_hz), ms, s; pu.
BOUNDARY_RULES: tuple[Rule, ...] = (
    # IEEE 1159: interruptions (there is no instantaneous interruption). Each class keeps its
    # upper bound: the table writes "> 3 s - 1 min" and "> 1 min".
    _r("ieee1159", "low", "[0.5 cyc, 3 s]", "[0, 0.1)", "interruption", "momentary", None, _1159),
    _r("ieee1159", "low", "(3 s, 60 s]", "[0, 0.1)", "interruption", "temporary", None, _1159),
    _r("ieee1159", "low", "(60 s, inf)", "[0, 0.1)", "interruption", "sustained", None,
       _1159 + "; table gives 0.0 pu, < 0.1 pu accepted as measured zero (common practice)"),
    # IEEE 1159: sags and undervoltage
    _r("ieee1159", "low", "[0.5 cyc, 30 cyc]", "[0.1, 0.9)", "sag", "instantaneous", None,
       _1159_30),
    _r("ieee1159", "low", "(30 cyc, 3 s]", "[0.1, 0.9)", "sag", "momentary", None, _1159_30),
    _r("ieee1159", "low", "(3 s, 60 s]", "[0.1, 0.9)", "sag", "temporary", None, _1159),
    _r("ieee1159", "low", "(60 s, inf)", "[0.8, 0.9)", "undervoltage", "sustained", None, _1159),
    # IEEE 1159: swells and overvoltage
    _r("ieee1159", "high", "[0.5 cyc, 30 cyc]", "(1.1, 1.8]", "swell", "instantaneous", None,
       _1159_30),
    _r("ieee1159", "high", "(30 cyc, 3 s]", "(1.1, 1.4]", "swell", "momentary", None, _1159_30),
    _r("ieee1159", "high", "(3 s, 60 s]", "(1.1, 1.2]", "swell", "temporary", None, _1159),
    _r("ieee1159", "high", "(60 s, inf)", "(1.1, 1.2]", "overvoltage", "sustained", None, _1159),
    # IEEE 1159 duration class alone, for events the category table leaves unclassified
    _r("ieee1159_duration", "low", "[0.5 cyc, 30 cyc]", _ANY, "instantaneous", "", None,
       _1159_30),
    _r("ieee1159_duration", "low", "(30 cyc, 3 s]", _ANY, "momentary", "", None, _1159_30),
    _r("ieee1159_duration", "low", "(3 s, 60 s]", _ANY, "temporary", "", None, _1159),
    _r("ieee1159_duration", "low", "(60 s, inf)", _ANY, "sustained", "", None, _1159),
    _r("ieee1159_duration", "high", "[0.5 cyc, 30 cyc]", _ANY, "instantaneous", "", None,
       _1159_30),
    _r("ieee1159_duration", "high", "(30 cyc, 3 s]", _ANY, "momentary", "", None, _1159_30),
    _r("ieee1159_duration", "high", "(3 s, 60 s]", _ANY, "temporary", "", None, _1159),
    _r("ieee1159_duration", "high", "(60 s, inf)", _ANY, "sustained", "", None, _1159),
    # ITIC 2000, lower curve (RMS part); on the curve counts as inside
    _r("itic", "low", "[0 s, 20 ms]", _ANY, "no_interruption", "", None, _ITIC),
    _r("itic", "low", "(20 ms, 0.5 s]", "[0.7, inf)", "no_interruption", "", None, _ITIC),
    _r("itic", "low", "(20 ms, 0.5 s]", "[0, 0.7)", "no_damage", "", None, _ITIC),
    _r("itic", "low", "(0.5 s, 10 s]", "[0.8, inf)", "no_interruption", "", None, _ITIC),
    _r("itic", "low", "(0.5 s, 10 s]", "[0, 0.8)", "no_damage", "", None, _ITIC),
    _r("itic", "low", "(10 s, inf)", "[0.9, inf)", "no_interruption", "", None, _ITIC),
    _r("itic", "low", "(10 s, inf)", "[0, 0.9)", "no_damage", "", None, _ITIC),
    # ITIC 2000, upper curve (RMS part: 120 % up to 0.5 s, then 110 %)
    _r("itic", "high", "[0 s, 0.5 s]", "[0, 1.2]", "no_interruption", "", None, _ITIC),
    _r("itic", "high", "[0 s, 0.5 s]", "(1.2, inf)", "prohibited", "", None, _ITIC),
    _r("itic", "high", "(0.5 s, inf)", "[0, 1.1]", "no_interruption", "", None, _ITIC),
    _r("itic", "high", "(0.5 s, inf)", "(1.1, inf)", "prohibited", "", None, _ITIC),
    # SEMI F47 (sags only; nothing required below 50 ms, not defined beyond 1 s)
    _r("semi_f47", "low", "[50 ms, 200 ms]", "[0.5, inf)", "inside", "", None, _F47),
    _r("semi_f47", "low", "[50 ms, 200 ms]", "[0, 0.5)", "outside", "", None, _F47),
    _r("semi_f47", "low", "(200 ms, 500 ms]", "[0.7, inf)", "inside", "", None, _F47),
    _r("semi_f47", "low", "(200 ms, 500 ms]", "[0, 0.7)", "outside", "", None, _F47),
    _r("semi_f47", "low", "(500 ms, 1 s]", "[0.8, inf)", "inside", "", None, _F47),
    _r("semi_f47", "low", "(500 ms, 1 s]", "[0, 0.8)", "outside", "", None, _F47),
    # IEC 61000-2-8 / EN 50160 dip table: rows (residual) and columns (duration)
    _r("en50160_dip.row", "low", _ANY, "[0.8, 0.9)", "R1", "90 > u ≥ 80 %", None, _EN),
    _r("en50160_dip.row", "low", _ANY, "[0.7, 0.8)", "R2", "80 > u ≥ 70 %", None, _EN),
    _r("en50160_dip.row", "low", _ANY, "[0.4, 0.7)", "R3", "70 > u ≥ 40 %", None, _EN),
    _r("en50160_dip.row", "low", _ANY, "[0.05, 0.4)", "R4", "40 > u ≥ 5 %", None, _EN),
    _r("en50160_dip.row", "low", _ANY, "[0, 0.05)", "R5", "5 > u %", None, _EN),
    _r("en50160_dip.column", "low", "[10 ms, 200 ms]", _ANY, "C1", "10 ≤ t ≤ 200 ms", None, _EN),
    _r("en50160_dip.column", "low", "(200 ms, 500 ms]", _ANY, "C2", "200 < t ≤ 500 ms", None,
       _EN),
    _r("en50160_dip.column", "low", "(500 ms, 1 s]", _ANY, "C3", "0.5 < t ≤ 1 s", None, _EN),
    _r("en50160_dip.column", "low", "(1 s, 5 s]", _ANY, "C4", "1 < t ≤ 5 s", None, _EN),
    _r("en50160_dip.column", "low", "(5 s, 60 s]", _ANY, "C5", "5 < t ≤ 60 s", None, _EN),
    # EN 50160 swell table
    _r("en50160_swell.row", "high", _ANY, "[1.2, inf)", "S1", "u ≥ 120 %", None, _ENS),
    _r("en50160_swell.row", "high", _ANY, "(1.1, 1.2)", "S2", "120 > u > 110 %", None, _ENS),
    _r("en50160_swell.column", "high", "[10 ms, 500 ms]", _ANY, "T1", "10 ≤ t ≤ 500 ms", None,
       _ENS),
    _r("en50160_swell.column", "high", "(500 ms, 5 s]", _ANY, "T2", "0.5 < t ≤ 5 s", None, _ENS),
    _r("en50160_swell.column", "high", "(5 s, 60 s]", _ANY, "T3", "5 < t ≤ 60 s", None, _ENS),
    # IEEE 1564 sag-severity reference curve V_curve(d)
    _r("ieee1564_curve", "low", "[20 ms, 200 ms]", _ANY, "curve", "", 0.5, _1564),
    _r("ieee1564_curve", "low", "(200 ms, 500 ms]", _ANY, "curve", "", 0.7, _1564),
    _r("ieee1564_curve", "low", "(500 ms, 10 s]", _ANY, "curve", "", 0.8, _1564),
)

_KIND_DIRECTION: dict[str, Direction] = {"dip": "low", "interruption": "low", "swell": "high"}

#: Which duration each scheme judges a dip or an interruption on. ``event``: the event's own
#: duration (for an interruption, the time below the interruption threshold); ``dip``: the
#: duration below the dip threshold (dip threshold to threshold + hysteresis, the enclosing
#: period of an interruption). Swells always use their own duration.
#:
#: - IEEE 1159-2009 Table 2 (pub): an interruption's class is the time the voltage stays
#:   below 0.1 pu ("interruption ... < 0.1 pu" with its own duration column): ``event``.
#: - IEC 61000-2-8 / EN 50160 dip table (pub): the 5 > u row holds the dips whose residual
#:   fell below 5 %, with the dip's duration (IEC 61000-4-30 Ed.3 cl. 5.4: below the dip
#:   threshold until threshold + hysteresis): ``dip``.
#: - IEEE 1564-2014 (from memory): an event is characterised by its residual voltage and the
#:   duration below the dip threshold; Se and the curve-based indices (SARFI-ITIC, -SEMI)
#:   use that pair: ``dip`` for ``ieee1564_curve``, ``itic`` and ``semi_f47``.
DURATION_BASIS: dict[str, Literal["event", "dip"]] = {
    "ieee1159": "event",
    "ieee1159_duration": "event",
    "itic": "dip",
    "semi_f47": "dip",
    "en50160_dip.row": "dip",
    "en50160_dip.column": "dip",
    "en50160_swell.row": "event",
    "en50160_swell.column": "event",
    "ieee1564_curve": "dip",
}


def _match(scheme: str, direction: Direction, level_pu: float, duration_s: float,
           hz: float) -> Rule | None:
    for rule in BOUNDARY_RULES:
        if (rule.scheme == scheme and rule.direction == direction
                and rule.duration.contains(duration_s, hz)
                and rule.magnitude.contains(level_pu, hz)):
            return rule
    return None


def classify(
    event_kind: str,
    level_pu: float,
    duration_s: float,
    nominal_hz: float,
    sag_energy_s: float | None = None,
    dip_duration_s: float | None = None,
) -> dict[str, Any]:
    """Classify one RMS event.

    Parameters
    ----------
    event_kind : str  ``dip``, ``interruption`` or ``swell``
    level_pu : float  [pu of Udin] residual (dips, interruptions) or maximum (swells)
    duration_s : float  [s] the event's own duration (an interruption's: below the
        interruption threshold)
    nominal_hz : float  [Hz] for the cycle-based IEEE 1159 bounds
    sag_energy_s : float, optional  [s] passed through (IEEE 1564 voltage-sag energy)
    dip_duration_s : float, optional  [s] duration below the dip threshold (an interruption's
        enclosing period); default ``duration_s``. Which scheme uses which:
        :data:`DURATION_BASIS`.

    Returns
    -------
    dict with ``ieee1159_category``, ``ieee1159_duration_class``, ``itic_region``,
    ``semi_f47``, ``en50160_dip_cell`` / ``_row`` / ``_column``, ``en50160_swell_cell`` /
    ``_row`` / ``_column``, ``ieee1564_severity``, ``sag_energy_s``, ``classifier_version``,
    and the two durations it judged on, ``event_duration_s`` and ``dip_duration_s`` (None for
    swells).

    References
    ----------
    IEEE 1159-2009 Table 2; ITIC curve (2000); SEMI F47; IEC 61000-2-8 / EN 50160;
    IEEE 1564-2014.
    """
    direction = _KIND_DIRECTION.get(event_kind)
    if direction is None:
        raise ValueError(f"event_kind must be dip, interruption or swell; got {event_kind!r}")
    if dip_duration_s is None or direction == "high":
        dip_duration_s = duration_s
    for name, v in (("level_pu", level_pu), ("duration_s", duration_s),
                    ("dip_duration_s", dip_duration_s)):
        if not (isinstance(v, int | float) and math.isfinite(v) and v >= 0):
            raise ValueError(f"{name} must be a finite number >= 0, got {v!r}")
    if not (isinstance(nominal_hz, int | float) and nominal_hz > 0):
        raise ValueError(f"nominal_hz must be > 0, got {nominal_hz!r}")
    hz = float(nominal_hz)
    durations = {"event": duration_s, "dip": dip_duration_s}

    def find(scheme: str) -> Rule | None:
        return _match(scheme, direction, level_pu, durations[DURATION_BASIS[scheme]], hz)

    cat = find("ieee1159")
    dur = find("ieee1159_duration")
    itic = find("itic")
    f47 = find("semi_f47")
    out: dict[str, Any] = {
        "classifier_version": CLASSIFIER_VERSION,
        "ieee1159_category": cat.outcome if cat else "unclassified",
        "ieee1159_duration_class": cat.detail if cat else (dur.outcome if dur else None),
        "itic_region": itic.outcome if itic else None,
        "semi_f47": f47.outcome if f47 else None,
    }
    for table in ("en50160_dip", "en50160_swell"):
        row, col = find(f"{table}.row"), find(f"{table}.column")
        if row is not None and col is not None:
            cell: tuple[str | None, ...] = (row.outcome + col.outcome, row.detail, col.detail)
        else:
            cell = (None, None, None)
        out[f"{table}_cell"], out[f"{table}_row"], out[f"{table}_column"] = cell
    curve = find("ieee1564_curve")
    out["ieee1564_severity"] = (
        (1.0 - level_pu) / (1.0 - curve.value) if curve and curve.value is not None else None
    )
    out["sag_energy_s"] = sag_energy_s if direction == "low" else None
    out["event_duration_s"] = duration_s
    out["dip_duration_s"] = dip_duration_s if direction == "low" else None
    return out


def classify_event(event: Event, nominal_hz: float) -> dict[str, Any]:
    """Classify an ended event and store the result in ``event.classification``."""
    duration = event.duration_s
    if duration is None:
        raise ValueError(f"event {event.event_id} is still open: no duration to classify")
    if event.kind == "rvc":         # rapid voltage change: its own small classification
        from agent.events.rvc import classify_rvc
        event.classification = classify_rvc(event)
        return event.classification
    dip = event.dip_duration_s
    result = classify(event.kind, event.level_pu, max(0.0, duration), nominal_hz,
                      event.sag_energy_s, None if dip is None else max(0.0, dip))
    event.classification = result
    return result


def boundary_table_markdown() -> str:
    """:data:`BOUNDARY_RULES` as a markdown table (``[``/``]`` included, ``(``/``)`` not)."""
    lines = [
        "| scheme | event | duration | magnitude [pu] | result | duration taken | source |",
        "|---|---|---|---|---|---|---|",
    ]
    for r in BOUNDARY_RULES:
        result = r.outcome
        if r.detail:
            result += f" ({r.detail})"
        if r.value is not None:
            result += f" = {r.value:g} pu"
        event = "dip / interruption" if r.direction == "low" else "swell"
        basis = ("below dip threshold" if r.direction == "low"
                 and DURATION_BASIS[r.scheme] == "dip" else "event's own")
        lines.append(f"| {r.scheme} | {event} | {r.duration.text} | {r.magnitude.text} | "
                     f"{result} | {basis} | {r.source} |")
    return "\n".join(lines) + "\n"
