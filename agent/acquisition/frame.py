"""The halfcycle serial frame: raw ADC samples from a microcontroller over a byte stream.

Layout (byte by byte in ``schemas/serial-frame.md``)::

    offset  size  field
    0       2     sync: 0xA5 0x5A
    2       1     version: 0x01
    3       1     channels C (1..16)
    4       2     samples per channel N (uint16 LE, 1..2048, C*N <= 8192)
    6       4     sequence number (uint32 LE, +1 per frame, wraps at 2**32)
    10      2*C*N samples, int16 LE, interleaved: s0c0 s0c1 .. s0cC-1 s1c0 ..
    10+2CN  2     CRC-16/CCITT-FALSE of bytes 2 .. 9+2CN, most significant byte first

The decoder resynchronises on the sync word after garbage, waits for split frames, and
drops frames whose CRC fails, counting each problem; dropped bytes never become samples.

References
----------
CRC-16/CCITT-FALSE: width 16, poly 0x1021, init 0xFFFF, refin/refout false, xorout 0,
check 0x29B1 (the "Catalogue of parametrised CRC algorithms", common practice).
"""

from __future__ import annotations

import struct
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

__all__ = [
    "HEADER_SIZE",
    "MAX_CHANNELS",
    "MAX_SAMPLES",
    "MAX_VALUES",
    "SYNC",
    "VERSION",
    "DecoderStats",
    "Frame",
    "FrameDecoder",
    "crc16_ccitt_false",
    "encode_frame",
]

SYNC = b"\xa5\x5a"
VERSION = 1
HEADER_SIZE = 10
CRC_SIZE = 2
MAX_CHANNELS = 16
MAX_SAMPLES = 2048
MAX_VALUES = 8192  # channels * samples per frame: bounds a frame to 16 KiB of samples
_HEADER = struct.Struct("<2sBBHI")


def _crc_table() -> list[int]:
    table = []
    for byte in range(256):
        crc = byte << 8
        for _ in range(8):
            crc = ((crc << 1) ^ 0x1021) if crc & 0x8000 else (crc << 1)
        table.append(crc & 0xFFFF)
    return table


_TABLE = _crc_table()


def crc16_ccitt_false(data: bytes | bytearray | memoryview, crc: int = 0xFFFF) -> int:
    """CRC-16/CCITT-FALSE of ``data`` (poly 0x1021, init 0xFFFF, no reflection, no xorout).

    A table-driven reference; the decoder uses :func:`binascii.crc_hqx`, which computes the
    same CRC in C.
    """
    table = _TABLE
    for b in bytes(data):
        crc = ((crc << 8) & 0xFFFF) ^ table[((crc >> 8) ^ b) & 0xFF]
    return crc


@dataclass(frozen=True)
class Frame:
    sequence: int
    samples: npt.NDArray[np.int16]  # shape (N, C)

    @property
    def channels(self) -> int:
        return int(self.samples.shape[1])

    @property
    def samples_per_channel(self) -> int:
        return int(self.samples.shape[0])


def encode_frame(sequence: int, samples: npt.ArrayLike) -> bytes:
    """Encode one frame; ``samples`` has shape (N, C) of int16 values."""
    import binascii

    arr = np.asarray(samples)
    if arr.ndim != 2:
        raise ValueError("samples must have shape (N, C)")
    n, c = arr.shape
    if not (1 <= c <= MAX_CHANNELS and 1 <= n <= MAX_SAMPLES and n * c <= MAX_VALUES):
        raise ValueError(f"frame of {n} samples x {c} channels is outside the format limits")
    if arr.dtype != np.int16:
        if np.any((arr < -32768) | (arr > 32767)):
            raise ValueError("samples do not fit int16")
        arr = arr.astype(np.int16)
    body = _HEADER.pack(SYNC, VERSION, c, n, sequence & 0xFFFFFFFF)[2:]
    body += np.ascontiguousarray(arr, dtype="<i2").tobytes()
    crc = binascii.crc_hqx(body, 0xFFFF)
    return SYNC + body + crc.to_bytes(2, "big")


@dataclass
class DecoderStats:
    """Running totals since the decoder was created."""

    frames: int = 0
    crc_errors: int = 0
    garbage_bytes: int = 0
    sequence_gaps: int = 0  # gap events
    missing_frames: int = 0  # frames lost in those gaps
    sequence_resets: int = 0  # sequence went backwards (device restart): loss unknown


@dataclass(frozen=True)
class DecodedFrame:
    """A good frame plus what the stream told us just before it."""

    frame: Frame
    missing_before: int  # frames skipped by the sequence number before this one
    reset_before: bool  # sequence went backwards: an unknown number of samples was lost
    crc_errors_before: int = 0  # frames dropped for CRC since the previous good frame


class FrameDecoder:
    """Incremental, resynchronising parser: ``feed(bytes)`` returns the complete good frames."""

    def __init__(self) -> None:
        self._buf = bytearray()
        self._expected: int | None = None
        self._crc_since_good = 0
        self.stats = DecoderStats()

    @property
    def buffered(self) -> int:
        return len(self._buf)

    def feed(self, data: bytes | bytearray | memoryview) -> list[DecodedFrame]:
        import binascii

        buf = self._buf
        buf += data
        out: list[DecodedFrame] = []
        pos = 0
        while True:
            at = buf.find(SYNC, pos)
            if at < 0:
                # keep a trailing 0xA5 that may be the first half of a sync word
                keep = 1 if pos < len(buf) and buf[-1] == SYNC[0] else 0
                self.stats.garbage_bytes += len(buf) - pos - keep
                pos = len(buf) - keep
                break
            self.stats.garbage_bytes += at - pos
            pos = at
            if len(buf) - pos < HEADER_SIZE:
                break
            _sync, version, c, n, seq = _HEADER.unpack_from(buf, pos)
            if version != VERSION or not (
                1 <= c <= MAX_CHANNELS and 1 <= n <= MAX_SAMPLES and n * c <= MAX_VALUES
            ):
                self.stats.garbage_bytes += 1
                pos += 1
                continue
            total = HEADER_SIZE + 2 * c * n + CRC_SIZE
            if len(buf) - pos < total:
                break
            end = pos + total
            crc = binascii.crc_hqx(buf[pos + 2 : end - 2], 0xFFFF)
            if crc != int.from_bytes(buf[end - 2 : end], "big"):
                # Count it and rescan from the next byte: the "sync" may have been noise.
                self.stats.crc_errors += 1
                self._crc_since_good += 1
                pos += 1
                continue
            samples = (
                np.frombuffer(bytes(buf[pos + HEADER_SIZE : end - 2]), dtype="<i2")
                .reshape(n, c)
                .astype(np.int16)
            )
            missing, reset = 0, False
            if self._expected is not None and seq != self._expected:
                delta = (seq - self._expected) & 0xFFFFFFFF
                if delta < 0x80000000:
                    missing = delta
                    self.stats.sequence_gaps += 1
                    self.stats.missing_frames += delta
                else:
                    reset = True
                    self.stats.sequence_resets += 1
            self._expected = (seq + 1) & 0xFFFFFFFF
            self.stats.frames += 1
            out.append(DecodedFrame(Frame(seq, samples), missing, reset, self._crc_since_good))
            self._crc_since_good = 0
            pos = end
        del buf[:pos]
        return out
