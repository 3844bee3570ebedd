"""Per-second trend kept as packed rows, its accessors, rollups, partitions and the migration
from the JSON trend of schema versions 1-2. Every store test runs on SQLite and PostgreSQL.

The per-second values are an invented half hour of one split-phase home (made up here, not a
measurement). Decoded values are checked against the wire's own row-by-row decoder
(``agent.wire.codec.summary_arrays``) and rollups against plain numpy over the same seconds
(``np.count_nonzero``, ``np.min``, ``np.sum``; common practice); the 0.9 / 1.1 pu thresholds
are IEEE 1159's sag and swell limits, 0.95 / 1.05 ANSI C84.1 Range A service (pub; see
tests/SOURCES.md, "Store rollups").
"""

from __future__ import annotations

import math
import time
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from _store_helpers import pg_database, store_url

from agent.report.fleet import fleet_report
from agent.store.db import Database
from agent.store.recorder import _MIGRATIONS, TREND_PARTITION_S, Item, RecorderStore, to_json
from agent.store.trend import HIGH_PU, LOW_PU, decode_rows
from agent.wire import codec
from agent.wire.codec import summary_arrays
from agent.wire.records import FLAG_EVENT, SummaryBatcher

__all__ = ["pg_database", "store_url"]

SITE = "invented-close"
NOMINAL = 120.0
# Whole minute, a few days before a UTC week boundary (1_779_840_000 is a multiple of 604800).
T0 = 1_779_840_000.0 - 2 * 86400.0 - 1800.0


def seconds(n: int, seed: int = 3) -> dict[str, np.ndarray]:
    """Invented per-second values with gaps, flagged seconds and values around the limits."""
    rng = np.random.default_rng(seed)
    mean = NOMINAL + rng.normal(0.0, 4.0, (n, 2))
    mean[100:130, 0] = 0.87 * NOMINAL  # a long sag on L1
    mean[500:520, 1] = 1.12 * NOMINAL  # a swell on L2
    mean[700:705, 1] = np.nan  # a leg without a value
    flags = np.zeros(n)
    flags[100:103] = FLAG_EVENT
    flags[900:960] = np.nan  # seconds not measured at all
    return {"t": T0 + np.arange(n, dtype=float), "mean": mean, "low": mean - 0.5,
            "high": mean + 0.5, "hz": 60.0 + rng.normal(0.0, 0.01, n),
            "thd": np.full((n, 2), 0.02), "imb": np.full(n, np.nan), "flags": flags}


def summaries(s: dict[str, np.ndarray], device: str = "unit-1", k: int = 60,
              first_seq: int = 1) -> list[dict[str, Any]]:
    batcher = SummaryBatcher(["L1", "L2"], k=k)
    keep = ~np.isnan(s["flags"])
    bodies = batcher.add_many(s["t"][keep], s["low"][keep], s["mean"][keep], s["high"][keep],
                              s["hz"][keep], s["thd"][keep], s["imb"][keep], s["flags"][keep])
    last = batcher.flush()
    ident = codec.Identity(SITE, device, "e1")
    return [codec.decode(codec.encode(ident.stamp(b, first_seq + i)))
            for i, b in enumerate([*bodies, *([last] if last else [])])]


def status(device: str, seq: int) -> dict[str, Any]:
    body = codec.status_body("online", agent_version="t", uptime_s=1.0, outbox_depth=0,
                             sync="synced", time_error_s=0.001, t=T0 - 1.0,
                             site_model={"nominal_v": NOMINAL, "nominal_hz": 60.0,
                                         "service_type": "120/240",
                                         "channel_names": ["L1", "L2"],
                                         "measurement_point": "service", "feeder": "F1",
                                         "transformer": None, "labels": {}})
    return codec.decode(codec.encode(codec.Identity(SITE, device, "e1").stamp(body, seq)))


def reference(messages: list[dict[str, Any]]) -> dict[str, np.ndarray]:
    """Row-by-row decoding with the wire's own decoder, present seconds only."""
    arrays = [summary_arrays(m) for m in messages if m["type"] == "summary"]
    keep = np.concatenate([a.present for a in arrays])
    return {"t": np.concatenate([a.t for a in arrays])[keep],
            "mean": np.concatenate([a.rms_mean for a in arrays])[keep],
            "low": np.concatenate([a.rms_min for a in arrays])[keep],
            "high": np.concatenate([a.rms_max for a in arrays])[keep],
            "hz": np.concatenate([a.hz for a in arrays])[keep],
            "flags": np.concatenate([a.flags for a in arrays])[keep]}


