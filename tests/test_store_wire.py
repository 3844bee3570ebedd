"""The store fed with real codec messages (agent.wire: encode → decode), as the collector will."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from agent.events.types import Capture, Event, Thresholds
from agent.measurement.types import Aggregate
from agent.store.recorder import Item, RecorderStore
from agent.wire import codec
from agent.wire.records import SecondRecord, SummaryBatcher

IDENT = codec.Identity(site="site-1", device="dev-1", epoch="ep1")


def _wire(body: dict[str, Any], seq: int) -> Item:
    raw = codec.encode(IDENT.stamp(body, seq))
    return Item(codec.decode(raw), topic=f"hc/v1/site-1/dev-1/{body['type']}", raw=raw)


def _event(end: float | None) -> Event:
    # Invented dip: 230 V nominal, residual 161 V = 0.7 pu, 120 ms.
    return Event(event_id="dev-1:ev:1", kind="dip", channels=(0,), start=1000.0,
                 start_utc=1_764_547_200.0, nominal_v=230.0, thresholds=Thresholds(),
                 level_v=161.0, end=None if end is None else 1000.0 + 921.6,
                 end_utc=end, classification={"ieee1159": "instantaneous_sag"})


@pytest.fixture
def store(tmp_path: Path) -> Iterator[RecorderStore]:
    with RecorderStore(f"sqlite:///{tmp_path / 'r.db'}", tmp_path / "caps") as s:
        yield s


def test_codec_messages_round_trip_into_store(store: RecorderStore) -> None:
    counts = (np.arange(768 * 2, dtype=np.int64).reshape(768, 2) % 4000 - 2000).astype(np.int16)
    cap = Capture(capture_id="dev-1:cap:1", event_id="dev-1:ev:1", trigger="start",
                  first_index=616, trigger_index=1000, trigger_utc=1_764_547_200.0,
                  sample_rate=7680.0, channel_names=("L1", "L2"),
                  scale=np.array([0.0125, 0.0125]), counts=counts, pre_cycles=10,
                  post_cycles=20)
    chunks = codec.capture_bodies(cap, topic="hc/v1/site-1/dev-1/capture", max_packet=1024)
    batcher = SummaryBatcher(["L1"], k=5)
    summaries = [b for s in range(6) for b in batcher.add(SecondRecord(
        t=1_764_547_200.0 + s, rms_min=[229.0], rms_mean=[230.0], rms_max=[231.0], hz=50.0,
        thd=[0.02]))]
    bodies: list[dict[str, Any]] = [
        codec.status_body("online", agent_version="0.1.0", uptime_s=1.0, outbox_depth=0,
                          sync="synced", time_error_s=0.001),
        codec.event_body(_event(None), "started"),
        codec.aggregate_body(Aggregate(kind="10min", t_utc=1_764_547_200.0, duration_s=600.0,
                                       rms=(230.2,), thd=(0.021,), count=3000), ["L1"]),
        *summaries,
        *chunks,
        {},  # the gap notice, below: it announces the two seqs after the last message
        codec.event_body(_event(1_764_547_200.12), "ended"),
    ]
    last = len(bodies)
    bodies[-2] = codec.gap_body("bulk", last + 1, last + 2, 2, "outbox_full")
    items = [_wire(b, seq) for seq, b in enumerate(bodies, start=1)]
    assert store.commit_batch(items[:3]) == {("dev-1", "ep1"): 3}
    assert store.events()[0]["state"] == "open"
    # Announced seqs count as accounted for at once: last + 1 and last + 2 never come.
    assert store.commit_batch(items[3:]) == {("dev-1", "ep1"): last + 2}
    (ev,) = store.events()
    assert ev["state"] == "closed" and ev["level_pu"] == pytest.approx(0.7)  # 161/230
    assert ev["duration_s"] == pytest.approx(0.12)  # end - start (analytic)
    assert ev["classification"] == {"ieee1159": "instantaneous_sag"}
    assert ev["captures"] == ["dev-1:cap:1"]
    assert store.count("trend") == len(summaries) == 1
    assert store.trend()[0]["t_utc"] == 1_764_547_200.0
    assert store.aggregates()[0]["t_utc"] == 1_764_547_200.0
    # Bit-exact counts back through the store and the codec's own decoder.
    back = store.capture("dev-1:cap:1")
    assert np.array_equal(back.counts, counts) and back.trigger_index == 1000
    assert back.channel_names == ("L1", "L2") and back.sample_rate == 7680.0
    assert store.dead_letters() == []
    assert store.gaps()[0]["first_seq"] == last + 1
    late = _wire(codec.aggregate_body(Aggregate(kind="10min", t_utc=1_764_547_800.0,
                                                duration_s=600.0, rms=(230.0,), thd=(0.02,)),
                                      ["L1"]), last + 3)
    assert store.commit_batch([late]) == {("dev-1", "ep1"): last + 3}


def test_presence_seq_zero_is_outside_the_sequence(store: RecorderStore) -> None:
    def presence(state: str) -> Item:
        return _wire(codec.status_body(state, agent_version="0.1.0", uptime_s=5.0,
                                       outbox_depth=3, sync="unsynced", time_error_s=None), 0)

    online, offline = presence("online"), presence("offline")
    online.received_at, offline.received_at = 100.0, 200.0
    # Retained presence and the will both use seq 0 (agent.publish.topics.PRESENCE_SEQ).
    assert store.commit_batch([online]) == {}
    assert store.devices()[0]["state"] == "online"
    assert store.commit_batch([offline]) == {}
    dev = store.devices()[0]
    assert (dev["state"], dev["state_since"]) == ("offline", 200.0)
    assert dev["status"]["outbox_depth"] == 3 and dev["status"]["agent_version"] == "0.1.0"
    assert store.count("received") == 0 and store.streams() == {}
    # Seq 0 on anything but status is refused into the dead letters, not stored.
    agg = _wire(codec.aggregate_body(Aggregate(kind="10min", t_utc=1.0, duration_s=600.0,
                                               rms=(230.0,), thd=(0.02,)), ["L1"]), 0)
    assert store.commit_batch([agg]) == {}
    (dl,) = store.dead_letters()
    assert "first seq" in dl["reason"] and dl["raw"] == agg.raw


def test_export_rows_are_what_the_exporter_reads(store: RecorderStore) -> None:
    """Contract with agent.store.export: every queued row of codec messages becomes points."""
    export = pytest.importorskip("agent.store.export")
    batcher = SummaryBatcher(["L1"], k=3)
    summaries = [b for s in range(4) for b in batcher.add(SecondRecord(
        t=1_764_547_200.0 + s, rms_min=[229.0], rms_mean=[230.0], rms_max=[231.0], hz=50.0,
        thd=[0.02]))]
    bodies: list[dict[str, Any]] = [
        codec.status_body("heartbeat", agent_version="0.1.0", uptime_s=1.0, outbox_depth=0,
                          sync="synced", time_error_s=0.001),
        codec.event_body(_event(None), "started"),
        codec.event_body(_event(1_764_547_200.12), "ended"),
        codec.aggregate_body(Aggregate(kind="10min", t_utc=1_764_547_200.0, duration_s=600.0,
                                       rms=(230.2,), thd=(0.021,), count=3000), ["L1"]),
        *summaries,
        codec.gap_body("bulk", 90, 91, 2, "outbox_full"),
    ]
    store.commit_batch([_wire(b, seq) for seq, b in enumerate(bodies, start=1)])
    rows = store.claim_exports(100)
    assert sorted(r.kind for r in rows) == sorted(b["type"] for b in bodies)
    for row in rows:
        points = export.points_for_row(row.kind, row.payload)
        assert points, f"{row.kind} row gave no points"
    # The summary's seconds come back as trend points at their own times (1 s apart).
    (summary_row,) = [r for r in rows if r.kind == "summary"]
    stamps = {p.timestamp for p in export.points_for_row("summary", summary_row.payload)
              if p.measurement == "hc_trend"}
    assert stamps == {1_764_547_200_000 + 1000 * s for s in range(3)}
