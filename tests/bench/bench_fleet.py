"""Fleet-scale store and report benchmark (on demand, not part of the test suite).

    python tests/bench/bench_fleet.py [--sizes 1x7,5x7,10x7,10x1] [--backends sqlite,postgresql]
    python tests/bench/bench_fleet.py --full          # adds 300 homes x 7 days (long)

For each size (homes x days) and backend a fresh store is filled through the project's own
commit path, ``RecorderStore.commit_batch``, with the messages a collector commits: an online
status with the site model, 60-s summaries of per-second records packed as on the wire,
10-min aggregates and a few events (local dips, and fleet-wide sags reaching every home within
a few milliseconds). The values come from an INVENTED synthesiser (a daily voltage swing, a
per-home offset, noise, one home in seven with a midday rise as if from rooftop solar); they
are not measurements of any real home. Every message goes through ``codec.encode`` and
``codec.decode``, so the store sees exactly the wire form. The seed is fixed.

Measured per size:

* store size incl. indexes (SQLite: file size after a WAL checkpoint; PostgreSQL: the sum of
  ``pg_total_relation_size`` over the database's tables), with the largest tables apart;
* ``halfcycle report --json`` run as a subprocess: wall time and the child's peak RSS
  (``ru_maxrss`` from ``os.wait4``);
* the fill rate (messages committed per second).

Figures are printed per home-week and as ratios to the first size of the same backend in the
same run (the baseline), so growth in homes and in days reads directly: a ratio near 1.0 of
the per-home-week cost means linear growth.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit, urlunsplit

import numpy as np

# The code under test: this repository, or another checkout (HC_BENCH_TREE, set by
# --baseline-tree for the child that measures the baseline code in the same run).
ROOT = Path(os.environ.get("HC_BENCH_TREE") or Path(__file__).resolve().parents[2])
sys.path.insert(0, str(ROOT))

from agent.events.classify import classify_event  # noqa: E402
from agent.events.types import Event, Thresholds  # noqa: E402
from agent.measurement.types import Aggregate  # noqa: E402
from agent.store.recorder import Item, RecorderStore  # noqa: E402
from agent.wire import codec  # noqa: E402
from agent.wire.packing import pack_values  # noqa: E402
from agent.wire.records import DEFAULT_EXPONENTS, FLAG_EVENT  # noqa: E402
from agent.wire.validate import validate  # noqa: E402

SITE = "invented-town"
DAY = 86400
NOMINAL = 120.0
K = 60  # seconds per summary, the edge default
SEED = 20260601
#: The week starts on an invented Monday, whole days before now so nothing lies in the future.
DEFAULT_PG = "postgresql://postgres@127.0.0.1:5432/postgres"
HOME_WEEK_S = 7 * DAY


@dataclass
class Result:
    backend: str
    homes: int
    days: int
    messages: int
    fill_s: float
    store_bytes: int
    tables: dict[str, int]
    report_s: float
    report_rss: int

    @property
    def home_weeks(self) -> float:
        return self.homes * self.days / 7.0


# --- the invented synthesiser -----------------------------------------------------------------


def home_seconds(rng: np.random.Generator, home: int, t0: float, days: int
                 ) -> dict[str, np.ndarray]:
    """Per-second values of one invented split-phase home [V, Hz, fraction] (vectorised)."""
    n = days * DAY
    t = t0 + np.arange(n, dtype=np.float64)
    day_phase = 2 * np.pi * (t % DAY) / DAY
    base = NOMINAL + 1.0 + 2.5 * np.sin(day_phase - 2.0) + rng.normal(0.0, 1.2)
    if home % 7 == 3:  # invented rooftop solar: a midday rise
        base = base + 6.0 * np.clip(np.sin(day_phase - np.pi / 2), 0.0, None) ** 2
    # Slow wander (random knots every 300 s, interpolated) plus per-second noise, per leg.
    knots = np.arange(0, n + 300, 300, dtype=np.float64)
    idx = np.arange(n, dtype=np.float64)
    wander = np.stack([np.interp(idx, knots, rng.normal(0.0, 0.6, knots.size))
                       for _ in range(2)], axis=1)
    mean = base[:, None] + wander + rng.normal(0.0, 0.15, (n, 2))
    spread = np.abs(rng.normal(0.0, 0.3, (n, 2)))
    return {"t": t, "mean": mean, "low": mean - spread, "high": mean + spread,
            "hz": 60.0 + rng.normal(0.0, 0.008, n),
            "thd": np.clip(0.02 + rng.normal(0.0, 0.002, (n, 2)), 0.0, None),
            "imb": np.clip(0.004 + rng.normal(0.0, 0.0005, n), 0.0, None),
            "flags": np.zeros(n)}


def pack_rows(values: np.ndarray, exp: int) -> list[list[object]]:
    """``pack_values`` of each row of ``values`` (m, K), without missing values, vectorised:
    rows of one bit width are packed together (the bench checks it against pack_values)."""
    units = np.rint(values * 10.0 ** (-exp)).astype(np.int64)
    d = np.diff(units, axis=1)
    z = ((d << 1) ^ (d >> 63)).astype(np.uint64)
    widths = np.array([int(x).bit_length() for x in z.max(axis=1)])
    out: list[list[object]] = [[] for _ in range(units.shape[0])]
    for w in np.unique(widths):
        rows = np.flatnonzero(widths == w)
        if w == 0:
            data = [b""] * rows.size
        else:
            shifts = np.arange(int(w), dtype=np.uint64)
            bits = ((z[rows][:, :, None] >> shifts) & np.uint64(1)).astype(np.uint8)
            packed = np.packbits(bits.reshape(rows.size, -1), axis=1, bitorder="little")
            data = [r.tobytes() for r in packed]
        for r, blob in zip(rows, data, strict=True):
            out[r] = [int(exp), int(units[r, 0]), int(w), blob]
    return out


def summary_bodies(s: dict[str, np.ndarray]) -> list[dict[str, Any]]:
    """60-s summary bodies packed as the edge packs them (records.SummaryBatcher layout)."""
    exp = DEFAULT_EXPONENTS
    m = s["t"].size // K

    def blocks(name: str, e: int, c: int | None = None) -> list[list[object]]:
        v = s[name][: m * K] if c is None else s[name][: m * K, c]
        return pack_rows(v.reshape(m, K), e)

    per_ch = {f: [blocks(name, exp[e], c) for c in range(2)]
              for f, name, e in (("rms_min", "low", "rms"), ("rms_mean", "mean", "rms"),
                                 ("rms_max", "high", "rms"), ("thd", "thd", "thd"))}
    single = {f: blocks(name, exp[e]) for f, name, e in (
        ("hz", "hz", "hz"), ("imbalance", "imb", "imbalance"), ("flags", "flags", "flags"))}
    out = []
    for i in range(m):
        body: dict[str, Any] = {"v": 1, "type": "summary", "t0": float(s["t"][i * K]),
                                "period_s": 1, "n": K, "channels": ["L1", "L2"]}
        body.update({f: [per_ch[f][0][i], per_ch[f][1][i]] for f in per_ch})
        body.update({f: single[f][i] for f in single})
        body["clock"] = {"sync": "synced", "error_s": 0.002}
        out.append(body)
    return out


def aggregate_bodies(s: dict[str, np.ndarray]) -> list[dict[str, Any]]:
    """10-min aggregates: RMS of the per-second means (IEC 61000-4-30 cl. 5.2.2 form)."""
    n = s["t"].size // 600
    sq = (s["mean"][: n * 600] ** 2).reshape(n, 600, 2).mean(axis=1)
    rms = np.sqrt(sq)
    thd = s["thd"][: n * 600].reshape(n, 600, 2).mean(axis=1)
    hz = s["hz"][: n * 600].reshape(n, 600).mean(axis=1)
    flagged = s["flags"][: n * 600].reshape(n, 600).max(axis=1) > 0
    out = []
    for i in range(n):
        agg = Aggregate(kind="10min", t_utc=float(s["t"][i * 600]), duration_s=600.0,
                        rms=(float(rms[i, 0]), float(rms[i, 1])),
                        thd=(float(thd[i, 0]), float(thd[i, 1])), hz=float(hz[i]),
                        flagged=bool(flagged[i]), count=3000)
        body = codec.aggregate_body(agg, ["L1", "L2"])
        body["clock"] = {"sync": "synced", "error_s": 0.002}
        out.append(body)
    return out


def event_body(eid: str, kind: str, start: float, duration: float, level_pu: float
               ) -> dict[str, Any]:
    ev = Event(event_id=eid, kind=kind, channels=(0, 1), start=0.0,  # type: ignore[arg-type]
               start_utc=start, nominal_v=NOMINAL, thresholds=Thresholds(),
               level_v=level_pu * NOMINAL, end=duration * 3840.0, end_utc=start + duration,
               per_channel_level_v=(level_pu * NOMINAL, level_pu * NOMINAL),
               ended_by="recovery", time_error_s=0.002, sync_state="synced")  # type: ignore[arg-type]
    classify_event(ev, 60.0)
    return codec.event_body(ev, "ended", channel_names=["L1", "L2"])


def home_messages(home: int, t0: float, days: int, fleet_sags: list[float]) -> list[dict[str, Any]]:
    """Every message of one invented home, in send order, encoded and decoded as on the wire."""
    rng = np.random.default_rng([SEED, home])
    device = f"home-{home:04d}"
    s = home_seconds(rng, home, t0, days)
    events: list[tuple[float, dict[str, Any]]] = []
    starts = [(t, "sag", 0.55 + 0.1 * rng.random()) for t in fleet_sags]
    starts += [(t0 + float(rng.uniform(0, days * DAY - 10)), "dip", 0.75 + 0.1 * rng.random())
               for _ in range(2 * days)]
    for i, (t, what, pu) in enumerate(sorted(starts)):
        t = t + 0.003 * (home % 7)  # homes see a fleet sag within a few ms
        idx = int(t - t0)
        s["flags"][idx: idx + 2] = FLAG_EVENT
        s["mean"][idx] *= 0.9
        s["low"][idx] = pu * NOMINAL
        events.append((t + 1.0, event_body(f"{device}-{what}-{i}", "dip", t, 0.2, pu)))
    bodies: list[tuple[float, dict[str, Any]]] = [
        (t0 - 1.0, codec.status_body(
            "online", agent_version="bench", uptime_s=1.0, outbox_depth=0, sync="synced",
            time_error_s=0.002, t=t0 - 1.0,
            site_model={"nominal_v": NOMINAL, "nominal_hz": 60.0, "service_type": "120/240",
                        "channel_names": ["L1", "L2"], "measurement_point": "service",
                        "feeder": f"F{home % 5}", "transformer": f"T{home // 8}",
                        "labels": {}}))]
    bodies += [(float(b["t0"]) + K, b) for b in summary_bodies(s)]
    bodies += [(float(b["t"]) + 600.0, b) for b in aggregate_bodies(s)]
    bodies += events
    bodies.sort(key=lambda x: x[0])
    ident = codec.Identity(SITE, device, "e1")
    out = [codec.unpack(codec.encode(ident.stamp(b, seq), check=False))
           for seq, (_, b) in enumerate(bodies, start=1)]
    for m in out[:50]:  # the synthesiser writes what the schemas accept
        validate(m)
    return out


# --- stores -----------------------------------------------------------------------------------


def fresh_pg(admin: str) -> tuple[str, str]:
    import psycopg

    name = f"hc_bench_{uuid.uuid4().hex[:10]}"
    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'CREATE DATABASE "{name}"')
    parts = urlsplit(admin)
    return urlunsplit((parts.scheme, parts.netloc, "/" + name, "", "")), name


def drop_pg(admin: str, name: str) -> None:
    import psycopg

    with psycopg.connect(admin, autocommit=True) as conn:
        conn.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def store_size(store: RecorderStore, path: Path | None) -> tuple[int, dict[str, int]]:
    """Bytes incl. indexes, and the biggest tables (with their indexes and partitions)."""
    db = store.db
    if db.dialect == "sqlite":
        db.execute("PRAGMA wal_checkpoint(TRUNCATE)")
        assert path is not None
        total = path.stat().st_size
        tables: dict[str, int] = {}
        try:
            for name, size in db.query("SELECT name, SUM(pgsize) FROM dbstat GROUP BY name"):
                tables[str(name)] = int(size)
        except Exception:  # dbstat is an optional SQLite build feature
            pass
        return total, tables
    rows = db.query(
        "SELECT c.relname, pg_total_relation_size(c.oid) FROM pg_class c"
        " JOIN pg_namespace n ON n.oid = c.relnamespace"
        " WHERE n.nspname = current_schema() AND c.relkind = 'r'")
    return sum(int(r[1]) for r in rows), {str(r[0]): int(r[1]) for r in rows}


# The child reports its own high-water mark: Linux carries the parent's resident size at
# fork into the child's ru_maxrss (it survives exec), so wait4's figure would include this
# benchmark's own memory; VmHWM of the child's /proc status is the report's alone.
_CHILD = ("import atexit, runpy, sys\n"
          "def hwm():\n"
          "    for line in open('/proc/self/status'):\n"
          "        if line.startswith('VmHWM:'):\n"
          "            sys.stderr.write('HC_BENCH_HWM_KB ' + line.split()[1] + '\\n')\n"
          "atexit.register(hwm)\n"
          "sys.argv = ['halfcycle'] + sys.argv[1:]\n"
          "runpy.run_module('agent.cli.main', run_name='__main__')\n")


def run_report(url: str, captures: Path) -> tuple[float, int, int]:
    """``halfcycle report --json`` as a child: (wall s, peak RSS bytes, devices reported)."""
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    with tempfile.TemporaryFile() as out:
        t = time.perf_counter()
        proc = subprocess.Popen([sys.executable, "-c", _CHILD, "report", "--store",
                                 url, "--captures", str(captures), "--json"],
                                stdout=out, stderr=subprocess.PIPE, env=env, cwd=ROOT)
        _, status, usage = os.wait4(proc.pid, 0)
        wall = time.perf_counter() - t
        proc.returncode = os.waitstatus_to_exitcode(status)
        err = proc.stderr.read().decode() if proc.stderr else ""
        if proc.returncode != 0:
            raise SystemExit(f"report failed ({proc.returncode}): {err.strip()}")
        out.seek(0)
        report = json.loads(out.read())
    hwm = [int(line.split()[1]) for line in err.splitlines()
           if line.startswith("HC_BENCH_HWM_KB ")]
    peak_kb = hwm[-1] if hwm else int(usage.ru_maxrss)
    return wall, peak_kb * 1024, len(report["devices"])


def fill(store: RecorderStore, homes: int, days: int, t0: float, batch: int) -> tuple[int, float]:
    rng = np.random.default_rng(SEED)
    sags = sorted(t0 + float(x) for x in rng.uniform(60, days * DAY - 60, 3 * days))
    n = 0
    spent = 0.0
    for h in range(homes):
        messages = home_messages(h, t0, days, sags)
        t = time.perf_counter()
        for a in range(0, len(messages), batch):
            part = messages[a: a + batch]
            at = float(part[-1].get("t0", part[-1].get("t", t0))) + 1.0
            store.commit_batch([Item(message=m, received_at=at) for m in part])
        spent += time.perf_counter() - t
        n += len(messages)
    return n, spent


def measure(backend: str, homes: int, days: int, workdir: Path, pg_admin: str,
            batch: int) -> Result:
    t0 = (math.floor(time.time() / DAY) - days - 1) * DAY  # whole days, all in the past
    pg_name = None
    path = None
    if backend == "sqlite":
        path = workdir / f"fleet-{homes}x{days}.db"
        url = f"sqlite:///{path}"
    else:
        url, pg_name = fresh_pg(pg_admin)
    captures = workdir / "captures"
    try:
        store = RecorderStore(url, captures)
        try:
            messages, fill_s = fill(store, homes, days, t0, batch)
            size, tables = store_size(store, path)
        finally:
            store.close()
        wall, rss, reported = run_report(url, captures)
        if reported != homes:
            raise SystemExit(f"report covered {reported} homes, expected {homes}")
    finally:
        if pg_name is not None:
            drop_pg(pg_admin, pg_name)
        if path is not None:
            for p in path.parent.glob(path.name + "*"):
                p.unlink()
    return Result(backend, homes, days, messages, fill_s, size, tables, wall, rss)


def print_results(results: list[Result]) -> None:
    mb = 1e6
    for backend in sorted({r.backend for r in results}):
        rows = [r for r in results if r.backend == backend]
        base = rows[0]

        def per_hw(r: Result) -> tuple[float, float, float]:
            return (r.store_bytes / r.home_weeks, r.report_s / r.home_weeks,
                    r.report_rss / r.home_weeks)

        b_size, b_time, _ = per_hw(base)
        print(f"\n== {backend} (baseline: {base.homes} homes x {base.days} days) ==")
        print(f"{'size':>9} {'msgs':>8} {'fill msg/s':>10} {'MB/home-wk':>10} {'x base':>6}"
              f" {'w/o queue':>9}"
              f" {'report s':>9} {'s/home-wk':>9} {'x base':>6} {'peak MB':>8}"
              "  largest tables (MB)")
        for r in rows:
            size, rt, _ = per_hw(r)
            top = sorted(r.tables.items(), key=lambda kv: -kv[1])[:4]
            queue = sum(v for k, v in r.tables.items() if "export_queue" in k)
            print(f"{r.homes:>4}x{r.days:<4} {r.messages:>8} {r.messages / r.fill_s:>10.0f}"
                  f" {size / mb:>10.2f} {size / b_size:>6.2f}"
                  f" {(r.store_bytes - queue) / r.home_weeks / mb:>9.2f} {r.report_s:>9.2f}"
                  f" {rt:>9.3f} {rt / b_time:>6.2f} {r.report_rss / mb:>8.0f}  "
                  + ", ".join(f"{k} {v / mb:.1f}" for k, v in top))


def measure_tree(tree: str, backend: str, homes: int, days: int,
                 args: argparse.Namespace) -> Result:
    """One size measured with another checkout's code (a child process)."""
    env = {**os.environ, "HC_BENCH_TREE": tree, "PYTHONPATH": tree}
    out = subprocess.run(
        [sys.executable, __file__, "--sizes", f"{homes}x{days}", "--backends", backend,
         "--pg", args.pg, "--batch", str(args.batch), "--only-json"],
        env=env, capture_output=True, text=True, check=False)
    if out.returncode != 0:
        raise SystemExit(f"baseline run failed: {out.stderr.strip()[-2000:]}")
    (row,) = json.loads(out.stdout.strip().splitlines()[-1])
    return Result(**row)


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--sizes", default="1x7,5x7,10x7,10x1",
                    help="homes x days, comma separated; the first is the baseline")
    ap.add_argument("--full", action="store_true", help="add 300 homes x 7 days (long)")
    ap.add_argument("--backends", default="sqlite,postgresql")
    ap.add_argument("--pg", default=os.environ.get("HALFCYCLE_TEST_PG_DSN", DEFAULT_PG),
                    help="PostgreSQL admin DSN (a fresh database is made per size)")
    ap.add_argument("--batch", type=int, default=200, help="messages per commit_batch")
    ap.add_argument("--json", action="store_true", help="also print the raw results as JSON")
    ap.add_argument("--baseline-tree", default=None,
                    help="another checkout (e.g. the main branch) measured at each size just "
                    "before this one, in the same run; ratios are then this / that")
    ap.add_argument("--only-json", action="store_true", help=argparse.SUPPRESS)
    args = ap.parse_args()
    sizes = [tuple(int(x) for x in s.split("x")) for s in args.sizes.split(",") if s]
    if args.full:
        sizes.append((300, 7))
    check = np.random.default_rng(SEED).normal(NOMINAL, 1.0, (20, K))
    if pack_rows(check, -2) != [pack_values(r, -2) for r in check]:
        raise SystemExit("pack_rows disagrees with agent.wire.packing.pack_values")
    results: list[Result] = []
    baseline: list[Result] = []
    with tempfile.TemporaryDirectory(prefix="hc-bench-fleet-") as tmp:
        for backend in args.backends.split(","):
            for homes, days in sizes:
                if args.baseline_tree:
                    baseline.append(measure_tree(args.baseline_tree, backend, homes, days, args))
                    b = baseline[-1]
                    print(f"baseline {backend} {homes}x{days}: store {b.store_bytes / 1e6:.1f}"
                          f" MB, report {b.report_s:.2f} s, peak {b.report_rss / 1e6:.0f} MB",
                          flush=True)
                r = measure(backend, homes, days, Path(tmp), args.pg, args.batch)
                results.append(r)
                if args.only_json:
                    continue
                print(f"{backend} {homes}x{days}: {r.messages} msgs filled in {r.fill_s:.1f} s,"
                      f" store {r.store_bytes / 1e6:.1f} MB, report {r.report_s:.2f} s,"
                      f" peak {r.report_rss / 1e6:.0f} MB", flush=True)
    if args.only_json:
        print(json.dumps([r.__dict__ for r in results]))
        return
    if baseline:
        print("\n== this code / baseline tree, same sizes, measured alternately ==")
        print(f"{'backend':>10} {'size':>7} {'store':>7} {'report s':>9} {'peak':>7}"
              f" {'fill msg/s':>10}")
        for b, r in zip(baseline, results, strict=True):
            print(f"{r.backend:>10} {r.homes:>3}x{r.days:<3} {r.store_bytes / b.store_bytes:>7.2f}"
                  f" {r.report_s / b.report_s:>9.2f} {r.report_rss / b.report_rss:>7.2f}"
                  f" {(r.messages / r.fill_s) / (b.messages / b.fill_s):>10.2f}")
        print("baseline tree:", args.baseline_tree)
        print_results(baseline)
        print("this code:")
    print("\nINVENTED data (synthesised homes, not measurements). Per home-week = per home"
          " and 7 days; 'x base' = per-home-week cost over the baseline's in this run;"
          " 'w/o queue' = MB per home-week without the export queue (a store without an"
          " exporter need not keep one).")
    print_results(results)
    if args.json:
        print(json.dumps([{**r.__dict__, "home_weeks": r.home_weeks} for r in results]))


if __name__ == "__main__":
    main()