def chunks_of(store: RecorderStore, device: str, **kw: Any) -> dict[str, np.ndarray]:
    parts = list(store.trend_arrays(device, **kw))
    keep = np.concatenate([c.present for c in parts])
    return {"t": np.concatenate([c.t for c in parts])[keep],
            "mean": np.concatenate([c.rms_mean for c in parts])[keep],
            "low": np.concatenate([c.rms_min for c in parts])[keep],
            "high": np.concatenate([c.rms_max for c in parts])[keep],
            "hz": np.concatenate([c.hz for c in parts])[keep],
            "flags": np.concatenate([c.flags for c in parts])[keep]}


def assert_same(a: dict[str, np.ndarray], b: dict[str, np.ndarray]) -> None:
    assert a.keys() == b.keys()
    for key in a:
        np.testing.assert_array_equal(a[key], b[key], err_msg=key)  # bit for bit, NaN = NaN


def test_decode_rows_equals_the_wire_decoder_row_by_row() -> None:
    s = seconds(1000)
    msgs = summaries(s) + summaries(seconds(45, seed=9), device="unit-1", k=15, first_seq=50)
    chunk = decode_rows(msgs)  # two lengths (60 and 15 s) in one chunk
    arrays = [summary_arrays(m) for m in msgs]
    np.testing.assert_array_equal(chunk.t, np.concatenate([a.t for a in arrays]))
    np.testing.assert_array_equal(chunk.rms_mean, np.concatenate([a.rms_mean for a in arrays]))
    np.testing.assert_array_equal(chunk.thd, np.concatenate([a.thd for a in arrays]))
    np.testing.assert_array_equal(chunk.imbalance,
                                  np.concatenate([a.imbalance for a in arrays]))
    np.testing.assert_array_equal(chunk.present, np.concatenate([a.present for a in arrays]))
    assert chunk.errors == 0
    # A row that does not decode costs itself only.
    broken = dict(msgs[1], rms_mean=[[-2, 0, 9, b"\x00"], None])
    bad = decode_rows([msgs[0], broken, None, msgs[2]])
    assert bad.errors == 2 and bad.size == 120
    np.testing.assert_array_equal(bad.t, np.concatenate([arrays[0].t, arrays[2].t]))


def test_trend_rows_are_packed_and_read_back_by_period(store_url: str, tmp_path: Path) -> None:
    s = seconds(1000)
    msgs = [status("unit-1", 1), *summaries(s, first_seq=2)]
    with RecorderStore(store_url, tmp_path / "c") as store:
        store.commit_batch(msgs)
        assert store.count("trend") == len(msgs) - 1
        assert_same(chunks_of(store, "unit-1"), reference(msgs))
        # Row payloads come back as the messages committed (bytes as bytes).
        assert [r["payload"] for r in store.trend("unit-1")] == msgs[1:]
        # A period selects whole summaries by their first second; small pages change nothing.
        part = chunks_of(store, "unit-1", start_utc=T0 + 120, end_utc=T0 + 600, page=2)
        assert part["t"][0] == T0 + 120 and part["t"][-1] == T0 + 599
        # The stored packed bytes are far smaller than the same message as JSON text.
        (size,) = store.db.query_one("SELECT SUM(LENGTH(data)) FROM trend") or (0,)
        assert size < 0.6 * sum(len(to_json(m)) for m in msgs[1:])


