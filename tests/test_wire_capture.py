"""Capture chunking and reassembly (agent/wire/codec.py)."""

from __future__ import annotations

import hashlib
import random

import numpy as np
import pytest
from _wire_helpers import IDENT, sample_capture

from agent.wire.codec import (
    MQTT_PROPERTIES_MARGIN,
    CaptureAssembler,
    capture_bodies,
    capture_payload,
    decode,
    encode,
    publish_packet_size,
)
from agent.wire.errors import WireError
from agent.wire.topics import topic

TOPIC = topic("site-7", "dev-0042", "capture")


def _mqtt5_publish_size(topic_name: str, payload: int, props: int) -> int:
    """PUBLISH size written out from MQTT 5.0 cl. 3.3 and 1.5.5 (Variable Byte Integer):
    fixed header byte + VBI(remaining) + [2 + topic] + packet id (QoS 1) + VBI(props) + props
    + payload. Independent of the codec's helper."""
    def vbi(n: int) -> int:
        size = 1
        while n >= 128:
            n //= 128
            size += 1
        return size
    remaining = 2 + len(topic_name.encode()) + 2 + vbi(props) + props + payload
    return 1 + vbi(remaining) + remaining


def _chunks(max_packet: int, seed: int = 3, samples: int = 4608) -> list[bytes]:
    cap = sample_capture(samples=samples, seed=seed)
    bodies = capture_bodies(cap, topic=TOPIC, max_packet=max_packet)
    return [encode(IDENT.stamp(b, seq=10_000 + i)) for i, b in enumerate(bodies)]


@pytest.mark.parametrize("max_packet", [1024, 2048, 4096])
def test_every_chunk_packet_fits_with_the_stated_margin(max_packet: int) -> None:
    payloads = _chunks(max_packet)
    assert len(payloads) >= 18432 // max_packet  # several times the max packet size
    for p in payloads:
        size = _mqtt5_publish_size(TOPIC, len(p), MQTT_PROPERTIES_MARGIN)
        assert size <= max_packet
        assert publish_packet_size(len(TOPIC), len(p), MQTT_PROPERTIES_MARGIN) == size


def test_shuffled_and_duplicated_chunks_reassemble_bit_exact() -> None:
    cap = sample_capture()
    payloads = _chunks(1024)
    assert len(payloads) > 18  # 18432 payload bytes in < 1 kB packets
    rng = random.Random(11)
    stream = payloads + rng.sample(payloads, 7)  # duplicates
    rng.shuffle(stream)
    asm = CaptureAssembler()
    done = [c for c in (asm.add(decode(p)) for p in stream) if c is not None]
    assert len(done) == 1
    got = done[0]
    assert got.counts.dtype == np.int16
    np.testing.assert_array_equal(got.counts, cap.counts)  # bit-exact counts
    assert capture_payload(got) == capture_payload(cap)
    assert hashlib.sha256(capture_payload(got)).hexdigest() == decode(payloads[0])["sha256"]
    np.testing.assert_array_equal(got.scale, cap.scale)
    assert (got.capture_id, got.event_id, got.trigger, got.first_index, got.trigger_index,
            got.trigger_utc, got.sample_rate, got.channel_names, got.pre_cycles,
            got.post_cycles, got.meta) == (
        cap.capture_id, cap.event_id, cap.trigger, cap.first_index, cap.trigger_index,
        cap.trigger_utc, cap.sample_rate, cap.channel_names, cap.pre_cycles, cap.post_cycles,
        cap.meta)
    assert asm.pending() == []


def test_late_duplicate_after_completion_is_ignored() -> None:
    payloads = _chunks(2048)
    asm = CaptureAssembler()
    results = [asm.add(decode(p)) for p in payloads]
    assert results[-1] is not None and all(r is None for r in results[:-1])
    # A late redelivery (QoS 1 is at-least-once, MQTT 5.0 cl. 4.3.2) starts nothing.
    assert asm.add(decode(payloads[0])) is None
    assert asm.pending() == [] and asm.dropped == []


def test_corrupted_chunk_fails_the_sha256_check() -> None:
    payloads = _chunks(2048)
    msgs = [decode(p) for p in payloads]
    data = bytearray(msgs[3]["data"])
    data[10] ^= 0x01
    msgs[3]["data"] = bytes(data)
    asm = CaptureAssembler()
    with pytest.raises(WireError) as err:
        for m in msgs:
            asm.add(m)
    assert err.value.code == "capture" and "sha256" in err.value.reason


def test_conflicting_duplicate_and_metadata_are_refused() -> None:
    msgs = [decode(p) for p in _chunks(2048)]
    asm = CaptureAssembler()
    asm.add(msgs[0])
    other = dict(msgs[0], data=bytes(len(msgs[0]["data"])))
    with pytest.raises(WireError, match="different bytes"):
        asm.add(other)
    meta = dict(msgs[1]["meta"], sample_rate=7681.0)
    with pytest.raises(WireError, match="disagrees on meta"):
        asm.add(dict(msgs[1], meta=meta))


def test_eviction_is_reported_not_silent() -> None:
    asm = CaptureAssembler(max_pending=2)
    for seed in range(3):
        cap = sample_capture(samples=600, seed=seed)
        cap.capture_id = f"cap-{seed}"
        first = capture_bodies(cap, topic=TOPIC, max_packet=1024)[0]
        asm.add(IDENT.stamp(first, seq=seed))
    assert asm.dropped == [("dev-0042", "e20261201a", "cap-0")]
    assert len(asm.pending()) == 2


def test_stale_incomplete_captures_expire_and_are_reported() -> None:
    msgs = [decode(p) for p in _chunks(2048)]
    asm = CaptureAssembler()
    asm.add(msgs[0], now=100.0)
    assert asm.expire(older_than=50.0) == []
    assert asm.expire(older_than=150.0) == [("dev-0042", "e20261201a", msgs[0]["capture_id"])]
    assert asm.pending() == [] and len(asm.dropped) == 1


def test_single_chunk_when_it_fits_and_refusal_when_packet_is_tiny() -> None:
    assert len(_chunks(32768)) == 1  # default 2 ch x 4608 samples x 2 B = 18 kB
    with pytest.raises(WireError, match="leaves"):
        _chunks(300)


def test_capture_counts_must_be_int16() -> None:
    cap = sample_capture(samples=10)
    cap.counts = cap.counts.astype(np.int32)
    with pytest.raises(WireError, match="int16"):
        capture_bodies(cap, topic=TOPIC)
