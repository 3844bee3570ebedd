"""Replay recordings as sources: 16-bit PCM WAV and CSV of volts. Both stream in blocks.

WAV: any channel count, 16-bit PCM only (format tag 1, or WAVE_FORMAT_EXTENSIBLE with the
PCM sub-format); the caller gives the volts per count, because a WAV carries no scale. The
RIFF chunks are walked here rather than with :mod:`wave` so that a truncated data chunk is
found before any sample is delivered and so that extensible multichannel files are accepted.

CSV: one column of volts per channel, an optional header row of channel names, one row per
sample, ``,`` separated; the sample rate is given by the caller. Rows are checked in a first
pass (streaming), which also finds the peak so that the int16 scale can be chosen to fit.
"""

from __future__ import annotations

import math
import struct
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import BinaryIO

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, Source, SourceInfo

__all__ = ["CsvSource", "ReplayError", "WavSource", "write_wav"]

_PCM = 1
_EXTENSIBLE = 0xFFFE
# KSDATAFORMAT_SUBTYPE_PCM GUID, as stored (little-endian fields).
_PCM_GUID = bytes.fromhex("0100000000001000800000aa00389b71")


class ReplayError(ValueError):
    """A recording that cannot be replayed; the message is one line naming the file."""

    def __init__(self, path: str | Path, problem: str) -> None:
        self.path = str(path)
        self.problem = problem
        super().__init__(f"{self.path}: {problem}")


def _vpc_array(volts_per_count: float | Sequence[float], channels: int) -> npt.NDArray[np.float64]:
    arr = np.asarray(volts_per_count, dtype=np.float64).reshape(-1)
    if arr.size == 1:
        arr = np.full(channels, float(arr[0]))
    if arr.size != channels:
        raise ValueError(f"volts_per_count has {arr.size} values for {channels} channels")
    if not np.all(np.isfinite(arr) & (arr > 0)):
        raise ValueError(f"volts_per_count must be positive, got {arr.tolist()}")
    return arr


def _names(channel_names: Sequence[str] | None, channels: int, path: str | Path) -> tuple[str, ...]:
    if channel_names is None:
        return tuple(f"L{i + 1}" for i in range(channels))
    names = tuple(channel_names)
    if len(names) != channels:
        raise ReplayError(path, f"{len(names)} channel names given for {channels} channels")
    return names


