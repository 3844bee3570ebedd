"""Round trips and decode guards of the msgpack codec (agent/wire/codec.py)."""

from __future__ import annotations

import math
import struct
from typing import Any

import msgpack
import numpy as np
import pytest
from _wire_helpers import (
    IDENT,
    T0,
    sample_bodies,
    sample_event,
    sample_messages,
    summary_bodies,
    synthetic_seconds,
)

from agent.measurement.types import Aggregate
from agent.wire.codec import (
    Identity,
    aggregate_body,
    aggregate_from_message,
    decode,
    decode_from_topic,
    encode,
    event_body,
    event_from_message,
    summary_arrays,
)
from agent.wire.errors import WireError
from agent.wire.records import SecondRecord, SummaryBatcher
from agent.wire.validate import default_validator


@pytest.mark.parametrize("kind", ["summary", "aggregate", "event", "capture", "status", "gap",
                                  "ack"])
def test_every_message_type_round_trips(kind: str) -> None:
    msg = sample_messages()[kind]
    back = decode(encode(msg))
    assert back == msg  # msgpack preserves ints, floats (float64), str, bytes exactly
    assert back["type"] == kind and back["v"] == default_validator().versions[kind]


def test_identity_is_on_every_device_message() -> None:
    for kind, msg in sample_messages().items():
        keys = {"device", "site", "epoch", "seq"}
        assert keys <= msg.keys(), kind


def test_event_round_trip_gives_an_equal_event() -> None:
    for ended in (True, False):
        ev = sample_event(ended)
        msg = IDENT.stamp(event_body(ev, "ended" if ended else "started"), seq=9)
        got = event_from_message(decode(encode(msg)))
        assert got.event == ev
        assert got.change == ("ended" if ended else "started")
        assert got.classifier_version == "cls-1.0"  # taken from the classification
        assert got.identity == {"device": "dev-0042", "site": "site-7", "epoch": "e20261201a",
                                "seq": 9}


def test_event_message_fields_are_derived_correctly() -> None:
    ev = sample_event()
    body = event_body(ev, "ended")
    # end_utc - start_utc; float64 UTC seconds near 1.8e9 resolve 2^-22 s = 0.24 µs (IEEE 754).
    assert body["duration_s"] == pytest.approx(0.7073, abs=5e-7)
    assert body["level_pu"] == pytest.approx(84.31 / 120.0)
    assert body["thresholds"] == {"dip": 0.9, "swell": 1.1, "interruption": 0.05,
                                  "hysteresis": 0.02}  # IEC 61000-4-30 Ed.3 cl. 5.4 defaults


def test_nan_optional_event_field_travels_as_null_and_nan_required_is_refused() -> None:
    ev = sample_event()
    ev.sag_energy_s = math.nan
    assert event_body(ev, "ended")["sag_energy_s"] is None
    ev.level_v = math.nan
    with pytest.raises(WireError) as err:
        event_body(ev, "ended")
    assert err.value.code == "non_finite" and "level_v" in err.value.reason


def test_aggregate_round_trip_keeps_nan_as_nan() -> None:
    agg = Aggregate(kind="10min", t_utc=T0, duration_s=600.0, rms=(230.1, math.nan),
                    thd=(0.03, 0.02), hz=None, flagged=True, count=3000)
    got = aggregate_from_message(decode(encode(IDENT.stamp(aggregate_body(agg, ["L1", "L2"]),
                                                           seq=1))))
    assert got.rms[0] == 230.1 and math.isnan(got.rms[1])
    assert (got.kind, got.t_utc, got.flagged, got.count, got.hz) == ("10min", T0, True, 3000, None)


