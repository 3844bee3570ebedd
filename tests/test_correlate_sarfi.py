"""SARFI indices (IEEE 1564-2014) on a hand-worked invented example."""

from __future__ import annotations

import pytest

from agent.collect.correlate import EventRecord, aggregate_temporal, sarfi

T0 = 1764600000.0  # invented


def ev(device: str, kind: str, level: float, duration: float | None,
       start: float = T0) -> EventRecord:
    return EventRecord(device=device, site="pilot", start_utc=start,
                       end_utc=None if duration is None else start + duration, kind=kind,
                       level_pu=level)


# Worked by hand. 10 homes monitored (N_T = 10). Events (one home each, Nᵢ = 1):
#   h1 dip 0.85 pu 0.1 s   h2 dip 0.65 pu 0.3 s   h3 dip 0.45 pu 0.1 s
#   h4 interruption 0.02 pu 2 s   h1 swell 1.15 pu 1 s   h5 swell 1.25 pu 0.1 s
# SARFI-X (IEEE 1564-2014: Σ Nᵢ / N_T, below X % for X < 100, above X % for X > 100):
#   X=90: 0.85, 0.65, 0.45, 0.02 → 4/10    X=80: 0.65, 0.45, 0.02 → 3/10
#   X=70: 0.65, 0.45, 0.02 → 3/10          X=50: 0.45, 0.02 → 2/10
#   X=10: 0.02 → 1/10                      X=110: 1.15, 1.25 → 2/10
#   X=120: 1.25 → 1/10                     X=140: none → 0
# SARFI-ITIC (ITIC 2000; lower 70 % for 20 ms-0.5 s, 80 % for 0.5-10 s; upper 120 % to
#   0.5 s, then 110 %): h1 dip 0.85@0.1 s inside; h2 0.65@0.3 s < 70 % out; h3 0.45@0.1 s
#   out; h4 0.02@2 s < 80 % out → sag side (IEEE 1564 SARFI-ITIC, a sag index) 3 events,
#   3/10. Swell side, reported apart: h1 swell 1.15@1 s > 110 % out; h5 1.25@0.1 s > 120 %
#   out → 2 events, 2/10.
# SARFI-SEMI (SEMI F47: 50 % to 0.2 s, 70 % to 0.5 s, 80 % to 1 s; sags only): h1 inside;
#   h2 0.65@0.3 s < 70 % out; h3 0.45@0.1 s < 50 % out; h4 lasts 2 s, beyond F47 → not
#   counted; swells not in F47 → 2 events, 2/10.
WORKED = [ev("h1", "dip", 0.85, 0.1), ev("h2", "dip", 0.65, 0.3), ev("h3", "dip", 0.45, 0.1),
          ev("h4", "interruption", 0.02, 2.0), ev("h1", "swell", 1.15, 1.0),
          ev("h5", "swell", 1.25, 0.1)]


def test_worked_example() -> None:
    result = sarfi(WORKED, homes_monitored=10)
    assert result.counts == {140: 0, 120: 1, 110: 2, 90: 4, 80: 3, 70: 3, 50: 2, 10: 1}
    assert result.index == pytest.approx({140: 0.0, 120: 0.1, 110: 0.2, 90: 0.4, 80: 0.3,
                                          70: 0.3, 50: 0.2, 10: 0.1})
    assert (result.itic_count, result.itic) == (3, 0.3)
    assert (result.itic_swell_count, result.itic_swell) == (2, 0.2)
    assert (result.semi_count, result.semi) == (2, 0.2)
    assert result.skipped_open == 0


def test_on_the_curve_counts_as_inside() -> None:
    # ITIC 2000: exactly 70 % for 0.3 s lies on the lower boundary (no-interruption region),
    # 50 % for 0.2 s is below it; SEMI F47: 70 % for 0.3 s and 50 % for 0.2 s are both on
    # the ride-through curve (inside). Start near 0 s so 0.2 s stays 0.2 s in float64.
    result = sarfi([ev("a", "dip", 0.70, 0.3, start=1000.0),
                    ev("b", "dip", 0.50, 0.2, start=1000.0)], homes_monitored=2)
    assert result.itic_count == 1  # b only
    assert result.semi_count == 0
    # SARFI-70 counts strictly below 70 %: 0.70 is not, 0.50 is (IEEE 1564 "below X %")
    assert result.counts[70] == 1


def test_itic_sag_and_swell_sides_apart() -> None:
    # ITIC 2000 (pub) upper boundary: 120 % up to 0.5 s, then 110 %. A swell at 1.20 pu for
    # 0.4 s lies on the line (inside); 1.21 pu is above (prohibited). Neither counts for the
    # IEEE 1564 SARFI-ITIC, which counts sags below the curve.
    on = sarfi([ev("a", "swell", 1.20, 0.4)], homes_monitored=1)
    above = sarfi([ev("a", "swell", 1.21, 0.4)], homes_monitored=1)
    assert (on.itic_count, on.itic_swell_count) == (0, 0)
    assert (above.itic_count, above.itic_swell_count) == (0, 1)


def test_reclosing_counts_once_after_temporal_aggregation() -> None:
    shots = [ev("a", "dip", 0.55, 0.2, T0), ev("a", "dip", 0.30, 0.2, T0 + 15),
             ev("a", "dip", 0.60, 0.2, T0 + 38)]
    raw = sarfi(shots, homes_monitored=4)
    aggregated = sarfi([a.representative for a in aggregate_temporal(shots)],
                       homes_monitored=4)
    assert raw.counts[90] == 3 and aggregated.counts[90] == 1  # IEEE 1564 aggregation
    assert aggregated.index[50] == 0.25  # the representative is the 0.30 pu shot


def test_open_events_are_skipped_and_reported() -> None:
    result = sarfi([ev("a", "dip", 0.5, None), ev("b", "dip", 0.5, 0.1)], homes_monitored=2)
    assert result.skipped_open == 1 and result.counts[90] == 1


def test_bad_inputs() -> None:
    with pytest.raises(ValueError, match="positive integer"):
        sarfi(WORKED, homes_monitored=0)
    with pytest.raises(ValueError, match="only 3"):
        sarfi(WORKED, homes_monitored=3)  # 5 homes have events
    with pytest.raises(ValueError, match="not 100"):
        sarfi(WORKED, homes_monitored=10, thresholds=(100,))


def test_sags_judged_on_the_time_below_the_dip_threshold() -> None:
    # An interruption 0.3 s long (below the interruption threshold) inside a sag 2 s below
    # the dip threshold (dip_duration_s). IEEE 1564 judges the sag on 2 s: beyond SEMI F47's
    # 1 s (not counted, pub); on its own 0.3 s it would read outside F47 (0 % < 70 %).
    own = EventRecord(device="a", site="p", start_utc=T0, end_utc=T0 + 0.3,
                      kind="interruption", level_pu=0.0)
    below = EventRecord(device="a", site="p", start_utc=T0, end_utc=T0 + 0.3,
                        kind="interruption", level_pu=0.0, dip_duration_s=2.0)
    assert sarfi([own], 1).semi_count == 1
    assert sarfi([below], 1).semi_count == 0
    with pytest.raises(ValueError, match="dip_duration_s"):
        EventRecord(device="a", site="p", start_utc=T0, end_utc=None, kind="dip",
                    level_pu=0.5, dip_duration_s=-1.0)
