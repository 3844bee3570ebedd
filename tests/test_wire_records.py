"""Per-second values from measurement output (agent/wire/records.py: per_second)."""

from __future__ import annotations

import numpy as np

from agent.measurement.types import BasicIntervals, HalfCycleRms
from agent.wire.records import FLAG_EVENT, per_second

RATE = 7680.0
CYCLE = RATE / 50.0  # samples per 50 Hz cycle


def _measurement(seconds: int, rng: np.random.Generator) -> tuple[HalfCycleRms, BasicIntervals]:
    n_half = int(seconds * 100)  # Urms(1/2) refreshed every half cycle (IEC 61000-4-30 5.4.2)
    start = np.arange(n_half, dtype=np.float64) * CYCLE / 2
    half = HalfCycleRms(start=start, end=start + CYCLE,
                        urms=230 + rng.normal(0, 1, (n_half, 2)),
                        synthetic=np.zeros(n_half, bool))
    n_int = seconds * 5  # 10-cycle intervals at 50 Hz (IEC 61000-4-30 Ed.3 cl. 4.4)
    istart = np.arange(n_int, dtype=np.float64) * 10 * CYCLE
    flagged = np.zeros(n_int, bool)
    flagged[7] = True
    intervals = BasicIntervals(
        start=istart, end=istart + 10 * CYCLE, rms=230 + rng.normal(0, 0.5, (n_int, 2)),
        thd=0.03 + rng.normal(0, 0.001, (n_int, 2)), imbalance=np.full(n_int, 0.004),
        hz=50 + rng.normal(0, 0.01, n_int), flagged=flagged)
    intervals.thd[3, 1] = np.nan  # a missing THD value must not poison its second
    return half, intervals


def test_per_second_matches_a_plain_loop() -> None:
    rng = np.random.default_rng(2)
    half, iv = _measurement(4, rng)
    edges = np.arange(5, dtype=np.float64) * RATE
    assert np.isin(edges, half.end).any()  # windows ending exactly on an edge are covered
    rms_min, rms_mean, rms_max, hz, thd, imb, flags = per_second(half, iv, edges)
    for s in range(4):
        lo, hi = edges[s], edges[s + 1]
        h = (half.end > lo) & (half.end <= hi)
        i = (iv.start >= lo) & (iv.start < hi)
        np.testing.assert_allclose(rms_min[s], half.urms[h].min(axis=0))
        np.testing.assert_allclose(rms_max[s], half.urms[h].max(axis=0))
        # RMS of the 10/12-cycle values (IEC 61000-4-30 Ed.3 cl. 5.2.2 aggregation).
        np.testing.assert_allclose(rms_mean[s], np.sqrt(np.mean(iv.rms[i] ** 2, axis=0)))
        np.testing.assert_allclose(thd[s], np.nanmean(iv.thd[i], axis=0))
        np.testing.assert_allclose(hz[s], iv.hz[i].mean())
        np.testing.assert_allclose(imb[s], 0.004)
    assert list(flags) == [0, FLAG_EVENT, 0, 0]  # interval 7 starts at 7 x 0.2 s = 1.4 s