def test_summary_decodes_to_numpy_within_half_a_unit() -> None:
    rng = np.random.default_rng(5)
    v = synthetic_seconds(60, 2, rng)
    batcher = SummaryBatcher(["L1", "L2"], k=60)
    t = T0 + np.arange(60.0)
    (body,) = batcher.add_many(t, v["rms_min"], v["rms_mean"], v["rms_max"], v["hz"], v["thd"],
                               v["imbalance"], v["flags"])
    s = summary_arrays(decode(encode(IDENT.stamp(body, seq=3))))
    assert s.rms_mean.shape == (60, 2) and s.hz.shape == (60,)
    # Rounding to 10 mV / 1 mHz / 1e-4 units: error at most half a unit (analytic bound).
    assert np.max(np.abs(s.rms_min - v["rms_min"])) <= 0.005 + 1e-9
    assert np.max(np.abs(s.rms_mean - v["rms_mean"])) <= 0.005 + 1e-9
    assert np.max(np.abs(s.rms_max - v["rms_max"])) <= 0.005 + 1e-9
    assert np.max(np.abs(s.hz - v["hz"])) <= 0.0005 + 1e-12
    assert np.max(np.abs(s.thd - v["thd"])) <= 0.00005 + 1e-12
    assert np.max(np.abs(s.imbalance - v["imbalance"])) <= 0.00005 + 1e-12
    np.testing.assert_array_equal(s.flags, v["flags"])
    np.testing.assert_array_equal(s.t, t)
    assert s.present.all()


def test_batcher_aligns_to_k_and_masks_missing_seconds() -> None:
    batcher = SummaryBatcher(["L1"], k=60)
    out: list[dict[str, Any]] = []
    start = T0 + 30  # half way into a minute
    for i in range(100):
        if i in (5, 6):
            continue  # two missing seconds
        out += batcher.add(SecondRecord(t=start + i, rms_min=[229.0], rms_mean=[230.0],
                                        rms_max=[231.0], hz=50.0, thd=[0.02], flags=i % 2))
    last = batcher.flush()
    assert last is not None
    out.append(last)
    assert [m["t0"] for m in out] == [T0 + 30, T0 + 60, T0 + 120]
    assert [m["n"] for m in out] == [30, 60, 10]
    s = summary_arrays(IDENT.stamp(out[0], seq=0))
    assert list(np.flatnonzero(~s.present)) == [5, 6]
    assert np.isnan(s.rms_mean[5, 0]) and s.rms_mean[4, 0] == 230.0
    assert s.flags[7] == 1 and s.flags[5] == 0
    assert out[0]["imbalance"] is None  # single phase: all NaN -> null


def test_batcher_refuses_a_second_twice_and_flushes_on_clock_step_back() -> None:
    batcher = SummaryBatcher(["L1"], k=60)
    rec = SecondRecord(t=T0 + 10, rms_min=[229.0], rms_mean=[230.0], rms_max=[231.0], hz=50.0,
                       thd=[0.02])
    batcher.add(rec)
    with pytest.raises(WireError, match="already"):
        batcher.add(rec)
    out = batcher.add(SecondRecord(t=T0 + 5, rms_min=[229.0], rms_mean=[230.0],
                                   rms_max=[231.0], hz=50.0, thd=[0.02]))
    assert len(out) == 1 and out[0]["t0"] == T0 + 10 and out[0]["n"] == 1


# --- decode guards ----------------------------------------------------------------------

def _reason(data: bytes, **kw: Any) -> WireError:
    with pytest.raises(WireError) as err:
        decode(data, **kw)
    assert err.value.reason  # every rejection carries a reason for the dead-letter table
    return err.value


def test_not_msgpack_and_trailing_garbage_are_rejected() -> None:
    assert _reason(b"\xc1").code == "not_msgpack"  # 0xc1 is never used (msgpack spec)
    assert _reason(b"").code == "not_msgpack"
    good = encode(sample_messages()["gap"])
    assert _reason(good + b"\x00").code == "not_msgpack"
    assert _reason(good[:-3]).code == "not_msgpack"
    assert _reason(msgpack.packb([1, 2, 3])).code == "schema"  # not a map
    assert _reason(msgpack.packb(msgpack.ExtType(1, b"x"))).code == "not_msgpack"


def test_oversized_payload_is_rejected_before_unpacking() -> None:
    good = encode(sample_messages()["summary"])
    assert _reason(good, max_bytes=len(good) - 1).code == "oversized"


def _with(kind: str, **changes: Any) -> bytes:
    msg = sample_messages()[kind]
    msg.update(changes)
    return msgpack.packb(msg, use_bin_type=True)


@pytest.mark.parametrize("value", [math.nan, math.inf, -math.inf])
def test_nan_and_inf_are_rejected_with_reason(value: float) -> None:
    err = _reason(_with("status", uptime_s=value))
    assert err.code == "non_finite" and "$.uptime_s" in err.reason
    err = _reason(_with("summary", t0=value))
    assert err.code == "non_finite"
    msg = sample_messages()["event"]
    msg["sync"]["error_s"] = value  # nested and nullable
    err = _reason(msgpack.packb(msg, use_bin_type=True))
    assert err.code == "non_finite" and "$.sync.error_s" in err.reason


