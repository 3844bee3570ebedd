"""The one interface every sample source implements."""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Protocol

import numpy as np
import numpy.typing as npt


@dataclass(frozen=True)
class SourceInfo:
    """Static facts about a source.

    ``sample_rate`` is the nominal rate [S/s]; the clock model estimates the true one.
    ``volts_per_count`` converts counts to volts at the mains side per channel [V/count],
    before calibration gain.
    """

    sample_rate: float
    channel_names: tuple[str, ...]
    volts_per_count: npt.NDArray[np.float64]
    adc_bits: int = 16
    description: str = ""

    @property
    def channels(self) -> int:
        return len(self.channel_names)


@dataclass
class Block:
    """A run of consecutive samples.

    ``counts`` has shape (n, channels), dtype int16. ``start_index`` is the sample index of
    the first row, counted from the start of the source. ``flags`` names data-quality
    problems found by the source itself ("crc_error", "sequence_gap", ...) with their counts;
    a ``sequence_gap`` means samples were lost *before* this block: ``start_index`` already
    skips over them. ``wall_time`` is the system clock [s since epoch, UTC] when the block's
    last sample arrived, for the clock model; replayed files leave it None.
    """

    start_index: int
    counts: npt.NDArray[np.int16]
    flags: dict[str, int] = field(default_factory=dict)
    wall_time: float | None = None

    @property
    def end_index(self) -> int:
        return self.start_index + int(self.counts.shape[0])


class Source(Protocol):
    info: SourceInfo

    def blocks(self) -> Iterator[Block]:
        """Yield blocks in order until the source ends (files) or forever (live sources)."""
        ...

    def close(self) -> None: ...