def test_rollups_match_numpy_and_survive_redelivery(store_url: str, tmp_path: Path) -> None:
    s = seconds(1800)
    msgs = [status("unit-1", 1), *summaries(s, first_seq=2)]
    with RecorderStore(store_url, tmp_path / "c") as store:
        # In three batches, then the whole stream again (redelivery): counted once.
        for part in (msgs[:7], msgs[7:20], msgs[20:], msgs):
            store.commit_batch([Item(message=m) for m in part])
        rows = store.rollups("unit-1", span_s=600)
        days = store.rollups("unit-1", span_s=86400)
    ref = reference(msgs)
    slots = np.floor(ref["t"] / 600.0)
    assert sorted({r["t_utc"] for r in rows}) == sorted(set(slots * 600.0))
    for r in rows:
        sel = slots * 600.0 == r["t_utc"]
        v = ref["mean"][sel, r["channel"]]
        fl = (ref["flags"][sel] & FLAG_EVENT) != 0
        good = np.isfinite(v)
        assert r["seconds"] == np.count_nonzero(good)
        assert r["flagged"] == np.count_nonzero(good & fl)
        assert r["sum_v"] == pytest.approx(np.sum(v[good]), rel=1e-12)
        assert r["sum_sq_v2"] == pytest.approx(np.sum(v[good] ** 2), rel=1e-12)
        assert r["min_v"] == np.min(v[good]) and r["max_v"] == np.max(v[good])
        assert r["low_v"] == np.nanmin(ref["low"][sel, r["channel"]])
        assert r["peak_v"] == np.nanmax(ref["high"][sel, r["channel"]])
        assert r["nominal_v"] == NOMINAL
        assert r["below"] == {p: np.count_nonzero(v[good] < p * NOMINAL) for p in LOW_PU}
        assert r["above"] == {p: np.count_nonzero(v[good] > p * NOMINAL) for p in HIGH_PU}
    # The sag of 30 s at 0.87 pu on L1 and the swell of 20 s at 1.12 pu on L2 are counted.
    assert sum(r["below"][0.9] for r in rows if r["channel"] == 0) >= 30
    assert sum(r["above"][1.1] for r in rows if r["channel"] == 1) >= 20
    # The day rows hold the same seconds as the 10-min rows.
    for c in (0, 1):
        assert sum(r["seconds"] for r in days if r["channel"] == c) == \
            sum(r["seconds"] for r in rows if r["channel"] == c)


def test_drop_trend_before(store_url: str, tmp_path: Path) -> None:
    # Two UTC weeks of sparse summaries (one every 6 h) plus the dense run near T0.
    ident = codec.Identity(SITE, "unit-2", "e1")
    sparse = [codec.decode(codec.encode(ident.stamp(_one(T0 + h * 21600.0), h + 1)))
              for h in range(40)]
    with RecorderStore(store_url, tmp_path / "c") as store:
        store.commit_batch(sparse)
        boundary = (math.floor(T0 / TREND_PARTITION_S) + 1) * TREND_PARTITION_S
        if store.db.dialect == "postgresql":
            parts = store.db.query("SELECT c.relname FROM pg_inherits i JOIN pg_class c ON"
                                   " c.oid = i.inhrelid WHERE i.inhparent = to_regclass('trend')")
            assert len(parts) >= 2  # one partition per UTC week touched
        before = sum(1 for m in sparse if m["t0"] < boundary + 3600.0)
        assert store.drop_trend_before(boundary + 3600.0) == before
        left = [r["t_utc"] for r in store.trend("unit-2")]
        assert left == [m["t0"] for m in sparse if m["t0"] >= boundary + 3600.0]
        # New data for a dropped week still finds (recreates) its partition.
        store.commit_batch([codec.decode(codec.encode(codec.Identity(SITE, "unit-2", "e2")
                                                      .stamp(_one(T0), 1)))])
        assert store.count("trend") == len(left) + 1


def _one(t: float) -> dict[str, Any]:
    batcher = SummaryBatcher(["L1"], k=60)
    batcher.add_many(np.array([t]), np.array([[119.0]]), np.array([[120.0]]),
                     np.array([[121.0]]), np.array([60.0]), np.array([[0.02]]),
                     np.array([np.nan]), np.array([0]))
    body = batcher.flush()
    assert body is not None
    return body


