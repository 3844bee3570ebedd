"""Nominal-voltage inference for a home that declared none, and the guard that keeps an
inferred nominal from turning a fail into a pass.

Rule (common practice; the nominal systems are IEC 60038 and ANSI C84.1's): the candidates
are the line-to-neutral nominals in use *for the detected frequency and the service type*;
the frequency's usual nominal (120 V at 60 Hz, 230 V at 50 Hz) is taken unless the median
lies outside its ±10 %, in which case the nearest candidate is. The result is always marked
``inferred``. A verdict judged on an inferred nominal that passes, while a verdict on another
plausible candidate (within ±10 % of the median) fails, is reported as ``undetermined`` with
``passed`` None and a note to declare the nominal (``--nominal``).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

from agent.verdicts.base import Verdict

#: Line-to-neutral nominals [V] by (frequency, service type); the first is the usual one.
CANDIDATES: dict[tuple[float, str], tuple[float, ...]] = {
    (60.0, "120/240"): (120.0,),
    (60.0, "120/208"): (120.0,),
    (60.0, "1ph"): (120.0, 127.0, 110.0, 100.0),
    (60.0, "3ph"): (120.0, 127.0, 277.0),
    (50.0, "1ph"): (230.0, 220.0, 240.0, 100.0),
    (50.0, "3ph"): (230.0, 220.0, 240.0),
    (50.0, "120/240"): (230.0, 240.0),
    (50.0, "120/208"): (230.0,),
}
#: A candidate is plausible for a median within this share of it (EN 50160 ±10 % band).
PLAUSIBLE = 0.10
_EPS = 1e-9  # 253 / 230 - 1 is 0.1000000000000001 in float64: on the edge is inside


def service_for_channels(channels: int) -> str:
    """The service type a channel count implies when no site model says (2: split phase)."""
    return {1: "1ph", 2: "120/240", 3: "3ph"}.get(channels, "3ph")


@dataclass(frozen=True)
class Nominal:
    """A nominal [V] with where it came from: ``declared``, ``from events``, ``assumed``
    (``--nominal``), ``inferred``; ``candidates`` the plausible ones when inferred."""

    volts: float
    source: str
    candidates: tuple[float, ...] = ()

    @property
    def inferred(self) -> bool:
        return self.source == "inferred"


def infer_nominal(median_v: float, nominal_hz: float, service_type: str) -> Nominal:
    """The nominal [V] of a home from its median RMS [V], frequency [Hz] and service type.

    References
    ----------
    IEC 60038 / ANSI C84.1 nominal systems; the choice rule is common practice.
    """
    if not (math.isfinite(median_v) and median_v > 0):
        raise ValueError(f"median voltage must be > 0, got {median_v!r}")
    hz = 60.0 if abs(nominal_hz - 60.0) < abs(nominal_hz - 50.0) else 50.0
    cands = CANDIDATES.get((hz, service_type), CANDIDATES[(hz, "1ph")])
    usual = cands[0]
    if abs(median_v / usual - 1.0) <= PLAUSIBLE + _EPS:
        chosen = usual
    else:
        chosen = min(cands, key=lambda n: abs(math.log(median_v / n)))
    plausible = tuple(n for n in cands if abs(median_v / n - 1.0) <= PLAUSIBLE + _EPS)
    return Nominal(chosen, "inferred", plausible or (chosen,))


def guard_inferred(verdict: Verdict, nominal: Nominal,
                   judge: Callable[[float], Verdict]) -> Verdict:
    """A verdict judged on an inferred nominal that passes, checked against every other
    plausible candidate with ``judge(nominal_v)``: if any fails, the answer is
    ``undetermined`` (``passed`` None), naming both nominals. A fail stays a fail."""
    if not nominal.inferred:
        return verdict
    notes = [f"nominal {nominal.volts:g} V inferred (not declared): declare it with --nominal"]
    if verdict.passed is True:
        for other in nominal.candidates:
            if other == nominal.volts:
                continue
            alt = judge(other)
            if alt.passed is False:
                notes.append(f"passes against the inferred {nominal.volts:g} V but fails "
                             f"against {other:g} V ({alt.verdict})")
                return Verdict(rule=verdict.rule, verdict="undetermined", passed=None,
                               confidence=verdict.confidence,
                               basis={**verdict.basis, "nominal_inferred": True},
                               details={**verdict.details, "verdict_on_inferred":
                                        verdict.verdict, "fails_against_v": other},
                               notes=(*verdict.notes, *notes))
    return Verdict(rule=verdict.rule, verdict=verdict.verdict, passed=verdict.passed,
                   confidence=verdict.confidence,
                   basis={**verdict.basis, "nominal_inferred": True},
                   details=dict(verdict.details), notes=(*verdict.notes, *notes))
