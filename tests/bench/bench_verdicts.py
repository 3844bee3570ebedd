"""One home's verdicts over D days of per-second values (run on demand).

    python tests/bench/bench_verdicts.py [--days 30] [--channels 2]

Times :func:`agent.report.device.device_verdicts` (ANSI C84.1 window means and excursions,
overvoltage figures, inverter trips, profile, frequency, THD, unbalance) on invented noise-like
120 V values, and reports it as a ratio to a baseline measured in the same run: one numpy sort
of the same per-second values (the cheapest pass that touches every second). Also the peak
memory of the verdicts (tracemalloc) as a multiple of the input arrays' size.
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from agent.report.device import EMPTY_TEN_MIN, device_verdicts
from agent.report.seconds import every_second
from agent.verdicts.nominal import Nominal


def main() -> None:
    p = argparse.ArgumentParser()
    p.add_argument("--days", type=float, default=30.0)
    p.add_argument("--channels", type=int, default=2)
    args = p.parse_args()
    n = int(args.days * 86400)
    t = 1_780_272_000.0 + np.arange(n, dtype=float)
    rng = np.random.default_rng(1)
    mean = 120.0 + rng.normal(0, 2, (n, args.channels))
    trend = {"t": t, "mean": mean, "peak": mean + 0.5, "low": mean - 0.5,
             "flagged": np.zeros(n, bool), "hz": np.full(n, 60.0),
             "thd": np.full((n, args.channels), 0.02), "imbalance": np.full(n, np.nan)}
    size = sum(a.nbytes for a in trend.values())
    start = time.perf_counter()
    np.sort(mean[:, 0])
    base = time.perf_counter() - start
    seconds = every_second(trend)  # the rollups a store would hold, reduced beforehand
    tracemalloc.start()
    start = time.perf_counter()
    device_verdicts({}, [], seconds, EMPTY_TEN_MIN, nominal=Nominal(120.0, "declared"),
                    hz=60.0, point="service")
    took = time.perf_counter() - start
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    print(f"{args.days:g} days x {args.channels} channels ({n} seconds): verdicts "
          f"{took / base:.0f}x one numpy sort of the seconds; peak memory "
          f"{peak / size:.2f}x the input arrays")


if __name__ == "__main__":
    main()
