"""Serial frame encoder/decoder (agent.acquisition.frame); spec in schemas/serial-frame.md."""

from __future__ import annotations

import binascii
import random

import numpy as np
from hypothesis import example, given, settings
from hypothesis import strategies as st

from agent.acquisition.frame import (
    HEADER_SIZE,
    SYNC,
    FrameDecoder,
    crc16_ccitt_false,
    encode_frame,
)


def test_crc_check_value() -> None:
    # CRC-16/CCITT-FALSE check value 0x29B1 for "123456789" (CRC catalogue; common practice)
    assert crc16_ccitt_false(b"123456789") == 0x29B1
    # same value from Python's C implementation (stdlib binascii, independent oracle)
    assert binascii.crc_hqx(b"123456789", 0xFFFF) == 0x29B1


@given(st.binary(max_size=512))
@settings(max_examples=200, deadline=None)
def test_crc_matches_crc_hqx(data: bytes) -> None:
    # oracle: stdlib binascii.crc_hqx with init 0xFFFF computes CRC-16/CCITT-FALSE
    assert crc16_ccitt_false(data) == binascii.crc_hqx(data, 0xFFFF)


def test_example_frame_from_spec() -> None:
    # the worked example in schemas/serial-frame.md, byte for byte
    frame = encode_frame(7, np.array([[100, -100], [200, -200]], dtype=np.int16))
    assert frame.hex(" ") == "a5 5a 01 02 02 00 07 00 00 00 64 00 9c ff c8 00 38 ff c8 e8"
    # residue property of a non-reflected CRC sent MSB first with no xorout (common practice)
    assert binascii.crc_hqx(frame[2:], 0xFFFF) == 0


def _frames(seed: int, count: int, channels: int, n: int) -> list[tuple[int, np.ndarray]]:
    rng = np.random.default_rng(seed)
    return [
        (seq, rng.integers(-32768, 32768, size=(n, channels)).astype(np.int16))
        for seq in range(count)
    ]


@given(
    seed=st.integers(0, 2**32 - 1),
    channels=st.integers(1, 4),
    n=st.integers(1, 40),
    cuts=st.lists(st.integers(1, 200), min_size=1, max_size=30),
)
@example(seed=1821, channels=1, n=1, cuts=[1])  # a frame whose CRC ends in 0xA5 (found once)
@settings(max_examples=60, deadline=None)
def test_round_trip_in_arbitrary_pieces(seed: int, channels: int, n: int, cuts: list[int]) -> None:
    frames = _frames(seed, 6, channels, n)
    stream = b"".join(encode_frame(s, x) for s, x in frames)
    dec = FrameDecoder()
    got = []
    pos = 0
    i = 0
    while pos < len(stream):
        step = cuts[i % len(cuts)]
        got += dec.feed(stream[pos : pos + step])
        pos += step
        i += 1
    assert [g.frame.sequence for g in got] == [s for s, _ in frames]
    for g, (_, x) in zip(got, frames, strict=True):
        np.testing.assert_array_equal(g.frame.samples, x)  # bit-exact
    assert dec.stats.crc_errors == 0 and dec.stats.garbage_bytes == 0
    assert dec.stats.sequence_gaps == 0


def test_garbage_crc_errors_and_gaps_are_counted_not_decoded() -> None:
    frames = _frames(3, 10, 2, 16)
    rng = random.Random(5)
    stream = bytearray()
    garbage_total = 0
    good = []
    for seq, x in frames:
        if seq == 4:
            continue  # lost on the wire: a sequence gap of 1
        raw = bytearray(encode_frame(seq, x))
        if seq == 6:
            raw[HEADER_SIZE + 3] ^= 0x10  # one bit flipped in a sample: CRC error
        else:
            good.append((seq, x))
        # garbage that cannot contain a sync word (no 0xA5 bytes)
        no_sync = [b for b in range(256) if b != 0xA5]
        junk = bytes(rng.choice(no_sync) for _ in range(rng.randint(0, 30)))
        garbage_total += len(junk)
        stream += junk + raw
    dec = FrameDecoder()
    out = []
    for i in range(0, len(stream), 7):
        out += dec.feed(stream[i : i + 7])
    assert [o.frame.sequence for o in out] == [s for s, _ in good]
    for o, (_, x) in zip(out, good, strict=True):
        np.testing.assert_array_equal(o.frame.samples, x)
    assert dec.stats.crc_errors == 1
    # the corrupted frame's bytes (after its sync byte) are rescanned and counted as garbage
    assert dec.stats.garbage_bytes == garbage_total + len(encode_frame(6, frames[6][1])) - 1
    # frames 4 (missing) and 6 (CRC) leave two gaps of one frame each
    assert dec.stats.sequence_gaps == 2 and dec.stats.missing_frames == 2
    missing = {o.frame.sequence: o.missing_before for o in out}
    assert missing[5] == 1 and missing[7] == 1 and missing[8] == 0
    # the CRC failure is reported on the good frame that follows it
    assert {o.frame.sequence: o.crc_errors_before for o in out}[7] == 1
    assert sum(o.crc_errors_before for o in out) == 1


def test_sequence_wraps_without_gap_and_reset_is_flagged() -> None:
    x = np.zeros((4, 1), dtype=np.int16)
    dec = FrameDecoder()
    out = dec.feed(encode_frame(2**32 - 1, x) + encode_frame(0, x) + encode_frame(5, x)
                   + encode_frame(2, x))
    # uint32 wrap 0xFFFFFFFF -> 0 is continuous (schemas/serial-frame.md)
    assert [o.missing_before for o in out] == [0, 0, 4, 0]
    assert [o.reset_before for o in out] == [False, False, False, True]
    assert dec.stats.sequence_resets == 1


def test_false_sync_with_implausible_header_is_skipped() -> None:
    x = np.arange(6, dtype=np.int16).reshape(3, 2)
    fake = SYNC + bytes([0x07, 0x02, 0x03, 0x00])  # version 7: not a frame
    dec = FrameDecoder()
    out = dec.feed(fake + encode_frame(0, x))
    assert len(out) == 1
    np.testing.assert_array_equal(out[0].frame.samples, x)
    assert dec.stats.garbage_bytes == len(fake)


def test_trailing_half_sync_is_kept_for_the_next_feed() -> None:
    raw = encode_frame(0, np.ones((2, 1), dtype=np.int16))
    dec = FrameDecoder()
    assert dec.feed(b"\x00\x00" + raw[:1]) == []
    out = dec.feed(raw[1:])
    assert len(out) == 1 and dec.stats.garbage_bytes == 2