def test_nan_in_msgpack_float32_is_rejected() -> None:
    # A float32 NaN (0xca + 4 bytes), as another encoder might write it.
    msg = sample_messages()["gap"]
    raw = msgpack.packb(msg, use_bin_type=True)
    t_bytes = b"\xa1t" + b"\xcb" + struct.pack(">d", msg["t"])
    assert t_bytes in raw
    raw = raw.replace(t_bytes, b"\xa1t\xca" + struct.pack(">f", math.nan))
    assert _reason(raw).code == "non_finite"


def test_unknown_version_and_type_are_rejected() -> None:
    err = _reason(_with("event", v=3))
    assert err.code == "unknown_version" and "v=1, 2" in err.reason
    assert _reason(_with("event", v=True)).code == "unknown_version"  # bool is not 1
    assert _reason(_with("event", type="telemetry")).code == "unknown_type"


def test_wrong_types_and_unknown_fields_are_rejected() -> None:
    assert "$.seq" in _reason(_with("status", seq="7")).reason
    assert "$.seq" in _reason(_with("status", seq=-1)).reason
    assert "unexpected property" in _reason(_with("status", extra=1)).reason
    assert "$.device" in _reason(_with("status", device="a/b")).reason
    assert "$.device" in _reason(_with("status", device="dev\n")).reason


def test_summary_array_checks_reject_bad_packed_arrays() -> None:
    base = sample_messages()["summary"]

    def bad(mutate: Any) -> WireError:
        msg = sample_messages()["summary"]
        mutate(msg)
        return _reason(msgpack.packb(msg, use_bin_type=True))

    assert base["rms_mean"][0][2] > 0
    e = bad(lambda m: m["rms_mean"][0].__setitem__(3, m["rms_mean"][0][3][:-1]))
    assert e.code == "array" and "$.rms_mean[0]" in e.reason
    e = bad(lambda m: m.__setitem__("n", 59))  # arrays hold 60
    assert e.code == "array"
    e = bad(lambda m: m["rms_mean"][0].__setitem__(1, 250_000))  # 2500 V > 2000 V range
    assert e.code == "array" and "outside" in e.reason
    e = bad(lambda m: m["flags"].__setitem__(0, -2))  # flags must be in exp 0 units
    assert e.code == "array"
    e = bad(lambda m: m["thd"].pop())  # one channel short
    assert e.code == "semantic"
    e = bad(lambda m: m["rms_max"][1].__setitem__(3, "text"))
    assert e.code == "schema" and "$.rms_max[1][3]" in e.reason


def test_decode_from_topic_checks_kind_and_identity() -> None:
    msgs = sample_messages()
    data = encode(msgs["event"])
    assert decode_from_topic("hc/v1/site-7/dev-0042/event", data) == msgs["event"]
    with pytest.raises(WireError, match="on a summary topic"):
        decode_from_topic("hc/v1/site-7/dev-0042/summary", data)
    with pytest.raises(WireError, match="topic says site-7/dev-9"):
        decode_from_topic("hc/v1/site-7/dev-9/event", data)
    with pytest.raises(WireError) as err:
        decode_from_topic("other/topic", data)
    assert err.value.code == "topic"
    ack = encode(msgs["ack"])
    assert decode_from_topic("hc/v1/site-7/dev-0042/ack", ack)["seq"] == 160


def test_identity_rejects_bad_ids_and_seq() -> None:
    with pytest.raises(WireError):
        Identity(site="a b", device="d", epoch="e")
    with pytest.raises(WireError):
        IDENT.stamp(sample_bodies()["gap"], seq=-1)
    with pytest.raises(WireError):
        IDENT.stamp(sample_bodies()["gap"], seq=True)


def test_encode_refuses_invalid_messages() -> None:
    msg = sample_messages()["gap"]
    msg["count"] = 0
    with pytest.raises(WireError):
        encode(msg)


def test_summary_bodies_helper_covers_a_day_shape() -> None:
    # 1 h of seconds at K = 60 gives 60 summaries of 60 records (common practice check of
    # the helper the benchmark uses).
    bodies = summary_bodies(3600, 1)
    assert len(bodies) == 60 and all(b["n"] == 60 for b in bodies)
