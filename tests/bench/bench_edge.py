"""Edge pipeline benchmark (on demand, not part of the test suite).

    python tests/bench/bench_edge.py [--minutes 60] [--rate 7680] [--block 7680]
    python tests/bench/bench_edge.py --minutes 10 --against ../base --rounds 3

Replays int16 counts (two channels, 7.68 kS/s, a split-phase 120 V / 60 Hz home with a few
invented dips and swells) through the whole edge chain with every measurement on, on one
core, and reports:

- the real-time factor (seconds of signal per second of CPU),
- a per-stage profile,
- the ratio to a bare numpy pass over the same blocks (read plus per-cycle sum of squares),
  timed in the same run, so a noisy shared machine shifts both alike,
- memory (traced Python allocations and RSS) sampled every simulated 5 minutes: flat means
  no growth with run length (the verdict line allows 2 MiB of RSS drift after minute 5).

``--against DIR`` runs this benchmark alternately on this tree and on the checkout in DIR
(e.g. ``git worktree add ../base main``), each in its own process with PYTHONPATH at its
tree, ``--rounds`` times, and prints each run's figures and the median CPU ratio between
them: a shared machine's load then falls on both alike.
"""

from __future__ import annotations

import os

# One core: numpy's BLAS threads off before numpy loads (nothing hot uses BLAS, but a
# benchmark should not borrow the second core).
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

import argparse
import json
import statistics
import subprocess
import sys
import time
import tracemalloc
from collections import defaultdict
from collections.abc import Iterator

import numpy as np

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.timebase import ReplayTimebase
from agent.pipeline import Frame, edge_stages
from agent.site import Site

FLAT_MIB = 2.0          # RSS drift allowed after minute 5 for the "flat" verdict [MiB]
FLOOR_X = 500.0         # issue 11's floor for the edge chain [x real time]


def make_minute(rate: float, seed: int = 7) -> np.ndarray:
    """One minute of invented split-phase 60 Hz signal with dips and a swell, int16 counts."""
    rng = np.random.default_rng(seed)
    n = int(rate * 60)
    t = np.arange(n) / rate
    env = np.ones(n)
    env[(t > 10.0) & (t < 10.2)] = 0.55  # a feeder dip (invented)
    env[(t > 30.0) & (t < 31.5)] = 1.14  # an inverter swell (invented)
    env[(t > 45.0) & (t < 45.05)] = 0.02  # a brief interruption (invented)
    phase = 2 * np.pi * 60.0 * t
    v1 = 120 * np.sqrt(2) * env * (np.sin(phase) + 0.03 * np.sin(3 * phase))
    v2 = -v1 + rng.normal(0, 0.2, n)
    volts_per_count = 0.01
    counts = np.stack([v1, v2], axis=1) / volts_per_count + rng.normal(0, 1.5, (n, 2))
    return np.clip(np.round(counts), -32768, 32767).astype(np.int16)


def rss_bytes() -> int:
    """Current resident set size [bytes] (Linux /proc), not the peak."""
    with open("/proc/self/statm") as fh:
        return int(fh.read().split()[1]) * os.sysconf("SC_PAGE_SIZE")


def blocks_for(minute: np.ndarray, minutes: int, block: int) -> Iterator[Block]:
    idx = 0
    for _ in range(minutes):
        for s in range(0, minute.shape[0], block):
            chunk = minute[s : s + block]
            yield Block(idx, chunk)
            idx += chunk.shape[0]


