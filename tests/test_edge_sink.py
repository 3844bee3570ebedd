"""The edge sink turns what a block produced into outbox messages that pass the schemas."""

from __future__ import annotations

import time
from pathlib import Path

import jsonschema
import msgpack
import numpy as np

from agent.acquisition.base import SourceInfo
from agent.acquisition.timebase import ReplayTimebase
from agent.events.classify import classify_event
from agent.events.types import Event, EventUpdate, Thresholds
from agent.pipeline import Frame
from agent.publish.edge import EdgeSink
from agent.publish.outbox import Outbox
from agent.resources import schemas_dir
from agent.site import Site

SITE = Site(
    site_id="invented-street",
    device_id="unit-7",
    nominal_v=120.0,
    nominal_hz=60.0,
    service_type="120/240",
    channel_names=("L1", "L2"),
)
INFO = SourceInfo(
    sample_rate=7680.0, channel_names=("L1", "L2"), volts_per_count=np.full(2, 0.0122)
)


def _swell_on_l2(now: float) -> Event:
    ev = Event(
        event_id="e" * 32,
        kind="swell",
        channels=(1,),
        start=7680.0,
        start_utc=now,
        nominal_v=120.0,
        thresholds=Thresholds(),
        level_v=135.6,
        end=16000.0,
        end_utc=now + 1.08,
        per_channel_level_v=(135.6,),
        ended_by="recovery",
    )
    classify_event(ev, 60.0)
    return ev


def _schema(name: str) -> dict:
    import json

    return json.loads((schemas_dir() / f"{name}.schema.json").read_text())


def test_single_leg_event_names_only_its_channel(tmp_path: Path) -> None:
    outbox = Outbox(tmp_path / "outbox.sqlite", SITE.device_id, SITE.site_id)
    sink = EdgeSink(outbox, SITE, INFO, ReplayTimebase(7680.0, origin=time.time()))
    ev = _swell_on_l2(time.time() - 5)
    sink(Frame(None, updates=[EventUpdate("started", ev), EventUpdate("ended", ev)]))
    rows = [r for r in outbox.due(10) if r.topic.endswith("/event")]
    assert len(rows) == 2
    for row in rows:
        msg = msgpack.unpackb(row.payload, raw=False)
        # Independent validator (jsonschema, JSON Schema 2020-12) on a generic msgpack decode.
        jsonschema.validate(msg, _schema("event"), cls=jsonschema.Draft202012Validator)
        assert msg["channels"] == [1] and msg["channel_names"] == ["L2"]
        assert msg["seq"] == row.seq
    assert sink.counters.encode_errors == 0
    outbox.close()


def test_a_message_the_schema_refuses_is_counted_and_the_rest_committed(tmp_path: Path) -> None:
    outbox = Outbox(tmp_path / "outbox.sqlite", SITE.device_id, SITE.site_id)
    sink = EdgeSink(outbox, SITE, INFO, ReplayTimebase(7680.0, origin=time.time()))
    bad = _swell_on_l2(time.time() - 5)
    bad.level_v = float("nan")  # a measurement bug: NaN never goes on the wire
    good = _swell_on_l2(time.time() - 3)
    good.event_id = "f" * 32
    sink(Frame(None, updates=[EventUpdate("ended", bad), EventUpdate("ended", good)]))
    events = [
        msgpack.unpackb(r.payload, raw=False) for r in outbox.due(10) if r.topic.endswith("/event")
    ]
    assert [m["event_id"] for m in events] == ["f" * 32]
    assert sink.counters.encode_errors == 1
    outbox.close()


SCENARIO = """
# INVENTED scenario: 4 s of a 230 V, 50 Hz home with a 100-ms dip to 60 %.
[scenario]
name = "clock"
seed = 2
duration_s = 4.0
sample_rate = 6400.0
block_samples = 6400
[mains]
nominal_v = 230.0
nominal_hz = 50.0
[[events]]
kind = "dip"
start_s = 2.0
duration_s = 0.1
level_pu = 0.6
"""


def test_data_recorded_before_sync_is_flagged(tmp_path: Path) -> None:
    from _acquisition_helpers import FakeClock

    from agent.acquisition.clock import ClockModel
    from agent.acquisition.sim import SimSource
    from agent.pipeline import edge_stages, push
    from agent.wire.codec import summary_arrays
    from agent.wire.records import FLAG_BITS

    (tmp_path / "s.toml").write_text(SCENARIO)
    source = SimSource(tmp_path / "s.toml")
    site = Site(
        site_id="invented-street",
        device_id="unit-8",
        nominal_v=230.0,
        nominal_hz=50.0,
        channel_names=("L1",),
    )
    clock = FakeClock()  # the kernel says: not synchronised (NTP has not locked yet)
    timebase = ClockModel(source.info.sample_rate, system_clock=clock)
    outbox = Outbox(tmp_path / "outbox.sqlite", site.device_id, site.site_id)
    sink = EdgeSink(outbox, site, source.info, timebase, summary_seconds=2)
    stages, _ = edge_stages(source.info, site, timebase, sinks=[sink])
    for block in source.blocks():
        clock.t += block.counts.shape[0] / source.info.sample_rate
        timebase.observe(block.end_index, clock.t)
        push(stages, Frame(block))
    push(stages, Frame(None))
    msgs = {
        kind: [
            msgpack.unpackb(r.payload, raw=False)
            for r in outbox.due(100)
            if r.topic.endswith("/" + kind)
        ]
        for kind in ("summary", "event", "capture")
    }
    assert msgs["summary"] and msgs["event"] and msgs["capture"]
    # IEC 61000-4-30 Ed.3 time-clock uncertainty (clause 4.6, number from memory): every
    # output says how far its time can be trusted; here the clock was never synchronised.
    for kind in ("summary", "capture"):
        for m in msgs[kind]:
            assert m["clock"]["sync"] == "unsynced" and m["clock"]["error_s"] > 0
            jsonschema.validate(m, _schema(kind), cls=jsonschema.Draft202012Validator)
    assert all(m["sync"]["state"] == "unsynced" for m in msgs["event"])
    flags = np.concatenate([summary_arrays(m).flags for m in msgs["summary"]])
    assert np.all(flags & FLAG_BITS["unsynced_clock"])
    outbox.close()