class WavSource:
    """Replay a 16-bit PCM WAV file; blocks of ``block_frames`` frames, no wall time."""

    def __init__(
        self,
        path: str | Path,
        volts_per_count: float | Sequence[float],
        *,
        channel_names: Sequence[str] | None = None,
        block_frames: int = 4096,
    ) -> None:
        self.path = Path(path)
        if block_frames < 1:
            raise ValueError("block_frames must be >= 1")
        self.block_frames = block_frames
        try:
            self._fh: BinaryIO = self.path.open("rb")
        except FileNotFoundError:
            raise ReplayError(self.path, "file not found") from None
        except OSError as exc:
            raise ReplayError(self.path, f"cannot open: {exc.strerror}") from None
        try:
            channels, rate, self._data_offset, self.frames = self._parse_header()
            self.info = SourceInfo(
                sample_rate=float(rate),
                channel_names=_names(channel_names, channels, self.path),
                volts_per_count=_vpc_array(volts_per_count, channels),
                adc_bits=16,
                description=f"WAV replay of {self.path.name}",
            )
        except BaseException:
            self._fh.close()
            raise

    def _parse_header(self) -> tuple[int, int, int, int]:
        fh, path = self._fh, self.path
        size = path.stat().st_size
        head = fh.read(12)
        if len(head) < 12 or head[:4] != b"RIFF" or head[8:12] != b"WAVE":
            raise ReplayError(path, "not a WAV file (no RIFF/WAVE header)")
        fmt: tuple[int, int, int, int, int] | None = None
        pos = 12
        while True:
            hdr = fh.read(8)
            if len(hdr) < 8:
                raise ReplayError(path, "no data chunk found (file truncated or not a WAV)")
            cid, clen = hdr[:4], struct.unpack("<I", hdr[4:])[0]
            pos += 8
            if cid == b"fmt ":
                body = fh.read(clen)
                if len(body) < 16:
                    raise ReplayError(path, "fmt chunk is truncated")
                tag, channels, rate, _byte_rate, align, bits = struct.unpack("<HHIIHH", body[:16])
                if tag == _EXTENSIBLE:
                    if len(body) < 40 or body[24:40] != _PCM_GUID:
                        raise ReplayError(path, "extensible WAV is not PCM")
                    tag = _PCM
                fmt = (tag, channels, rate, align, bits)
                pos += clen + (clen & 1)
                fh.seek(pos)
            elif cid == b"data":
                if fmt is None:
                    raise ReplayError(path, "data chunk comes before the fmt chunk")
                tag, channels, rate, align, bits = fmt
                if tag != _PCM:
                    raise ReplayError(path, f"format tag {tag} is not PCM (only 16-bit PCM)")
                if bits != 16:
                    raise ReplayError(
                        path, f"sample width is {bits} bits; only 16-bit PCM is supported"
                    )
                if channels < 1 or align != 2 * channels:
                    raise ReplayError(
                        path, f"bad frame layout: {channels} channels, block align {align}"
                    )
                if rate < 1:
                    raise ReplayError(path, f"bad sample rate {rate}")
                available = size - pos
                if clen > available:
                    raise ReplayError(
                        path,
                        f"truncated: data chunk declares {clen // align} frames, "
                        f"file holds {available // align}",
                    )
                if clen % align:
                    raise ReplayError(path, f"data chunk of {clen} bytes is not whole frames")
                return channels, rate, pos, clen // align
            else:
                pos += clen + (clen & 1)
                if pos > size:
                    raise ReplayError(path, f"chunk {cid!r} runs past the end of the file")
                fh.seek(pos)

    def blocks(self) -> Iterator[Block]:
        ch = self.info.channels
        self._fh.seek(self._data_offset)
        index = 0
        while index < self.frames:
            n = min(self.block_frames, self.frames - index)
            raw = self._fh.read(n * 2 * ch)
            if len(raw) != n * 2 * ch:  # the file shrank under us
                raise ReplayError(self.path, f"read failed at frame {index}: file truncated")
            counts = np.frombuffer(raw, dtype="<i2").reshape(n, ch).astype(np.int16)
            yield Block(start_index=index, counts=counts)
            index += n

    def close(self) -> None:
        self._fh.close()


def write_wav(source: Source, path: str | Path) -> int:
    """Render every block of ``source`` to a 16-bit PCM WAV; returns the frames written.

    The sample rate must be a whole number of S/s (the WAV header holds an integer). A
    source that reports a ``sequence_gap`` cannot be written without losing the gap, so it
    raises instead. The volts per count is not stored; keep it beside the file.
    """
    import wave

    info = source.info
    rate = info.sample_rate
    if rate != round(rate):
        raise ValueError(f"WAV needs an integer sample rate, got {rate}")
    frames = 0
    p = Path(path)
    with wave.open(str(p), "wb") as w:
        w.setnchannels(info.channels)
        w.setsampwidth(2)
        w.setframerate(round(rate))
        for block in source.blocks():
            if block.start_index != frames or block.flags.get("sequence_gap"):
                raise ValueError(f"source has a gap at sample {frames}; WAV cannot hold it")
            w.writeframes(np.ascontiguousarray(block.counts, dtype="<i2").tobytes())
            frames += block.counts.shape[0]
    return frames


