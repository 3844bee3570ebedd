"""EN 50160 flicker verdict: Plt ≤ 1 for 95 % of the week (published; tests/SOURCES.md)."""

from __future__ import annotations

import numpy as np

from agent.verdicts.flicker import WEEK_PLT, en50160_flicker


def test_95_percent_of_the_week_within_plt_1() -> None:
    plt = np.full(WEEK_PLT, 0.6)
    plt[:4] = 1.3                         # 4 of 84 = 4.8 % above: still 95.2 % within
    v = en50160_flicker(plt)
    assert v.passed is True and v.verdict == "pass" and v.confidence == "pub"
    plt[:5] = 1.3                         # 5 of 84 = 6 % above: fails
    v = en50160_flicker(plt, pst=np.full(504, 0.5))
    assert v.passed is False and v.details["plt_max"] == 1.3
    assert v.details["pst_p95"] == 0.5


def test_short_or_missing_data() -> None:
    v = en50160_flicker(np.array([0.5, np.nan, 0.7]))
    assert v.verdict == "provisional" and v.passed is True and v.notes
    assert en50160_flicker([]).verdict == "no_data"
