"""The exporter driving the real recorder store's export queue into VictoriaMetrics.

Messages go through RecorderStore.commit_batch (which fills export_queue in the same
transaction); the exporter claims (with the store's lease), writes and completes. Counting
samples via /api/v1/export with dedup on (see test_export_victoria.py for the sources).
"""

from __future__ import annotations

import json
import math
import time
from pathlib import Path
from typing import Any

from _tsdb_helpers import VictoriaMetrics, sample_count, victoria_metrics

from agent.measurement.types import Aggregate
from agent.store.export import TimeSeriesExporter
from agent.store.recorder import RecorderStore
from agent.wire.codec import aggregate_body, status_body
from agent.wire.records import SecondRecord, SummaryBatcher

__all__ = ["victoria_metrics"]

BASE = float((int(time.time()) - 86400) // 60 * 60)  # invented data, a day ago, whole minute


def messages(first_seq: int, minutes: int) -> list[dict[str, Any]]:
    """One summary (60 s, 2 channels) and one 10-min aggregate per minute, then a status."""
    out: list[dict[str, Any]] = []
    seq = first_seq
    for m in range(minutes):
        t0 = BASE + 60 * m
        batcher = SummaryBatcher(["L1", "L2"], k=60)
        bodies = []
        for i in range(60):
            bodies += batcher.add(SecondRecord(t=t0 + i, rms_min=[229.0, 230.0],
                                               rms_mean=[230.0, 231.0], rms_max=[231.0, 232.0],
                                               hz=50.0, thd=[0.01, 0.02]))
        assert len(bodies) == 1  # emitted at the minute's last second
        agg = Aggregate(kind="10min", t_utc=t0, duration_s=600.0, rms=(230.0, 231.0),
                        thd=(math.nan, math.nan), flagged=False, count=3000)
        for body in (bodies[0], aggregate_body(agg, ["L1", "L2"])):
            out.append({**body, "device": "d1", "site": "store", "epoch": "ep1", "seq": seq})
            seq += 1
    status = status_body("heartbeat", agent_version="0.1", uptime_s=60.0 * minutes,
                         outbox_depth=0, sync="synced", time_error_s=0.001,
                         t=BASE + 60 * minutes)
    out.append({**status, "device": "d1", "site": "store", "epoch": "ep1", "seq": seq})
    return out


# per minute: 60 s × 2 channels × hc_trend (rms_min/mean/max, thd) + 60 × hc_trend_device
# (hz, flags, event) + hc_aggregate 2 channels × (rms, flagged, count); status: online,
# uptime_s, outbox_depth, time_error_s (last_ran is null)
def expected_samples(minutes: int) -> int:
    return minutes * (60 * 2 * 4 + 60 * 3 + 2 * 3) + 4


def test_real_store_queue_outage_release_and_catch_up(victoria_metrics: VictoriaMetrics,
                                                       tmp_path: Path) -> None:
    vm = victoria_metrics
    store = RecorderStore(f"sqlite:///{tmp_path / 'rec.db'}", tmp_path / "captures")

    def exporter() -> TimeSeriesExporter:
        return TimeSeriesExporter(store, vm.url, "t", "org1", "bucket1", batch_size=4,
                                  backoff_initial_s=0.1, backoff_max_s=0.5, jitter=0.0)

    first = messages(1, 5)
    store.commit_batch(first)
    assert store.export_backlog() == len(first)
    with exporter() as exp:
        stats = exp.drain(timeout_s=30)
    assert stats.drained and stats.completed == len(first) and store.export_backlog() == 0

    # outage: rows stay; close() releases the claim so a new exporter takes them at once
    second = messages(len(first) + 1, 5)
    # the second batch re-covers the same minutes: same series and timestamps (a replay)
    store.commit_batch(second)
    vm.stop()
    down = exporter()
    step = down.export_once()
    assert step.error is not None and down.held == 4
    down.close()
    assert store.export_backlog() == len(second)
    assert len(store.claim_exports(100, lease_s=0.0)) == len(second)  # released, not leased
    vm.start()
    t_up = time.monotonic()
    with exporter() as exp:
        stats = exp.drain(timeout_s=60)
    catch_up_s = time.monotonic() - t_up
    print(f"store catch-up: {stats.completed} rows, {stats.points} points in {catch_up_s:.2f} s")
    assert stats.drained and stats.completed == len(second) and store.export_backlog() == 0
    assert store.dead_letters() == []

    # both batches carry the same minutes and values: one sample per series and ms remains
    want = expected_samples(5)
    vm.poll_export('{site="store"}', lambda s: sample_count(s) >= want)
    time.sleep(2.0)  # let any late (duplicate) sample surface before the final count
    assert sample_count(vm.export('{site="store"}')) == want
    store.close()


def test_real_store_row_the_exporter_cannot_write_goes_to_dead_letter(
        victoria_metrics: VictoriaMetrics, tmp_path: Path) -> None:
    vm = victoria_metrics
    store = RecorderStore(f"sqlite:///{tmp_path / 'rec.db'}", tmp_path / "captures")
    bad = {"v": 1, "type": "aggregate", "device": "d1", "site": "deadletter", "epoch": "ep1",
           "seq": 1, "kind": "10min", "t": BASE, "duration_s": 600.0, "channels": ["L1", "L2"],
           "rms": [230.0], "thd": [], "hz": None, "flagged": False, "count": 1}
    store.commit_batch([bad, *messages(2, 1)])
    with TimeSeriesExporter(store, vm.url, "t", "o", "b") as exp:  # store has reject_exports
        stats = exp.drain(timeout_s=30)
    assert stats.drained and stats.rejected == 1 and store.export_backlog() == 0
    (record,) = store.dead_letters()  # the store keeps the row with the reason: not lost
    assert record["topic"] == "export/aggregate"
    assert json.loads(record["raw"])["rms"] == [230.0]
    assert "one value per channel" in record["reason"]
    store.close()