class CsvSource:
    """Replay a CSV of volts (one column per channel) as int16 counts.

    ``volts_per_count`` None chooses the scale so the file's peak sits at 30000 counts
    (about 8 % below int16 full scale); a given scale that would clip raises
    :class:`ReplayError` naming the line.
    """

    FIT_COUNTS = 30000.0

    def __init__(
        self,
        path: str | Path,
        sample_rate: float,
        *,
        volts_per_count: float | None = None,
        channel_names: Sequence[str] | None = None,
        block_rows: int = 4096,
    ) -> None:
        self.path = Path(path)
        if not (math.isfinite(sample_rate) and sample_rate > 0):
            raise ValueError(f"sample_rate must be positive, got {sample_rate}")
        if block_rows < 1:
            raise ValueError("block_rows must be >= 1")
        self.block_rows = block_rows
        self._header_fields: tuple[str, ...] | None = None
        header, channels, peak, self.rows, peak_line = self._scan()
        names = header if header is not None else None
        if channel_names is not None:
            names = tuple(channel_names)
        if volts_per_count is None:
            vpc = peak / self.FIT_COUNTS if peak > 0 else 1.0
        else:
            vpc = float(volts_per_count)
            if not (math.isfinite(vpc) and vpc > 0):
                raise ValueError(f"volts_per_count must be positive, got {volts_per_count}")
            if peak / vpc > 32767.0:
                raise ReplayError(
                    self.path,
                    f"line {peak_line}: {peak} V exceeds int16 full scale at {vpc} V/count",
                )
        self.volts_per_count = vpc
        self._has_header = header is not None
        self.info = SourceInfo(
            sample_rate=float(sample_rate),
            channel_names=_names(names, channels, self.path),
            volts_per_count=np.full(channels, vpc),
            adc_bits=16,
            description=f"CSV replay of {self.path.name}",
        )

    def _open(self) -> Iterator[tuple[int, str]]:
        try:
            fh = self.path.open("r", encoding="utf-8", newline="")
        except FileNotFoundError:
            raise ReplayError(self.path, "file not found") from None
        except OSError as exc:
            raise ReplayError(self.path, f"cannot open: {exc.strerror}") from None
        with fh:
            try:
                yield from enumerate(fh, start=1)
            except UnicodeDecodeError:
                raise ReplayError(self.path, "not a text file (bad UTF-8)") from None

    def _chunks(self) -> Iterator[tuple[list[int], npt.NDArray[np.float64]]]:
        """Parsed data rows in chunks: (line numbers, values of shape (rows, channels))."""
        first = True
        width: int | None = None
        lines: list[str] = []
        numbers: list[int] = []
        for lineno, line in self._open():
            text = line.strip()
            if not text:
                continue
            if first:
                first = False
                fields = [f.strip() for f in text.split(",")]
                numeric = [_is_number(f) for f in fields]
                if any(numeric) and not all(numeric):
                    raise ReplayError(
                        self.path, f"line {lineno}: mixes numbers and names (header or data?)"
                    )
                if not any(numeric):
                    self._header_fields = tuple(fields)
                    if not all(fields) or len(set(fields)) != len(fields):
                        raise ReplayError(
                            self.path, f"line {lineno}: header names must be unique and non-empty"
                        )
                    width = len(fields)
                    continue
            lines.append(text)
            numbers.append(lineno)
            if len(lines) >= self.block_rows:
                values = self._parse(lines, numbers, width)
                width = values.shape[1]
                yield numbers, values
                lines, numbers = [], []
        if lines:
            yield numbers, self._parse(lines, numbers, width)

    def _parse(
        self, lines: list[str], numbers: list[int], width: int | None
    ) -> npt.NDArray[np.float64]:
        try:
            values = np.loadtxt(lines, delimiter=",", dtype=np.float64, ndmin=2)
            ok = width is None or values.shape[1] == width
        except ValueError:
            ok = False
        if ok and np.all(np.isfinite(values)):
            return values
        # Slow path only to name the first bad line.
        expect = width
        for text, lineno in zip(lines, numbers, strict=True):
            fields = text.split(",")
            if expect is None:
                expect = len(fields)
            if len(fields) != expect:
                raise ReplayError(
                    self.path, f"line {lineno}: {len(fields)} columns, expected {expect}"
                )
            for f in fields:
                try:
                    v = float(f)
                except ValueError:
                    raise ReplayError(
                        self.path, f"line {lineno}: {f.strip()!r} is not a number"
                    ) from None
                if not math.isfinite(v):
                    raise ReplayError(self.path, f"line {lineno}: {f.strip()!r} is not finite")
        raise ReplayError(self.path, f"line {numbers[0]}..{numbers[-1]}: could not parse rows")

    def _scan(self) -> tuple[tuple[str, ...] | None, int, float, int, int]:
        self._header_fields = None
        channels = 0
        peak = 0.0
        peak_line = 0
        rows = 0
        for numbers, values in self._chunks():
            channels = values.shape[1]
            a = np.abs(values)
            flat = int(np.argmax(a))
            if a.flat[flat] > peak:
                peak = float(a.flat[flat])
                peak_line = numbers[flat // channels]
            rows += values.shape[0]
        if rows == 0:
            raise ReplayError(self.path, "no data rows")
        return self._header_fields, channels, peak, rows, peak_line

    def blocks(self) -> Iterator[Block]:
        index = 0
        vpc = self.volts_per_count
        for _numbers, values in self._chunks():
            counts = np.clip(np.rint(values / vpc), -32768, 32767).astype(np.int16)
            yield Block(start_index=index, counts=counts)
            index += counts.shape[0]

    def close(self) -> None:
        pass


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True
