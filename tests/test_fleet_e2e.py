"""End to end on real parts: Mosquitto (project broker-config) → edge agents → collector →
SQLite recorder store → victoria-metrics (InfluxDB v2 write API), all on loopback.

Scenarios are invented. Expected classifications come from IEEE 1159-2009 Table 2 and the
ITIC (2000) curve; durations carry the IEC 61000-4-30 Ed.3 ±1 cycle uncertainty (from
memory, tests/SOURCES.md).
"""

from __future__ import annotations

import threading
from pathlib import Path

import comtrade
import numpy as np
import pytest
from _fleet_helpers import EXPORT, make_fleet
from _tsdb_helpers import VictoriaMetrics, sample_count, victoria_metrics

from agent.cli.main import main
from agent.collect.service import Collector, load_collector_settings
from agent.publish.edge import EdgeResult, run_edge
from agent.settings import load_edge_settings
from agent.store.export import from_stored_json
from agent.store.recorder import RecorderStore
from agent.wire.codec import summary_arrays

DEVICES = ("home-1", "home-2", "home-3")
__all__ = ["victoria_metrics"]  # the fixture, imported for pytest


@pytest.fixture
def fleet(tmp_path: Path, victoria_metrics: VictoriaMetrics):
    """Three invented homes: a feeder-wide dip (55 % for 150 ms at 4 s) at every home and an
    inverter swell (115 % for 0.8 s at 8 s) at home-3 only; see tests/_fleet_helpers.py."""
    f = make_fleet(tmp_path, len(DEVICES), duration=12.0, summary=5)
    assert tuple(f.devices) == DEVICES
    cfg = f.collector_config(extra=EXPORT.format(url=victoria_metrics.url))
    yield victoria_metrics, cfg, [f.edge_configs[d] for d in DEVICES]
    f.stop_all()


def _run_agents(configs: list[Path]) -> list[EdgeResult]:
    results: list[EdgeResult | None] = [None] * len(configs)

    def one(i: int) -> None:
        results[i] = run_edge(load_edge_settings(configs[i]), pace=False, drain_timeout_s=30)

    threads = [threading.Thread(target=one, args=(i,)) for i in range(len(configs))]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert all(r is not None for r in results)
    return [r for r in results if r is not None]


