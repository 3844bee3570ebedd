"""Live source: a microcontroller streaming :mod:`agent.acquisition.frame` frames over a UART.

pyserial is an optional extra (``pip install 'halfcycle[serial]'``) and is imported only
when a port is opened. Each yielded :class:`Block` holds consecutive samples from good
frames; the problems found since the previous block are in ``flags``:

- ``crc_error``: frames dropped because their CRC failed (they also show as a gap);
- ``sequence_gap``: frames missing before this block (by sequence number); ``start_index``
  already skips ``lost_samples`` = missing frames × samples per frame;
- ``sequence_reset``: the sequence number went backwards (device restart); the number of
  samples lost is unknown, so ``start_index`` continues without a gap;
- ``format_error``: good frames whose channel count does not match the source; their
  samples are counted as lost (``start_index`` skips them).
"""

from __future__ import annotations

import contextlib
import time
from collections.abc import Callable, Iterator, Sequence
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.frame import DecoderStats, FrameDecoder

__all__ = ["SerialSource", "SerialSourceError"]


class SerialSourceError(RuntimeError):
    """The port cannot be opened or read, or fell silent; one-line message naming the port."""


def _open_port(port: str, baud: int, timeout: float) -> Any:
    try:
        import serial  # pyserial, an optional extra
    except ImportError:
        raise SerialSourceError(
            "pyserial is not installed: pip install 'halfcycle[serial]'"
        ) from None
    try:
        return serial.Serial(port, baudrate=baud, timeout=timeout)
    except (serial.SerialException, OSError, ValueError) as exc:
        raise SerialSourceError(f"{port}: cannot open at {baud} baud: {exc}") from None


class SerialSource:
    """Read frames from ``port`` and yield blocks stamped with the arrival wall time."""

    def __init__(
        self,
        port: str,
        baud: int = 921600,
        *,
        sample_rate: float,
        channel_names: Sequence[str],
        volts_per_count: float | Sequence[float],
        adc_bits: int = 16,
        read_timeout_s: float = 0.1,
        idle_timeout_s: float | None = None,
        min_block_samples: int = 256,
        now: Callable[[], float] = time.time,
        port_factory: Callable[[str, int, float], Any] = _open_port,
    ) -> None:
        names = tuple(channel_names)
        vpc = np.asarray(volts_per_count, dtype=np.float64).reshape(-1)
        if vpc.size == 1:
            vpc = np.full(len(names), float(vpc[0]))
        if vpc.size != len(names) or not names:
            raise ValueError(f"{vpc.size} volts_per_count values for {len(names)} channels")
        self.info = SourceInfo(
            sample_rate=float(sample_rate),
            channel_names=names,
            volts_per_count=vpc,
            adc_bits=adc_bits,
            description=f"serial frames from {port} at {baud} baud",
        )
        self.port = port
        self.idle_timeout_s = idle_timeout_s
        if min_block_samples < 1:
            raise ValueError("min_block_samples must be >= 1")
        self.min_block_samples = min_block_samples
        self._now = now
        self.decoder = FrameDecoder()
        self._closed = False
        self._ser = port_factory(port, baud, read_timeout_s)

    @property
    def stats(self) -> DecoderStats:
        return self.decoder.stats

    def _read(self) -> bytes:
        try:
            waiting = int(self._ser.in_waiting or 0)
            return bytes(self._ser.read(max(1, waiting)))
        except Exception as exc:  # pyserial raises SerialException / OSError on unplug
            if self._closed:
                return b""
            raise SerialSourceError(f"{self.port}: read failed: {exc}") from None

    def blocks(self) -> Iterator[Block]:
        """Blocks of at least ``min_block_samples`` consecutive samples.

        A block ends early at a discontinuity (the next block carries its flags) and when a
        read finds the port quiet, so samples are never held back while the line is idle.
        ``wall_time`` is the system time just after the read that completed its last frame.
        """
        nch = self.info.channels
        index = 0
        last_n: int | None = None
        flags: dict[str, int] = {}
        run: list[npt.NDArray[np.int16]] = []
        run_len = 0
        run_start = 0
        run_wall = 0.0
        last_data = time.monotonic()

        def add(name: str, count: int) -> None:
            flags[name] = flags.get(name, 0) + count

        while not self._closed:
            data = self._read()
            if not data:
                if run:
                    yield Block(run_start, np.concatenate(run), flags, run_wall)
                    flags, run, run_len = {}, [], 0
                if self.idle_timeout_s is not None and (
                    time.monotonic() - last_data > self.idle_timeout_s
                ):
                    raise SerialSourceError(f"{self.port}: no data for {self.idle_timeout_s} s")
                continue
            last_data = time.monotonic()
            wall = self._now()
            for d in self.decoder.feed(data):
                n = d.frame.samples_per_channel
                wrong_shape = d.frame.channels != nch
                if d.missing_before or d.reset_before or d.crc_errors_before or wrong_shape:
                    if run:
                        yield Block(run_start, np.concatenate(run), flags, run_wall)
                        flags, run, run_len = {}, [], 0
                    if d.crc_errors_before:
                        add("crc_error", d.crc_errors_before)
                    if d.missing_before:
                        lost = d.missing_before * (last_n or n)
                        index += lost
                        add("sequence_gap", d.missing_before)
                        add("lost_samples", lost)
                    if d.reset_before:
                        add("sequence_reset", 1)
                    if wrong_shape:
                        index += n
                        add("format_error", 1)
                        add("lost_samples", n)
                        last_n = n
                        continue
                if not run:
                    run_start = index
                run.append(d.frame.samples)
                run_len += n
                run_wall = wall
                index += n
                last_n = n
                if run_len >= self.min_block_samples:
                    yield Block(run_start, np.concatenate(run), flags, run_wall)
                    flags, run, run_len = {}, [], 0
        if run:
            yield Block(run_start, np.concatenate(run), flags, run_wall)

    def close(self) -> None:
        self._closed = True
        # closing a vanished port must not mask the original problem
        with contextlib.suppress(Exception):
            self._ser.close()
