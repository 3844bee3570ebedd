"""Point building for the time-series export (no server), from real wire message bodies.

Expected lines are written out by hand from the InfluxDB line-protocol syntax
(``measurement,tag=v field=1.5,n=3i timestamp``: a number without ``i`` is a float, an ``i``
suffix an integer; influxdb-client sorts tags and fields by key) — InfluxDB 2.x line-protocol
reference.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from influxdb_client import Point

from agent.events.classify import classify_event
from agent.events.types import Event, Thresholds
from agent.measurement.types import Aggregate
from agent.store.export import LinePoint, PayloadError, points_for_row, to_timestamp
from agent.store.recorder import from_json, to_json
from agent.wire.codec import aggregate_body, event_body, gap_body, status_body
from agent.wire.records import SecondRecord, SummaryBatcher

T0 = 1764600000.0  # invented: 2025-12-01T14:40:00Z, a multiple of 60 s
ENVELOPE = {"device": "d1", "site": "s1", "epoch": "ep1", "seq": 7}


def msg(body: dict[str, object]) -> dict[str, object]:
    """A message as the recorder store queues it (stored JSON, bytes as $base64)."""
    out = from_json(to_json({**body, **ENVELOPE}))
    assert isinstance(out, dict)
    return out


def lines(kind: str, payload: object, precision: str = "ms") -> list[str]:
    return [p.to_line() for p in points_for_row(kind, payload, precision)]  # type: ignore[arg-type]


def dip_event(ended: bool = True) -> Event:
    # 0.25 s from T0+0.125: all three times exact in binary floating point
    ev = Event(event_id="free-text-id.42", kind="dip", channels=(0,), start=0.0,
               start_utc=T0 + 0.125, nominal_v=230.0, thresholds=Thresholds(),
               level_v=143.75, sag_energy_s=0.123, time_error_s=0.002, sync_state="synced")
    if ended:
        ev.end, ev.end_utc, ev.ended_by = 12000.0, T0 + 0.375, "recovery"
        classify_event(ev, 50.0)
    return ev


def test_aggregate_one_point_per_channel_null_left_out() -> None:
    agg = Aggregate(kind="10min", t_utc=T0, duration_s=600.0, rms=(230.5, 229.0),
                    thd=(0.031, math.nan), flagged=True, count=3000)
    assert lines("aggregate", msg(aggregate_body(agg, ["L1", "L2"]))) == [
        "hc_aggregate,channel=L1,device=d1,interval=10min,site=s1 "
        "count=3000i,flagged=1i,rms=230.5,thd=0.031 1764600000000",
        "hc_aggregate,channel=L2,device=d1,interval=10min,site=s1 "
        "count=3000i,flagged=1i,rms=229 1764600000000",
    ]


def test_frequency_aggregate_is_a_device_point() -> None:
    agg = Aggregate(kind="10s", t_utc=T0 + 10, duration_s=10.0, hz=49.98, count=500)
    assert lines("aggregate", msg(aggregate_body(agg, ["L1"]))) == [
        "hc_aggregate_device,device=d1,interval=10s,site=s1 count=500i,flagged=0i,hz=49.98 "
        "1764600010000"]


def test_summary_gives_one_point_per_second_and_skips_missing_seconds() -> None:
    batcher = SummaryBatcher(["L1"], k=60)
    for dt in (0, 1, 3):  # second 2 missing
        assert batcher.add(SecondRecord(t=T0 + dt, rms_min=[228.01], rms_mean=[229.5 + dt],
                                        rms_max=[231.25], hz=49.987, thd=[0.0123],
                                        flags=1 if dt == 3 else 0)) == []
    body = batcher.flush()
    assert body is not None
    got = lines("summary", msg(body))
    expected = []
    for dt in (0, 1, 3):
        ts = 1764600000000 + 1000 * dt
        # 10 mV / 1 mHz / 1e-4 quantisation is exact for these values (summary schema units)
        expected.append(f"hc_trend,channel=L1,device=d1,site=s1 rms_max=231.25,"
                        f"rms_mean={229.5 + dt:g},rms_min=228.01,thd=0.0123 {ts}")
        expected.append(f"hc_trend_device,device=d1,site=s1 event={1 if dt == 3 else 0}i,"
                        f"flags={1 if dt == 3 else 0}i,hz=49.987 {ts}")
    assert got == expected


def test_ended_event_tags_are_enumerated_numbers_are_fields() -> None:
    (line,) = lines("event", msg(event_body(dip_event(), "ended")))
    tags, fields, ts = line.split(" ")
    assert ts == "1764600000125"  # event start, ms
    # 0.625 pu for 0.25 s = 12.5 cycles at 50 Hz: IEEE 1159 instantaneous sag (0.5-30 cycles,
    # 0.1-0.9 pu); ITIC 2000 lower curve 70 % for 20 ms-0.5 s → no-damage region; SEMI F47
    # 70 % for 0.2-0.5 s → outside; IEEE 1564 Se = (1-0.625)/(1-0.7) = 1.25 > 1 (from memory)
    assert tags == ("hc_event,category=instantaneous_sag,device=d1,ended_by=recovery,"
                    "itic=no_damage,kind=dip,semi_f47=outside,severity_class=beyond_curve,"
                    "site=s1")
    parsed = dict(kv.split("=") for kv in fields.split(","))
    assert set(parsed) == {"duration_s", "level_pu", "level_v", "sag_energy_s", "severity",
                           "time_error_s"}
    assert parsed["duration_s"] == "0.25" and parsed["level_pu"] == "0.625"
    assert math.isclose(float(parsed["severity"]), 1.25, rel_tol=1e-12)
    assert "free-text" not in line  # the event id is neither tag nor field


def test_started_event_goes_to_its_own_measurement() -> None:
    assert lines("event", msg(event_body(dip_event(ended=False), "started"))) == [
        "hc_event_open,device=d1,kind=dip,site=s1 level_pu=0.625,level_v=143.75 "
        "1764600000125"]


def test_unknown_category_becomes_other_not_a_new_tag_value() -> None:
    body = event_body(dip_event(), "ended")
    body["classification"] = {"ieee1159_category": "weird; drop table", "itic_region": None}
    (line,) = lines("event", msg(body))
    assert "category=other" in line and "itic=none" in line and "severity_class=none" in line


def test_status_point_free_text_left_out() -> None:
    body = status_body("offline", agent_version="0.1.0 build xyz", uptime_s=12.5,
                       outbox_depth=3, sync="holdover", time_error_s=0.004, last_ran=T0 - 30,
                       t=T0, reason="stopped by operator")
    assert lines("status", msg(body)) == [
        "hc_status,device=d1,site=s1,sync=holdover last_ran_utc=1764599970,online=0i,"
        "outbox_depth=3i,time_error_s=0.004,uptime_s=12.5 1764600000000"]


def test_offline_status_is_timed_by_receipt_not_by_its_connection_time() -> None:
    will = msg(status_body("offline", agent_version="0.1", uptime_s=0.0, outbox_depth=0,
                           sync="synced", time_error_s=None, t=T0 - 3600.0))
    online = msg(status_body("online", agent_version="0.1", uptime_s=0.0, outbox_depth=0,
                             sync="synced", time_error_s=None, t=T0 - 3600.0))
    (w,) = points_for_row("status", will, "ms", received_at=T0)
    (o,) = points_for_row("status", online, "ms", received_at=T0)
    assert w.timestamp == 1764600000000  # when the will arrived
    assert o.timestamp == 1764596400000  # the device's own report keeps its t
    assert w.tags == o.tags  # same series, so equal timestamps would overwrite each other


def test_gap_point_and_capture_has_none() -> None:
    body = gap_body("bulk", 10, 19, 10, "outbox full", t=T0)
    assert lines("gap", msg(body)) == [
        "hc_gap,device=d1,site=s1 count=10i,first_seq=10i,last_seq=19i 1764600000000"]
    assert lines("capture", {"capture_id": "c1", "sha256": "0" * 64}) == []


@pytest.mark.parametrize(("precision", "expected"), [
    ("s", 1764600000), ("ms", 1764600000250), ("us", 1764600000250000),
    ("ns", 1764600000250000000)])
def test_timestamp_precision(precision: str, expected: int) -> None:
    # 0.25 s is exact in binary floating point, so every precision is exact (analytic)
    assert to_timestamp(T0 + 0.25, precision) == expected  # type: ignore[arg-type]


def test_timestamps_are_deterministic_and_rounded() -> None:
    t = T0 + 0.1236
    assert to_timestamp(t, "ms") == to_timestamp(t, "ms") == 1764600000124  # nearest ms
    assert to_timestamp(T0 + 0.1234, "ms") == 1764600000123
    # float64 resolution at 1.8e9 s is 2**-22 s (IEEE 754 binary64); ns ticks are exact
    assert to_timestamp(T0 + 2.0**-22, "ns") == 1764600000 * 10**9 + 238


def test_json_text_payload_accepted() -> None:
    body = msg(status_body("online", agent_version="x", uptime_s=1.0, outbox_depth=0,
                           sync="synced", time_error_s=None, t=T0))
    assert lines("status", to_json(body)) == lines("status", body)


def test_summary_with_corrupt_packing_is_a_payload_error() -> None:
    batcher = SummaryBatcher(["L1"], k=60)
    batcher.add(SecondRecord(t=T0, rms_min=[1.0], rms_mean=[1.0], rms_max=[1.0], hz=50.0,
                             thd=[np.nan]))
    body = batcher.flush()
    assert body is not None
    body["rms_min"][0][3] = b"\xff"  # type: ignore[index]  # deltas of the wrong size
    with pytest.raises(PayloadError, match="do not decode"):
        points_for_row("summary", msg(body))


@pytest.mark.parametrize(("kind", "payload", "problem"), [
    ("aggregate", {"device": "d1", "t": T0, "channels": ["L1"], "rms": [1.0]}, "site"),
    ("aggregate", {"site": "a b", "device": "d1", "t": T0, "channels": ["L1"],
                   "rms": [1.0]}, "identifier"),
    ("aggregate", {"site": "s", "device": "d", "t": T0, "channels": ["L1", "L2"],
                   "rms": [1.0]}, "one value per channel"),
    ("aggregate", {"site": "s", "device": "d", "t": "noon", "channels": ["L1"],
                   "rms": [1.0]}, "number"),
    ("event", {"site": "s", "device": "d", "kind": "sag", "start_utc": T0, "level_pu": 0.5},
     "kind"),
    ("event", {"site": "s", "device": "d", "kind": "dip", "start_utc": T0, "end_utc": T0 - 1,
               "level_pu": 0.5}, "before it starts"),
    ("status", {"site": "s", "device": "d", "t": T0, "state": "asleep"}, "state"),
    ("gap", {"site": "s", "device": "d", "t": T0, "count": 1.5, "first_seq": 1,
             "last_seq": 2}, "integer"),
    ("nonsense", {}, "unknown export kind"),
    ("status", "{not json", "not JSON"),
])
def test_bad_payloads_raise_clear_errors(kind: str, payload: object, problem: str) -> None:
    with pytest.raises(PayloadError, match=problem):
        points_for_row(kind, payload)


_text = st.text(alphabet=st.characters(codec="utf-8", exclude_categories=("Cs",)),
                min_size=1, max_size=12)
_value = st.one_of(st.floats(allow_nan=True, allow_infinity=True), st.integers(-2**63, 2**63 - 1),
                   st.booleans(), _text)


@settings(max_examples=300, deadline=None)
@given(measurement=_text, tags=st.dictionaries(_text, _text, max_size=4),
       fields=st.dictionaries(_text, _value, max_size=4), ts=st.integers(0, 2**62))
def test_line_serialiser_matches_influxdb_client(measurement: str, tags: dict[str, str],
                                                 fields: dict[str, object], ts: int) -> None:
    # influxdb-client's Point is the independent oracle for escaping and number formats
    point = Point(measurement)
    for k, v in tags.items():
        point.tag(k, v)
    for k, fv in fields.items():
        point.field(k, fv)
    point.time(ts)
    mine = LinePoint(measurement, tuple(tags.items()), tuple(fields.items()), ts)  # type: ignore[arg-type]
    assert mine.to_line() == point.to_line_protocol()
