"""SerialSource through a pseudo-terminal pair (os.openpty; pyserial opens the slave)."""

from __future__ import annotations

import os
import random
import threading
import time
import tty

import numpy as np
import pytest

from agent.acquisition.frame import encode_frame
from agent.acquisition.serial import SerialSource, SerialSourceError

pytest.importorskip("serial")

N = 32  # samples per channel per frame
CH = 2


def _writer(fd: int, plan: list[bytes]) -> None:
    for chunk in plan:
        os.write(fd, chunk)
        time.sleep(0.002)  # let the reader see frames split across reads


def test_pty_stream_counts_and_bit_exact_samples() -> None:
    rng = np.random.default_rng(11)
    pick = random.Random(2)
    frames = {s: rng.integers(-32768, 32768, size=(N, CH)).astype(np.int16) for s in range(40)}
    lost = {9, 10, 25}  # never sent: sequence gaps
    corrupt = {17, 30}  # sent with a flipped byte: CRC errors (and gaps)
    stream = bytearray(b"\x00\x13garbage-at-start")
    for seq, x in frames.items():
        if seq in lost:
            continue
        raw = bytearray(encode_frame(seq, x))
        if seq in corrupt:
            raw[20] ^= 0xFF
        stream += raw
        if pick.random() < 0.3:
            stream += bytes(pick.choice(range(0x00, 0xA0)) for _ in range(pick.randint(1, 9)))
    # cut the stream into uneven pieces so frames arrive split
    plan, pos = [], 0
    while pos < len(stream):
        step = pick.randint(1, 300)
        plan.append(bytes(stream[pos : pos + step]))
        pos += step

    master, slave = os.openpty()
    tty.setraw(slave)
    src = SerialSource(
        os.ttyname(slave), 921600, sample_rate=7680.0, channel_names=("L1", "L2"),
        volts_per_count=0.0122, read_timeout_s=0.05, idle_timeout_s=3.0,
    )
    writer = threading.Thread(target=_writer, args=(master, plan), daemon=True)
    writer.start()
    good = [s for s in frames if s not in lost | corrupt]
    expected_end = 40 * N  # every sequence number accounted for
    got: dict[int, np.ndarray] = {}
    flags: dict[str, int] = {}
    try:
        blocks = src.blocks()
        for _ in range(10_000):  # bounded; normally ~100 blocks
            block = next(blocks)
            assert block.counts.shape[1] == CH
            assert block.wall_time is not None
            for k, v in block.flags.items():
                flags[k] = flags.get(k, 0) + v
            if "crc_error" in block.flags:  # a dropped frame is also a gap, right there
                assert block.flags["sequence_gap"] >= block.flags["crc_error"]
            for r in range(block.counts.shape[0] // N):
                got[(block.start_index // N) + r] = block.counts[r * N : (r + 1) * N]
            assert block.start_index % N == 0
            if block.end_index >= expected_end:
                break
    finally:
        src.close()
        writer.join(timeout=5)
        os.close(master)
        os.close(slave)
    # every good frame delivered at its own index, bit-exact
    assert sorted(got) == good
    for s in good:
        np.testing.assert_array_equal(got[s], frames[s])
    # lost + corrupt frames show as gaps; CRC errors counted (schemas/serial-frame.md rules)
    assert flags["crc_error"] == len(corrupt)
    assert flags["sequence_gap"] == len(lost) + len(corrupt)
    assert flags["lost_samples"] == (len(lost) + len(corrupt)) * N
    assert src.stats.frames == len(good)


def test_silent_port_raises_after_idle_timeout() -> None:
    master, slave = os.openpty()
    tty.setraw(slave)
    src = SerialSource(
        os.ttyname(slave), 115200, sample_rate=7680.0, channel_names=("L1",),
        volts_per_count=0.01, read_timeout_s=0.05, idle_timeout_s=0.3,
    )
    try:
        with pytest.raises(SerialSourceError, match="no data"):
            next(src.blocks())
    finally:
        src.close()
        os.close(master)
        os.close(slave)


def test_missing_port_is_a_clear_error() -> None:
    with pytest.raises(SerialSourceError, match="cannot open"):
        SerialSource("/dev/halfcycle-no-such-port", 115200, sample_rate=7680.0,
                     channel_names=("L1",), volts_per_count=0.01)


class _FakePort:
    """Stands in for a pyserial port: hands out prepared chunks, then nothing."""

    def __init__(self, chunks: list[bytes]) -> None:
        self.chunks = list(chunks)
        self.in_waiting = 0

    def read(self, n: int) -> bytes:
        return self.chunks.pop(0) if self.chunks else b""

    def close(self) -> None:
        pass


def test_reset_and_channel_count_change_are_flagged() -> None:
    one = np.full((N, 1), 7, dtype=np.int16)
    two = np.full((N, 2), 9, dtype=np.int16)
    chunks = [
        encode_frame(100, two) + encode_frame(101, two),
        encode_frame(102, one),  # wrong channel count: samples counted as lost
        encode_frame(103, two),
        encode_frame(0, two),  # device restarted: loss unknown
    ]
    ticks = iter(range(100, 200))
    src = SerialSource("fake", 1, sample_rate=7680.0, channel_names=("L1", "L2"),
                       volts_per_count=0.01, idle_timeout_s=0.2,
                       now=lambda: float(next(ticks)),
                       port_factory=lambda port, baud, timeout: _FakePort(chunks))
    out = []
    with pytest.raises(SerialSourceError, match="no data"):
        for block in src.blocks():
            out.append(block)
    assert [(b.start_index, b.counts.shape[0]) for b in out] == [(0, 2 * N), (3 * N, N), (4 * N, N)]
    assert out[0].flags == {} and out[0].wall_time == 100.0
    # schemas/serial-frame.md receiver rules: format_error skips N samples, reset skips none
    assert out[1].flags == {"format_error": 1, "lost_samples": N}
    assert out[2].flags == {"sequence_reset": 1}


def test_frames_are_gathered_into_blocks_and_flushed_when_quiet() -> None:
    x = [np.full((N, 2), k, dtype=np.int16) for k in range(10)]
    stream = b"".join(encode_frame(k, x[k]) for k in range(10))
    chunks = [stream[:1000], stream[1000:]]
    src = SerialSource("fake", 1, sample_rate=7680.0, channel_names=("L1", "L2"),
                       volts_per_count=0.01, idle_timeout_s=0.2, min_block_samples=4 * N,
                       port_factory=lambda port, baud, timeout: _FakePort(chunks))
    out = []
    with pytest.raises(SerialSourceError):
        for block in src.blocks():
            out.append(block)
    # 4 + 4 frames reach min_block_samples; the last 2 are flushed when the port goes quiet
    assert [(b.start_index, b.counts.shape[0]) for b in out] == [(0, 4 * N), (4 * N, 4 * N),
                                                                  (8 * N, 2 * N)]
    np.testing.assert_array_equal(np.concatenate([b.counts for b in out]), np.concatenate(x))
