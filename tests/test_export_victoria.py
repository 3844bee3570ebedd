"""Time-series export against a real server: VictoriaMetrics' InfluxDB v2 write API.

VictoriaMetrics stores field F of measurement M as series ``M_F`` with the tags as labels,
timestamps in ms, string fields as 0 (VictoriaMetrics docs, "How to send data from InfluxDB-
compatible agents"). ``-dedup.minScrapeInterval=1ms`` keeps one sample per series and ms, the
behaviour InfluxDB has natively (one point per series and timestamp; InfluxDB 2.x docs
"Handle duplicate data points").
"""

from __future__ import annotations

import math
import threading
import time
import urllib.request
from typing import Any

from _tsdb_helpers import SqliteExportQueue, VictoriaMetrics, sample_count, victoria_metrics

from agent.events.classify import classify_event
from agent.events.types import Event, Thresholds
from agent.measurement.types import Aggregate
from agent.store.export import TimeSeriesExporter
from agent.wire.codec import aggregate_body, event_body, status_body
from agent.wire.records import SecondRecord, SummaryBatcher

__all__ = ["victoria_metrics"]  # the fixture, imported for pytest

# Invented data a day in the past on a whole minute: inside the retention, never in the future
# (an export ends at "now" by default).
BASE = float((int(time.time()) - 86400) // 60 * 60)  # whole minute: summaries align to K=60
BASE_MS = int(BASE) * 1000


def exporter(queue: SqliteExportQueue, vm: VictoriaMetrics, **kw: Any) -> TimeSeriesExporter:
    return TimeSeriesExporter(queue, vm.url, "unused-token", "org1", "bucket1",
                              backoff_initial_s=0.1, backoff_max_s=0.5, jitter=0.0, **kw)


def as_samples(series: list[dict[str, Any]]) -> dict[tuple[str, frozenset[tuple[str, str]]],
                                                      list[tuple[int, float]]]:
    out = {}
    for s in series:
        labels = dict(s["metric"])
        name = labels.pop("__name__")
        key = (name, frozenset(labels.items()))
        assert key not in out, f"series {key} exported twice"
        out[key] = list(zip(s["timestamps"], s["values"], strict=True))
    return out


def vm_influx_rows_inserted(vm: VictoriaMetrics) -> float:
    """The server's own counter of InfluxDB-protocol samples (one per field) received."""
    with urllib.request.urlopen(vm.url + "/metrics", timeout=5) as r:
        for line in r.read().decode().splitlines():
            if line.startswith('vm_rows_inserted_total{type="influx"}'):
                return float(line.split()[-1])
    raise AssertionError("victoria-metrics /metrics has no influx rows counter")


def poll_counter(vm: VictoriaMetrics, at_least: float, timeout_s: float = 30.0) -> float:
    """The counter updates a moment after the write returns: re-read it (bounded)."""
    deadline = time.monotonic() + timeout_s
    value = vm_influx_rows_inserted(vm)
    while value < at_least and time.monotonic() < deadline:
        time.sleep(0.2)
        value = vm_influx_rows_inserted(vm)
    return value


def envelope(body: dict[str, Any], site: str, device: str = "d1") -> dict[str, Any]:
    return {**body, "site": site, "device": device, "epoch": "ep1", "seq": 1}


def summary(site: str, t0: float, n: int, base_v: float = 230.0) -> dict[str, Any]:
    """One summary message for n seconds from t0 (inside one minute)."""
    batcher = SummaryBatcher(["L1"], k=60)
    bodies = []
    for i in range(n):
        bodies += batcher.add(SecondRecord(t=t0 + i, rms_min=[base_v - 1],
                                           rms_mean=[base_v + i / 100], rms_max=[base_v + 1],
                                           hz=50.0, thd=[0.02]))
    last = batcher.flush()  # the batcher emits by itself at the minute's last second
    bodies += [last] if last is not None else []
    assert len(bodies) == 1, "a test summary must stay inside one minute"
    return envelope(bodies[0], site)


def write_precision_rows(vm: VictoriaMetrics) -> None:
    """One status per precision, each under its own site, all at BASE + 0.25 s."""
    for precision in ("s", "ms", "us", "ns"):
        q = SqliteExportQueue()
        q.enqueue("status", envelope(status_body("online", agent_version="0.1", uptime_s=7.0,
                                                 outbox_depth=0, sync="synced",
                                                 time_error_s=None, t=BASE + 0.25),
                                     f"p{precision}"))
        with exporter(q, vm, precision=precision) as exp:
            assert exp.drain(timeout_s=30).completed == 1


def check_precision_rows(vm: VictoriaMetrics) -> None:
    series = vm.poll_export('hc_status_uptime_s{site=~"p.*"}', lambda s: len(s) >= 4)
    stamps = {s["metric"]["site"]: s["timestamps"] for s in series}
    # VictoriaMetrics keeps ms; "s" precision rounds 0.25 s away (line-protocol precision)
    assert stamps == {"ps": [BASE_MS], "pms": [BASE_MS + 250], "pus": [BASE_MS + 250],
                      "pns": [BASE_MS + 250]}


def test_each_kind_and_precision_arrive_with_measurement_tags_fields_time(
        victoria_metrics: VictoriaMetrics) -> None:
    vm = victoria_metrics
    # (new series take about 10 s to show in VictoriaMetrics: one test, one wait)
    write_precision_rows(vm)
    q = SqliteExportQueue()
    agg = Aggregate(kind="10min", t_utc=BASE, duration_s=600.0, rms=(230.5,), thd=(0.031,),
                    flagged=True, count=3000)
    q.enqueue("aggregate", envelope(aggregate_body(agg, ["L1"]), "kinds"))
    batcher = SummaryBatcher(["L1"], k=60)
    batcher.add(SecondRecord(t=BASE + 1, rms_min=[228.0], rms_mean=[229.5], rms_max=[231.25],
                             hz=49.98, thd=[0.0123]))
    body = batcher.flush()
    assert body is not None
    q.enqueue("summary", envelope(body, "kinds"))
    ev = Event(event_id="e-1", kind="dip", channels=(0,), start=0.0, start_utc=BASE + 2.125,
               nominal_v=230.0, thresholds=Thresholds(), level_v=143.75, end=1.0,
               end_utc=BASE + 2.375, sag_energy_s=0.123, ended_by="recovery")
    classify_event(ev, 50.0)
    q.enqueue("event", envelope(event_body(ev, "ended"), "kinds"))
    q.enqueue("status", envelope(status_body("online", agent_version="0.1", uptime_s=5.0,
                                             outbox_depth=2, sync="synced",
                                             time_error_s=0.004, t=BASE + 3), "kinds"))
    with exporter(q, vm) as exp:
        stats = exp.drain(timeout_s=30)
    assert stats.drained and stats.completed == 4 and stats.points == 5 and q.pending() == 0

    want_series = 17
    series = vm.poll_export('{site="kinds"}', lambda s: len(s) >= want_series)
    got = as_samples(series)
    ch = {("channel", "L1"), ("device", "d1"), ("site", "kinds")}
    agg_tags = frozenset(ch | {("interval", "10min")})
    dev = {("device", "d1"), ("site", "kinds")}
    # 0.625 pu for 0.25 s: IEEE 1159 instantaneous sag, ITIC 2000 no-damage region (70 % for
    # 20 ms-0.5 s), SEMI F47 outside (70 % for 0.2-0.5 s), IEEE 1564 Se = 1.25 (from memory)
    ev_tags = frozenset(dev | {("kind", "dip"), ("category", "instantaneous_sag"),
                               ("itic", "no_damage"), ("semi_f47", "outside"),
                               ("severity_class", "beyond_curve"), ("ended_by", "recovery")})
    st_tags = frozenset(dev | {("sync", "synced")})
    t_ev, t_tr = BASE_MS + 2125, BASE_MS + 1000
    expected = {
        ("hc_aggregate_rms", agg_tags): [(BASE_MS, 230.5)],
        ("hc_aggregate_thd", agg_tags): [(BASE_MS, 0.031)],
        ("hc_aggregate_flagged", agg_tags): [(BASE_MS, 1.0)],
        ("hc_aggregate_count", agg_tags): [(BASE_MS, 3000.0)],
        ("hc_trend_rms_min", frozenset(ch)): [(t_tr, 228.0)],
        ("hc_trend_rms_mean", frozenset(ch)): [(t_tr, 229.5)],
        ("hc_trend_rms_max", frozenset(ch)): [(t_tr, 231.25)],
        ("hc_trend_thd", frozenset(ch)): [(t_tr, 0.0123)],
        ("hc_trend_device_hz", frozenset(dev)): [(t_tr, 49.98)],
        ("hc_trend_device_flags", frozenset(dev)): [(t_tr, 0.0)],
        ("hc_trend_device_event", frozenset(dev)): [(t_tr, 0.0)],
        ("hc_event_level_pu", ev_tags): [(t_ev, 0.625)],
        ("hc_event_level_v", ev_tags): [(t_ev, 143.75)],
        ("hc_event_duration_s", ev_tags): [(t_ev, 0.25)],
        ("hc_event_sag_energy_s", ev_tags): [(t_ev, 0.123)],
        ("hc_status_online", st_tags): [(BASE_MS + 3000, 1.0)],
        ("hc_status_uptime_s", st_tags): [(BASE_MS + 3000, 5.0)],
        ("hc_status_outbox_depth", st_tags): [(BASE_MS + 3000, 2.0)],
        ("hc_status_time_error_s", st_tags): [(BASE_MS + 3000, 0.004)],
    }
    severity = got.pop(("hc_event_severity", ev_tags))
    assert severity[0][0] == t_ev and abs(severity[0][1] - 1.25) < 1e-9
    assert got == expected
    check_precision_rows(vm)


def test_outage_keeps_queue_then_catches_up_without_loss_or_duplicates(
        victoria_metrics: VictoriaMetrics) -> None:
    vm = victoria_metrics
    q = SqliteExportQueue()
    n_summary, per_summary, n_event = 300, 10, 20  # 300 summaries of 10 s = 3000 seconds
    for i in range(n_summary):
        q.enqueue("summary", summary("outage", BASE + 10 * i, per_summary))
    for i in range(n_event):
        q.enqueue("event", envelope({"kind": "dip", "start_utc": BASE + 10 * i + 0.5,
                                     "change": "ended", "duration_s": 0.1, "level_pu": 0.8},
                                    "outage", device=f"d{i % 4}"))
    total_rows = n_summary + n_event
    exp = exporter(q, vm, batch_size=50)
    first = exp.export_once()
    assert first.completed == 50 and q.pending() == total_rows - 50

    vm.stop()
    down = exp.export_once()
    assert down.error is not None and exp.held == 50
    assert q.pending() == total_rows - 50  # nothing completed while the server is down
    stats = exp.drain(timeout_s=1.0)
    assert not stats.drained and stats.completed == 0 and q.pending() == total_rows - 50

    # the background loop rides the outage and catches up once the server is back
    stop = threading.Event()
    runner = threading.Thread(target=exp.run, args=(stop,), kwargs={"idle_s": 0.05})
    runner.start()
    try:
        time.sleep(0.5)
        assert q.pending() == total_rows - 50
        vm.start()
        t_up = time.monotonic()
        deadline = t_up + 60
        while q.pending() and time.monotonic() < deadline:
            time.sleep(0.05)
        catch_up_s = time.monotonic() - t_up
    finally:
        stop.set()
        runner.join(timeout=30)
        exp.close()
    assert q.pending() == 0 and q.rejected() == []
    print(f"catch-up after restart: {catch_up_s:.2f} s for {total_rows - 50} rows")

    # each second → hc_trend rms_min/mean/max/thd (4) + hc_trend_device hz/flags/event (3);
    # each event → level_pu, duration_s (2). Dedup is on, so equality proves that no point
    # was written under a second timestamp or tag set.
    expected = n_summary * per_summary * 7 + n_event * 2
    vm.poll_export('{site="outage"}', lambda s: sample_count(s) >= expected)
    time.sleep(2.0)  # let any late (duplicate) sample surface before the final count
    series = vm.export('{site="outage"}')
    assert sample_count(series) == expected
    got = as_samples(series)
    means = got[("hc_trend_rms_mean", frozenset({("channel", "L1"), ("device", "d1"),
                                                  ("site", "outage")}))]
    seconds = n_summary * per_summary
    assert [t for t, _ in means] == [BASE_MS + 1000 * i for i in range(seconds)]
    # rms_mean of second 10 i + j is 230 + j / 100 V (10 mV quantisation is exact here)
    assert [v for _, v in means] == [230.0 + (i % per_summary) / 100 for i in range(seconds)]


def test_rewrite_after_crash_before_complete_is_idempotent(
        victoria_metrics: VictoriaMetrics) -> None:
    vm = victoria_metrics
    q = SqliteExportQueue()
    for i in range(40):
        agg = Aggregate(kind="10min", t_utc=BASE + 600 * i, duration_s=600.0,
                        rms=(230.0, 231.0), thd=(math.nan, math.nan), flagged=False, count=3000)
        q.enqueue("aggregate", envelope(aggregate_body(agg, ["L1", "L2"]), "crash"))
    before = vm_influx_rows_inserted(vm)
    q.fail_next_complete = 1  # the write reaches the server, then the "process" dies
    crashed = exporter(q, vm)
    try:
        crashed.export_once()
        raise AssertionError("complete_exports should have failed")
    except RuntimeError:
        pass
    crashed.close()
    assert q.pending() == 40  # rows were not completed: they are exported again
    with exporter(q, vm) as second:
        assert second.drain(timeout_s=30).completed == 40
    # 40 rows × 2 channels × (rms, flagged, count) fields = 240 samples per write
    expected = 40 * 2 * 3
    # the server received every sample twice (its own counter) ...
    assert poll_counter(vm, before + 2 * expected) - before == 2 * expected
    # ... and holds each one once
    vm.poll_export('{site="crash"}', lambda s: sample_count(s) >= expected)
    time.sleep(2.0)  # let any late (duplicate) sample surface before the final count
    assert sample_count(vm.export('{site="crash"}')) == expected
