"""Fleet load benchmark (on demand, not part of the test suite).

    python tests/bench/bench_load.py [--agents 200] [--duration 300] [--tick 1.0]
                                     [--ramp 0.5,0.25,0.125,0.0625] [--ramp-duration 20]
                                     [--store postgresql|sqlite] [--json]

``--agents`` simulated agents (tests/_load_helpers.py: one paho client and one set of broker
credentials each, replaying messages built beforehand with the wire codec; INVENTED values)
publish through the real Mosquitto with the project's broker-config. Each agent sends a
summary of 60 per-second records every ``--tick`` seconds (the edge sends one a minute: a
tick of 1 s replays a fleet 60x faster than real time) and a 10-min aggregate every tenth.

1. Steady: ``--duration`` seconds against one collector, then against two in one shared
   group (PostgreSQL store): published, committed, lost, duplicated, publish-to-commit p50 /
   p99, each collector's CPU seconds and share of one core.
2. Capacity: the same agents at shorter ticks (``--ramp``), ``--ramp-duration`` seconds each,
   one collector then two: the committed rate per collector, and whether it kept up (every
   message committed within 5 s of the last publish, p99 publish-to-commit under 1 s). The
   highest rate it kept up with is the measured capacity per collector on this machine
   (which also runs the broker and the publishers: a floor for a dedicated collector host);
   messages committed per CPU-second of a collector tell what one core of its own would take.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _load_helpers import LoadResult, Phase, pg_store, run_load

DEFAULT_PG = "postgresql://postgres@127.0.0.1:5432/postgres"


def one(root: Path, backend: str, pg: str, phase: Phase, collectors: int,
        publishers: int) -> LoadResult:
    if backend == "postgresql":
        with pg_store(pg) as url:
            return run_load(root, url, phase, collectors=collectors, publishers=publishers)
    return run_load(root, f"sqlite:///{root / 'recorder.db'}", phase, collectors=collectors,
                    publishers=publishers)


def line(r: LoadResult, kept_up: bool | None = None) -> str:
    cpu = ", ".join(f"{c:.1f} s ({100 * c / r.duration_s:.0f} %)" for c in r.cpu_s)
    tail = "" if kept_up is None else ("  kept up" if kept_up else "  FELL BEHIND")
    return (f"{r.agents:>4} agents {r.collectors} coll. {r.offered_msg_s:7.0f} msg/s offered |"
            f" published {r.published:>7} committed {r.committed:>7} lost {r.lost}"
            f" dup {r.duplicated} | p50 {r.p50_ms:7.1f} ms p99 {r.p99_ms:7.1f} ms |"
            f" {r.per_collector_msg_s:6.0f} msg/s per collector | split {r.committed_by}"
            f" | CPU {cpu} ({r.committed / max(sum(r.cpu_s), 1e-9):,.0f} msg per collector"
            f" CPU-s) | drained {r.drained_s:.1f} s{tail}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--agents", type=int, default=200)
    ap.add_argument("--duration", type=float, default=300.0, help="steady phase [s]")
    ap.add_argument("--tick", type=float, default=1.0, help="seconds between an agent's ticks")
    ap.add_argument("--ramp", default="0.5,0.25,0.125,0.0625",
                    help="ticks [s] of the capacity phases ('' for none)")
    ap.add_argument("--ramp-duration", type=float, default=20.0)
    ap.add_argument("--store", choices=("postgresql", "sqlite"), default="postgresql")
    ap.add_argument("--pg", default=os.environ.get("HALFCYCLE_TEST_PG_DSN", DEFAULT_PG))
    ap.add_argument("--publishers", type=int, default=4)
    ap.add_argument("--collectors", default="1,2")
    ap.add_argument("--json", action="store_true")
    args = ap.parse_args()
    if args.agents < 1 or args.duration <= 0 or args.tick <= 0:
        raise SystemExit("bench_load: --agents, --duration and --tick must be positive")
    counts = [int(c) for c in args.collectors.split(",") if c]
    if args.store == "sqlite" and max(counts) > 1:
        raise SystemExit("bench_load: several collectors share a PostgreSQL store only")
    root = Path(tempfile.mkdtemp(prefix="hc-bench-load-"))
    out: list[dict[str, object]] = []
    print(f"INVENTED load: {args.agents} simulated agents, 60-record summaries, store "
          f"{args.store}; this machine: {os.cpu_count()} cores shared by broker, publishers "
          "and collectors", flush=True)
    print(f"\n== steady: {args.duration:.0f} s at one tick per {args.tick:g} s ==", flush=True)
    for n in counts:
        phase = Phase(args.agents, max(1, round(args.duration / args.tick)), args.tick)
        r = one(root / f"steady-{n}", args.store, args.pg, phase, n, args.publishers)
        print(line(r), flush=True)
        out.append({"phase": "steady", **r.as_dict()})
    ramp = [float(x) for x in args.ramp.split(",") if x]
    if ramp:
        print(f"\n== capacity: {args.ramp_duration:.0f} s per step ==", flush=True)
    for n in counts:
        best = 0.0
        for tick in ramp:
            phase = Phase(args.agents, max(1, round(args.ramp_duration / tick)), tick)
            r = one(root / f"ramp-{n}-{tick:g}", args.store, args.pg, phase, n,
                    args.publishers)
            kept = r.lost == 0 and r.drained_s <= 5.0 and r.p99_ms < 1000.0
            print(line(r, kept), flush=True)
            out.append({"phase": "ramp", "kept_up": kept, **r.as_dict()})
            if kept:
                best = max(best, r.per_collector_msg_s)
            else:
                break
        if ramp:
            print(f"   capacity with {n} collector(s): at least {best:.0f} msg/s per collector"
                  f" ({best * 60:,.0f} per-second records/s) on this machine", flush=True)
    if args.json:
        print(json.dumps(out))


if __name__ == "__main__":
    main()
