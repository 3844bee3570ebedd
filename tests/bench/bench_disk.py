"""Recorder-store disk use per home (on demand, not part of the test suite).

    python tests/bench/bench_disk.py [--homes 2] [--hours 1] [--speed 60]

Runs the real chain on loopback (Mosquitto with the project's broker-config, simulated
split-phase homes as `halfcycle edge run` processes at the defaults: 1-s resolution, 60-s
summaries, 10-min aggregates; an SQLite collector without [export], as the default
configuration has none), then measures the store table by table with SQLite's dbstat
virtual table and extrapolates to one home-week. The invented scenario has one feeder dip
per home and one swell; events and captures are reported per event, not per week, since
their number depends on the grid.
"""

from __future__ import annotations

import argparse
import sqlite3
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from _fleet_helpers import CollectorThread, make_fleet

from agent.ops.retention import RetentionSettings

WEEK_S = 7 * 86400.0
TWO_CHANNELS = """
[[channels]]
name = "L1"
phase_deg = 0.0
[[channels]]
name = "L2"
phase_deg = 180.0
"""


def table_bytes(db: Path) -> dict[str, int]:
    conn = sqlite3.connect(db)
    try:
        rows = conn.execute("SELECT name, SUM(pgsize) FROM dbstat GROUP BY name").fetchall()
        index_of = dict(conn.execute(
            "SELECT name, tbl_name FROM sqlite_master WHERE type = 'index'").fetchall())
    finally:
        conn.close()
    out: dict[str, int] = {}
    for name, size in rows:
        table = index_of.get(name, name)  # an index counts for its table
        out[table] = out.get(table, 0) + int(size)
    return out


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--homes", type=int, default=2)
    ap.add_argument("--hours", type=float, default=1.0)
    ap.add_argument("--speed", type=float, default=60.0)
    args = ap.parse_args()
    seconds = args.hours * 3600.0
    with tempfile.TemporaryDirectory() as tmp:
        root = Path(tmp)
        fleet = make_fleet(root, args.homes, duration=seconds, summary=60)
        for d, cfg in fleet.edge_configs.items():
            scen = cfg.parent / "scenario.toml"
            scen.write_text(scen.read_text().replace("[adc]", TWO_CHANNELS + "[adc]"))
            cfg.write_text(cfg.read_text().replace('service_type = "1ph"',
                                                   'service_type = "120/240"')
                           .replace('channels = ["L1"]', 'channels = ["L1", "L2"]'))
            del d
        t0 = time.monotonic()
        try:
            with CollectorThread(fleet.collector_config()) as col:
                agents = [fleet.spawn_agent(d, speed=args.speed) for d in fleet.devices]
                for p in agents:
                    p.wait(seconds / args.speed * 3 + 120)
                issued = sum(fleet.last_seq(d)[1] for d in fleet.devices)
                end = time.monotonic() + 60
                while col.collector.stats.committed < issued and time.monotonic() < end:
                    time.sleep(0.2)
        finally:
            fleet.stop_all()
        db = root / "recorder.db"
        sizes = table_bytes(db)
        caps = sum(f.stat().st_size for f in (root / "captures").glob("*.bin"))
        conn = sqlite3.connect(db)
        n_events = conn.execute("SELECT COUNT(*) FROM events").fetchone()[0]
        conn.close()
    home_s = args.homes * seconds
    # Less what an empty store already takes (a page or two per table and index), so the
    # figures are growth, not SQLite's fixed overhead.
    with tempfile.TemporaryDirectory() as tmp:
        from agent.store.recorder import RecorderStore

        RecorderStore(f"sqlite:///{tmp}/empty.db", Path(tmp) / "c").close()
        empty = table_bytes(Path(tmp) / "empty.db")
    sizes = {t: max(0, b - empty.get(t, 0)) for t, b in sizes.items()}
    per_week = {t: b / home_s * WEEK_S for t, b in sizes.items()}
    print(f"{args.homes} homes x {args.hours} h simulated, {time.monotonic() - t0:.0f} s wall; "
          f"{issued} messages")
    print(f"{'table':<16} {'bytes':>10} {'MB per home-week':>18}")
    for t in sorted((t for t in sizes if sizes[t]), key=lambda k: -sizes[k]):
        print(f"{t:<16} {sizes[t]:>10} {per_week[t] / 1e6:>18.2f}")
    steady = ("trend", "received", "aggregates", "streams", "devices", "gaps")
    week = sum(per_week.get(t, 0.0) for t in steady)
    r = RetentionSettings()
    bound = (per_week.get("trend", 0.0) * r.trend_days / 7
             + per_week.get("received", 0.0) * r.received_days / 7)
    print(f"data without events: {week / 1e6:.2f} MB per home-week "
          f"(trend {per_week.get('trend', 0) / 1e6:.2f}, received "
          f"{per_week.get('received', 0) / 1e6:.2f}, aggregates "
          f"{per_week.get('aggregates', 0) / 1e6:.3f})")
    print(f"at the default retention (trend {r.trend_days:g} d, received {r.received_days:g} d)"
          f" trend + received level off at {bound / 1e6:.1f} MB per home; aggregates grow "
          f"{per_week.get('aggregates', 0) / 1e6 * 52:.1f} MB per home-year")
    if n_events:
        ev = sizes.get("events", 0) + sizes.get("captures", 0) + caps
        print(f"events and captures: {ev / n_events / 1e3:.0f} kB per event "
              f"({n_events} events, capture files {caps} bytes)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
