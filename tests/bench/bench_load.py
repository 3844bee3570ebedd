"""Fleet load benchmark (on demand, not part of the test suite).

    python tests/bench/bench_load.py [--agents 200] [--duration 300] [--tick 1.0]
                                     [--ramp 0.5,0.25,0.125,0.0625] [--ramp-duration 20]
                                     [--store postgresql|sqlite] [--json]

``--agents`` simulated agents (tests/_load_helpers.py: one paho client and one set of broker
credentials each, replaying messages built beforehand with the wire codec; INVENTED values)
publish through the real Mosquitto with the project's broker-config. Each agent sends its
online status first, a summary of 60 per-second records every ``--tick`` seconds (the edge
sends one a minute: a tick of 1 s replays a fleet 60x faster than real time, ``--tick 60``
at the edge's own cadence), a 10-min aggregate and a heartbeat status every tenth, and every
fourth agent one dip event.

1. Steady: ``--duration`` seconds against one collector, then against two in one shared
   group (PostgreSQL store): published, committed, lost, duplicated, publish-to-commit p50 /
   p99, each collector's CPU seconds and share of one core.
2. Capacity: the same agents at shorter ticks (``--ramp``), ``--ramp-duration`` seconds each,
   one collector then two: the committed rate per collector, and whether it kept up (every
   message committed within 5 s of the last publish, p99 publish-to-commit under 1 s). The
   highest rate it kept up with is the measured capacity per collector on this machine
   (which also runs the broker and the publishers: a floor for a dedicated collector host);
   messages committed per CPU-second of a collector tell what one core of its own would take.
   A step that falls behind names its limit: a collector's core (90 % or more of one), the
   machine (all processes near its core count), or commit lag with no CPU saturated.
"""

from __future__ import annotations

import argparse
import json
import os
import sys
import tempfile
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _load_helpers import KINDS, LoadResult, Phase, pg_store, run_load

DEFAULT_PG = "postgresql://postgres@127.0.0.1:5432/postgres"


def one(root: Path, backend: str, pg: str, phase: Phase, collectors: int,
        publishers: int) -> LoadResult:
    if backend == "postgresql":
        with pg_store(pg) as url:
            return run_load(root, url, phase, collectors=collectors, publishers=publishers)
    return run_load(root, f"sqlite:///{root / 'recorder.db'}", phase, collectors=collectors,
                    publishers=publishers)


def share(cpu_s: float, r: LoadResult) -> str:
    """CPU seconds and share of one core over the run."""
    return f"{cpu_s:.1f} s ({100 * cpu_s / r.duration_s:.0f} %)"


def line(r: LoadResult, kept_up: bool | None = None) -> str:
    """One run, as it finishes."""
    tail = "" if kept_up is None else ("  kept up" if kept_up else "  FELL BEHIND")
    return (f"  {r.agents} agents, {r.collectors} collector(s), {r.offered_msg_s:.0f} msg/s"
            f" offered: published {r.published}, committed {r.committed}, lost {r.lost},"
            f" stored twice {r.duplicated}, p50/p99 {r.p50_ms:.0f}/{r.p99_ms:.0f} ms,"
            f" drained {r.drained_s:.1f} s{tail}")


def steady_table(results: list[LoadResult]) -> str:
    """The steady runs side by side, one column per collector count."""
    def split(r: LoadResult) -> str:
        return " / ".join(str(n) for n in r.committed_by)

    rows: list[tuple[str, Any]] = [
        ("run [s]", lambda r: f"{r.duration_s:.0f}"),
        ("offered [msg/s]", lambda r: f"{r.offered_msg_s:.0f}"),
        ("published", lambda r: f"{r.published:,}"),
        ("  summary / aggregate / status / event",
         lambda r: " / ".join(f"{r.published_by_kind[k]:,}" for k in KINDS)),
        ("committed", lambda r: f"{r.committed:,}"),
        ("lost", lambda r: str(r.lost)),
        ("stored twice", lambda r: str(r.duplicated)),
        ("per-second records sent / stored",
         lambda r: f"{r.records_published:,} / {r.records_stored:,}"),
        ("handled by each collector", split),
        ("publish-to-commit p50 / p99 [ms]", lambda r: f"{r.p50_ms:.0f} / {r.p99_ms:.0f}"),
        ("each collector's CPU (share of a core)",
         lambda r: ", ".join(share(c, r) for c in r.cpu_s)),
        ("messages per collector CPU-second",
         lambda r: f"{r.committed / max(sum(r.cpu_s), 1e-9):,.0f}"),
        ("broker CPU (share of a core)", lambda r: share(r.broker_cpu_s, r)),
        ("publishers' CPU (share of a core)", lambda r: share(r.publishers_cpu_s, r)),
        ("drained after the last publish [s]", lambda r: f"{r.drained_s:.1f}"),
    ]
    heads = [f"{r.collectors} collector{'s' if r.collectors > 1 else ''}" for r in results]
    cells = [[f(r) for r in results] for _, f in rows]
    w0 = max(len(name) for name, _ in rows)
    ws = [max(len(h), *(len(c[i]) for c in cells)) for i, h in enumerate(heads)]
    out = [" | ".join([" " * w0, *(h.rjust(w) for h, w in zip(heads, ws, strict=True))])]
    out.append("-+-".join(["-" * w0, *("-" * w for w in ws)]))
    for (name, _), c in zip(rows, cells, strict=True):
        out.append(" | ".join([name.ljust(w0), *(x.rjust(w) for x, w in zip(c, ws, strict=True))]))
    return "\n".join(out)


def limit(r: LoadResult, cores: int) -> str:
    """What stopped a step from keeping up: a collector's core, or the whole machine."""
    busiest = max(r.cpu_s, default=0.0) / r.duration_s
    total = (sum(r.cpu_s) + r.broker_cpu_s + r.publishers_cpu_s) / r.duration_s
    if busiest >= 0.9:
        return f"a collector's core ({100 * busiest:.0f} %)"
    if total >= 0.9 * cores:
        return f"the machine's {cores} cores (all processes {100 * total:.0f} % of one)"
    return "commit lag (no CPU saturated)"


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
    steady: list[LoadResult] = []
    for n in counts:
        phase = Phase(args.agents, max(1, round(args.duration / args.tick)), args.tick)
        r = one(root / f"steady-{n}", args.store, args.pg, phase, n, args.publishers)
        print(line(r), flush=True)
        steady.append(r)
        out.append({"phase": "steady", **r.as_dict()})
    print("\n" + steady_table(steady), flush=True)
    ramp = [float(x) for x in args.ramp.split(",") if x]
    if ramp:
        print(f"\n== capacity: {args.ramp_duration:.0f} s per step ==", flush=True)
    cores = os.cpu_count() or 1
    for n in counts:
        best, stopped = 0.0, "none of the steps (all kept up)"
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
                stopped = limit(r, cores)
                print(f"    limit: {stopped}; collectors"
                      f" {', '.join(share(c, r) for c in r.cpu_s)}, broker"
                      f" {share(r.broker_cpu_s, r)}, publishers {share(r.publishers_cpu_s, r)}",
                      flush=True)
                break
        if ramp:
            print(f"  capacity with {n} collector(s): {best:.0f} msg/s per collector kept up"
                  f" ({best * 60:,.0f} per-second records/s) on this machine; stopped by"
                  f" {stopped}", flush=True)
            out.append({"phase": "capacity", "collectors": n, "per_collector_msg_s": best,
                        "limit": stopped})
    if args.json:
        print(json.dumps(out))


if __name__ == "__main__":
    main()