def _v2_store(url: str, messages: list[dict[str, Any]]) -> None:
    """A store at schema version 2 holding ``messages`` as versions 1-2 wrote them: every
    table through SQL with the rows the old commit path made (JSON text payloads)."""
    db = Database(url)
    try:
        db.migrate(_MIGRATIONS[:2])
        now = time.time()
        with db.transaction():
            for m in messages:
                ident = (m["device"], m["epoch"], m["seq"])
                db.execute("INSERT INTO received (device, epoch, seq, type, received_at)"
                           " VALUES (?, ?, ?, ?, ?)", (*ident, m["type"], now))
                if m["type"] == "summary":
                    db.execute("INSERT INTO trend (device, epoch, seq, site, t_utc, payload,"
                               " received_at) VALUES (?, ?, ?, ?, ?, ?, ?)",
                               (*ident, m["site"], m["t0"], to_json(m), now))
                elif m["type"] == "aggregate":
                    db.execute("INSERT INTO aggregates (device, epoch, seq, site, kind, t_utc,"
                               " duration_s, payload, received_at) VALUES"
                               " (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                               (*ident, m["site"], m["kind"], m["t"], m["duration_s"],
                                to_json(m), now))
            db.execute("INSERT INTO devices (device, site, model, first_seen, last_seen, state,"
                       " state_since) VALUES (?, ?, ?, ?, ?, 'online', ?)",
                       ("unit-1", SITE, to_json({"nominal_v": NOMINAL, "nominal_hz": 60.0,
                                                 "measurement_point": "service"}),
                        T0, T0 + 2000.0, T0))
            db.execute("INSERT INTO streams (device, epoch, committed_upto, first_seen,"
                       " updated_at) VALUES ('unit-1', 'e1', ?, ?, ?)",
                       (max(m["seq"] for m in messages), now, now))
    finally:
        db.close()


def test_migration_brings_a_json_trend_store_forward(store_url: str, tmp_path: Path) -> None:
    msgs = summaries(seconds(1800), first_seq=1)
    agg = codec.aggregate_body(codec.aggregate_from_message({
        "kind": "10min", "t": T0, "duration_s": 600.0, "rms": [120.5, 119.5],
        "thd": [0.02, 0.02], "hz": 60.0, "flagged": False, "count": 3000}), ["L1", "L2"])
    msgs.append(codec.decode(codec.encode(codec.Identity(SITE, "unit-1", "e1").stamp(
        agg, len(msgs) + 1))))
    url = store_url if store_url.startswith("postgresql") else \
        f"sqlite:///{tmp_path / 'old.db'}"
    _v2_store(url, msgs)
    with RecorderStore(url, tmp_path / "c", migrate=False) as old:
        counts = {t: old.count(t) for t in ("received", "trend", "aggregates", "devices",
                                            "streams")}
        assert old.db.schema_version() == 2
    with RecorderStore(url, tmp_path / "c") as store:  # migrates
        assert store.db.schema_version() == RecorderStore.latest_schema_version()
        assert {t: store.count(t) for t in counts} == counts  # no row lost
        rows = store.trend("unit-1")
        summary_msgs = [m for m in msgs if m["type"] == "summary"]
        assert [(r["epoch"], r["seq"], r["t_utc"]) for r in rows] == \
            [(m["epoch"], m["seq"], m["t0"]) for m in summary_msgs]
        assert [r["payload"] for r in rows] == summary_msgs  # same message, bytes restored
        assert_same(chunks_of(store, "unit-1"), reference(msgs))
        migrated_rollups = store.rollups("unit-1")
        migrated = fleet_report(store, now=T0 + 4000.0)
        # Migrating again changes nothing.
        assert store.migrate() == RecorderStore.latest_schema_version()
    # The same messages committed by today's code give the same rollups and the same report.
    fresh_url = f"sqlite:///{tmp_path / 'fresh.db'}"
    with RecorderStore(fresh_url, tmp_path / "c2") as fresh:
        fresh.update_device_model("unit-1", SITE, {"nominal_v": NOMINAL, "nominal_hz": 60.0,
                                                   "measurement_point": "service"})
        fresh.commit_batch(msgs)
        assert fresh.rollups("unit-1") == pytest.approx(migrated_rollups)
        again = fleet_report(fresh, now=T0 + 4000.0)
    for r in (migrated, again):
        for d in r["devices"]:
            for key in ("first_seen", "last_seen", "last_seen_utc", "silent_s", "state",
                        "state_since", "attention", "now", "attention_now"):
                d.pop(key, None)
        for key in ("generated", "period", "attention", "store", "now"):
            r.pop(key, None)
    assert migrated == again