def test_fleet_events_reach_the_store_classified(fleet) -> None:
    vm, collector_cfg, configs = fleet
    settings = load_collector_settings(collector_cfg)
    collector = Collector(settings)
    stop, ready = threading.Event(), threading.Event()
    thread = threading.Thread(target=collector.run, args=(stop,), kwargs={"ready": ready})
    thread.start()
    try:
        assert ready.wait(20)
        results = _run_agents(configs)
        # Every agent's outbox drained: the collector's acknowledgement covered everything.
        assert [r.outbox_pending for r in results] == [0, 0, 0]
        # victoria-metrics stores one series per field (hc_event_duration_s); exports lag a
        # few seconds, so poll (bounded).
        series = vm.poll_export('{__name__="hc_event_duration_s"}',
                                lambda got: sample_count(got) >= 4, timeout_s=30)
    finally:
        stop.set()
        thread.join(timeout=60)
    store = RecorderStore(settings.store_url, settings.captures_dir)
    try:
        events = store.events()
        by_device: dict[str, list[dict]] = {}
        for ev in events:
            by_device.setdefault(ev["device"], []).append(ev)
        assert sorted(by_device) == list(DEVICES)
        for d in DEVICES:
            evs = sorted(by_device[d], key=lambda e: e["start_utc"])
            kinds = [e["kind"] for e in evs]
            assert kinds == (["dip", "swell"] if d == "home-3" else ["dip"])
            dip = evs[0]
            assert dip["state"] == "closed"
            # 150 ms = 7.5 cycles at 55 %: IEEE 1159 instantaneous sag; ±1 cycle on duration.
            assert dip["duration_s"] == pytest.approx(0.15, abs=0.02)
            assert dip["classification"]["ieee1159_category"] == "sag"
            assert dip["classification"]["ieee1159_duration_class"] == "instantaneous"
            # ITIC (2000): 55 % for 150 ms is below the 70 % line (20 ms-0.5 s): no damage region.
            assert dip["classification"]["itic_region"] == "no_damage"
        swell = sorted(by_device["home-3"], key=lambda e: e["start_utc"])[1]
        dip = sorted(by_device["home-3"], key=lambda e: e["start_utc"])[0]
        # Per-second trend from the summaries: every second once, none missing, with the
        # injected levels (55 % dip, 115 % swell of 230 V; analytic, within 0.5 % of Udin).
        arrays = [summary_arrays(from_stored_json(r["payload"])) for r in store.trend("home-3")]
        t = np.concatenate([a.t[a.present] for a in arrays])
        rms_min = np.concatenate([a.rms_min[a.present, 0] for a in arrays])
        rms_max = np.concatenate([a.rms_max[a.present, 0] for a in arrays])
        hz = np.concatenate([a.hz[a.present] for a in arrays])
        assert np.all(np.diff(np.sort(t)) == 1.0) and len(t) == len(set(t.tolist())) >= 10
        # A second is touched by an event if it overlaps the event or the last one-cycle
        # Urms(1/2) window that still saw it (values are binned by window end).
        def touched(ev: dict) -> np.ndarray:
            return (t + 1 > ev["start_utc"]) & (t < ev["end_utc"] + 0.04)

        in_dip, in_swell = touched(dip), touched(swell)
        assert rms_min[in_dip].min() == pytest.approx(0.55 * 230, abs=0.005 * 230)
        assert rms_max[in_swell].max() == pytest.approx(1.15 * 230, abs=0.005 * 230)
        quiet = ~(in_dip | in_swell)
        assert np.allclose(rms_min[quiet], 230.0, atol=0.005 * 230)
        # Frequency of the invented 50-Hz supply within 10 mHz (IEC 61000-4-30 Ed.3 Class A
        # frequency uncertainty, from memory: tests/SOURCES.md).
        # Only the agent's last second may lack a frequency: the source stops inside it,
        # before a whole cycle closes, and a missing value is sent as missing, not guessed.
        missing = ~np.isfinite(hz)
        assert not missing.any() or (missing.sum() == 1 and missing[np.argmax(t)])
        assert np.allclose(hz[quiet & ~missing], 50.0, atol=0.01)
        # 0.8 s at 115 %: IEEE 1159 momentary swell (30 cycles-3 s, 1.1-1.4 pu).
        assert swell["classification"]["ieee1159_duration_class"] == "momentary"
        # Each event has its start and end captures, reassembled from chunks.
        assert all(store.captures(e["event_id"]) for e in events)
        assert store.dead_letters() == []
        # Time-series server: one point per ended event (4), tagged by device and category,
        # never duplicated although the exporter may retry.
        assert sample_count(series) == len(events) == 4
        tagged = {(x["metric"]["device"], x["metric"]["category"]) for x in series}
        assert ("home-3", "momentary_swell") in tagged
        assert {d for d, _ in tagged} == set(DEVICES)
        # COMTRADE export of the swell's end capture, read back by the independent `comtrade`
        # package (IEEE C37.111-1999): same samples in volts, rate and channel name.
        swell_caps = [c for c in store.captures(swell["event_id"])
                      if c["fields"]["trigger"] == "end"]
        assert len(swell_caps) == 1
        cap = store.capture(swell_caps[0]["capture_id"])
    finally:
        store.close()
    out = collector_cfg.parent / "comtrade"
    assert main(["capture", "export", "--store", settings.store_url, "--captures",
                 str(settings.captures_dir), "--id", cap.capture_id, "--out", str(out)]) == 0
    rec = comtrade.Comtrade()
    rec.load(str(out / f"{cap.capture_id}.cfg"), str(out / f"{cap.capture_id}.dat"))
    assert rec.analog_channel_ids == ["L1"]
    assert rec.cfg.sample_rates[0][0] == pytest.approx(3840.0)
    assert rec.frequency == 50.0  # from the device's site model, sent with its online status
    volts = np.asarray(rec.analog[0])
    assert np.allclose(volts, cap.counts[:, 0] * cap.scale[0], rtol=1e-6, atol=1e-3)