def bare_pass(minute: np.ndarray, minutes: int, block: int, spc: int) -> float:
    t0 = time.process_time()
    acc = 0.0
    for b in blocks_for(minute, minutes, block):
        x = b.counts.astype(np.float64)
        m = (x.shape[0] // spc) * spc
        acc += float(np.sum((x[:m].reshape(-1, spc, x.shape[1]) ** 2).sum(axis=1)))
    assert acc > 0
    return time.process_time() - t0


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--minutes", type=int, default=60)
    ap.add_argument("--rate", type=float, default=7680.0)
    ap.add_argument("--block", type=int, default=7680)
    ap.add_argument(
        "--trace-memory",
        action="store_true",
        help="also trace Python allocations (slows the run: do not read its speed)",
    )
    ap.add_argument("--against", metavar="DIR",
                    help="also run the checkout in DIR, alternating, and compare")
    ap.add_argument("--rounds", type=int, default=3, help="alternations with --against")
    ap.add_argument("--json", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.against:
        compare(args)
        return

    site = Site(
        nominal_v=120.0, nominal_hz=60.0, service_type="120/240", channel_names=("L1", "L2")
    )
    info = SourceInfo(
        sample_rate=args.rate, channel_names=site.channel_names, volts_per_count=np.full(2, 0.01)
    )
    minute = make_minute(args.rate)
    spc = round(args.rate / site.nominal_hz)

    stages, _ = edge_stages(info, site, ReplayTimebase(args.rate))
    per_stage: dict[str, float] = defaultdict(float)
    events = captures = 0
    mem: list[tuple[float, int, int]] = []
    if args.trace_memory:
        tracemalloc.start()
    t0 = time.process_time()
    for i, block in enumerate(blocks_for(minute, args.minutes, args.block)):
        frame = Frame(block)
        for stage in stages:
            s0 = time.process_time()
            frame = stage(frame)
            per_stage[type(stage).__name__] += time.process_time() - s0
        events += sum(1 for u in frame.updates if u.change == "ended")
        captures += len(frame.captures)
        sim_s = block.end_index / args.rate
        if i % max(1, int(300 * args.rate / args.block)) == 0:
            cur = tracemalloc.get_traced_memory()[0] if args.trace_memory else 0
            mem.append((sim_s, cur, rss_bytes()))
    pipeline_s = time.process_time() - t0
    if args.trace_memory:
        tracemalloc.stop()
    bare_s = bare_pass(minute, args.minutes, args.block, spc)

    signal_s = args.minutes * 60.0
    rss_growth = (mem[-1][2] - mem[1][2]) / 2**20 if len(mem) >= 3 else None
    if args.json:
        print(json.dumps({"pipeline_s": pipeline_s, "bare_s": bare_s, "signal_s": signal_s,
                          "per_stage": per_stage, "rss_growth_mib": rss_growth,
                          "rss_end_mib": mem[-1][2] / 2**20}))
        return
    print(f"signal: {args.minutes} min, 2 ch, {args.rate:g} S/s, blocks of {args.block}")
    print(f"events {events}, captures {captures}")
    print(f"pipeline CPU {pipeline_s:.2f} s -> {signal_s / pipeline_s:,.0f}x real time "
          f"({floor_word(signal_s / pipeline_s)})")
    print(f"bare numpy pass CPU {bare_s:.3f} s -> {signal_s / bare_s:,.0f}x real time")
    print(f"pipeline / bare cost ratio: {pipeline_s / bare_s:.1f}")
    print("per-stage CPU share:")
    for name, s in sorted(per_stage.items(), key=lambda kv: -kv[1]):
        print(f"  {name:<14} {s:7.3f} s  {100 * s / pipeline_s:5.1f} %")
    print("memory (simulated minute, traced KiB, current RSS MiB):")
    for sim_s, cur, rss in mem:
        print(f"  {sim_s / 60:6.1f} {cur / 1024:10.1f} {rss / 2**20:8.1f}")
    if rss_growth is not None:
        traced = (mem[-1][1] - mem[1][1]) / 1024
        verdict = "flat" if abs(rss_growth) <= FLAT_MIB else "GROWING"
        print(
            f"memory {verdict}: change from minute {mem[1][0] / 60:.0f} to the end: RSS "
            f"{rss_growth:+.1f} MiB (flat: within {FLAT_MIB:g} MiB)"
            + (f", traced {traced:+.1f} KiB" if args.trace_memory else "")
        )
    else:
        print("memory: run at least 15 simulated minutes for the flat check")


def floor_word(x: float) -> str:
    return f"{'at or above' if x >= FLOOR_X else 'BELOW'} the {FLOOR_X:g}x floor"


def compare(args: argparse.Namespace) -> None:
    """This tree and ``args.against`` alternately, each run in a fresh process."""
    here = os.path.dirname(os.path.dirname(os.path.dirname(os.path.abspath(__file__))))
    trees = {"this": here, "against": os.path.abspath(args.against)}
    cmd = [sys.executable, os.path.abspath(__file__), "--json", "--minutes", str(args.minutes),
           "--rate", str(args.rate), "--block", str(args.block)]
    if not os.path.isdir(os.path.join(trees["against"], "agent")):
        raise SystemExit(f"bench_edge: --against {args.against}: no agent/ package there")
    runs: dict[str, list[dict]] = {k: [] for k in trees}
    for r in range(args.rounds):
        for name, tree in trees.items():
            env = dict(os.environ, PYTHONPATH=tree)
            done = subprocess.run(cmd, env=env, cwd=tree, capture_output=True, text=True)
            if done.returncode:
                last = (done.stderr.strip().splitlines() or ["no output"])[-1]
                raise SystemExit(f"bench_edge: the run in {tree} failed: {last}")
            res = json.loads(done.stdout)
            runs[name].append(res)
            x = res["signal_s"] / res["pipeline_s"]
            print(f"round {r + 1} {name:<8} {x:7,.0f}x real time, "
                  f"{res['pipeline_s'] / res['bare_s']:5.1f}x a bare numpy pass, "
                  f"RSS end {res['rss_end_mib']:.1f} MiB")
    med = {k: statistics.median(v["pipeline_s"] for v in runs[k]) for k in runs}
    ratio = {k: statistics.median(v["pipeline_s"] / v["bare_s"] for v in runs[k]) for k in runs}
    sig = runs["this"][0]["signal_s"]
    print(f"this tree    ({trees['this']}): median {sig / med['this']:,.0f}x real time "
          f"({floor_word(sig / med['this'])}), {ratio['this']:.1f}x a bare numpy pass")
    print(f"against tree ({trees['against']}): median {sig / med['against']:,.0f}x real time, "
          f"{ratio['against']:.1f}x a bare numpy pass")
    print(f"CPU this / against: {med['this'] / med['against']:.2f} (median of {args.rounds} "
          "alternating rounds)")
    growth = [v["rss_growth_mib"] for v in runs["this"] if v["rss_growth_mib"] is not None]
    if growth:
        verdict = "flat" if max(abs(g) for g in growth) <= FLAT_MIB else "GROWING"
        print(f"memory {verdict}, this tree: RSS change from minute 5 to the end "
              f"{', '.join(f'{g:+.1f}' for g in growth)} MiB (flat: within {FLAT_MIB:g} MiB)")
    else:
        print("memory: run at least 15 simulated minutes for the flat check")
    print("per-stage CPU, this tree (median):")
    names = runs["this"][0]["per_stage"]
    for n in sorted(names, key=lambda k: -names[k]):
        v = statistics.median(r["per_stage"][n] for r in runs["this"])
        print(f"  {n:<14} {v:7.3f} s  {100 * v / med['this']:5.1f} %")


if __name__ == "__main__":
    main()
