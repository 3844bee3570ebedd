"""Pre/post-trigger waveform captures around event starts and ends.

A ring buffer keeps the most recent ``pre_cycles + latency_cycles`` cycles of raw int16
counts (grown, once, to at least pre-trigger + two blocks + two cycles when blocks are long),
so a trigger that arrives late (the detector sees a threshold crossing only after the block
completing its Urms(1/2) window has been measured) still finds its pre-trigger cycles. Each
trigger opens a capture of ``pre_cycles`` before and ``post_cycles`` after the trigger
sample; ``feed`` fills it and returns it once its post-trigger part is complete.

Merging: a long event gives two captures, one at its start and one at its end. When the end
trigger falls inside the start capture's post-trigger window while that capture is still being
filled, the start capture is extended to ``post_cycles`` after the end trigger instead (one
capture holding both edges, ``meta["end_trigger_index"]`` set), provided the extended capture
stays within ``max_merge_cycles`` after the start trigger; otherwise the end gets its own
capture. Memory therefore does not grow with event length: the ring plus at most one capture
buffer per open trigger.

Missing samples (a ``sequence_gap`` between blocks) inside a capture are left at 0 counts and
listed in ``meta["missing"]`` as [first, end) sample-index pairs; pre-trigger samples that the
ring no longer (or never) held make the capture start later, with ``meta["pre_truncated"]``.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.events.types import Capture


@dataclass
class _Pending:
    capture_id: str
    event_id: str
    trigger: Literal["start", "end"]
    first: int
    trigger_index: int
    trigger_utc: float
    stop: int  # exclusive
    buf: npt.NDArray[np.int16]
    next: int  # next absolute sample index to fill
    meta: dict[str, Any] = field(default_factory=dict)


class CaptureRecorder:
    """Take raw-count captures around triggers.

    Parameters
    ----------
    info : SourceInfo  sample rate and channel names
    scale : numeric  [V/count] per channel, calibration included
    samples_per_cycle : int  samples in one nominal cycle
    pre_cycles, post_cycles : int  cycles kept before / after each trigger
    max_merge_cycles : int  longest post-trigger part [cycles] of a start capture extended
        to cover the event's end (see module docstring)
    latency_cycles : int  extra ring length [cycles] for triggers that arrive late
    id_factory : callable giving capture ids (default uuid4 hex)
    """

    def __init__(
        self,
        info: SourceInfo,
        scale: npt.NDArray[np.float64],
        samples_per_cycle: int,
        pre_cycles: int = 10,
        post_cycles: int = 20,
        max_merge_cycles: int = 60,
        *,
        latency_cycles: int = 60,
        id_factory: Callable[[], str] | None = None,
    ) -> None:
        if samples_per_cycle < 1 or pre_cycles < 0 or post_cycles < 1 or latency_cycles < 0:
            raise ValueError(
                "samples_per_cycle and post_cycles must be >= 1, pre_cycles and "
                "latency_cycles >= 0"
            )
        if max_merge_cycles < post_cycles:
            raise ValueError(f"max_merge_cycles ({max_merge_cycles}) < post_cycles ({post_cycles})")
        self.info = info
        self.scale = np.asarray(scale, dtype=np.float64).reshape(-1)
        if self.scale.shape != (info.channels,):
            raise ValueError(f"scale must have {info.channels} values, got {self.scale.shape}")
        self.spc = int(samples_per_cycle)
        self.pre_cycles = pre_cycles
        self.post_cycles = post_cycles
        self.max_merge_cycles = max_merge_cycles
        self._pre = pre_cycles * self.spc
        self._post = post_cycles * self.spc
        self._ring = np.zeros(((pre_cycles + latency_cycles) * self.spc + 1, info.channels),
                              dtype=np.int16)
        self._ring_end: int | None = None  # absolute index after the newest sample
        self._ring_count = 0
        self._pending: list[_Pending] = []
        self._ready: list[_Pending] = []  # complete, not yet returned (may still merge)
        self._new_id = id_factory or (lambda: uuid.uuid4().hex)

    # ------------------------------------------------------------------ public API

    def held_samples(self) -> int:
        """Rows of counts held in memory now (ring + capture buffers), for memory checks."""
        return int(self._ring.shape[0]) + sum(int(p.buf.shape[0]) for p in self._pending)

    def pending(self) -> int:
        return len(self._pending)

    def trigger(self, event_id: str, kind: Literal["start", "end"], index: float,
                utc: float) -> None:
        """Open a capture around sample ``index`` (or extend the event's start capture)."""
        if kind not in ("start", "end"):
            raise ValueError(f"trigger kind must be 'start' or 'end', got {kind!r}")
        ti = int(np.floor(index))
        if kind == "end" and self._merge(event_id, ti, utc):
            return
        first, stop = ti - self._pre, ti + self._post
        meta: dict[str, Any] = {}
        ring_end = self._ring_end if self._ring_end is not None else first
        ring_start = ring_end - self._ring_count
        if first < ring_end and first < ring_start:
            meta["pre_truncated"] = True
            first = ring_start
        elif first < 0:  # before sample 0: nothing to wait for
            meta["pre_truncated"] = True
            first = 0
        if stop <= first:  # the whole window is older than the ring: say so, keep nothing
            meta["missed"] = True
            first = stop
        p = _Pending(
            capture_id=self._new_id(), event_id=event_id, trigger=kind, first=first,
            trigger_index=ti, trigger_utc=float(utc), stop=stop,
            buf=np.zeros((stop - first, self.info.channels), dtype=np.int16),
            next=first, meta=meta,
        )
        if self._ring_end is not None and first < self._ring_end:  # copy what the ring has
            upto = min(stop, self._ring_end)
            p.buf[: upto - first] = self._ring_slice(first, upto)
            p.next = upto
        if p.next >= p.stop:
            self._ready.append(p)
        else:
            self._pending.append(p)

    def feed(self, block: Block) -> list[Capture]:
        """Add a block; return the captures whose post-trigger part is now complete."""
        counts = np.asarray(block.counts)
        if counts.dtype != np.int16 or counts.ndim != 2 or counts.shape[1] != self.info.channels:
            raise ValueError(
                f"block counts must be int16 of shape (n, {self.info.channels}), "
                f"got {counts.dtype} {counts.shape}"
            )
        b0, b1 = int(block.start_index), int(block.start_index) + counts.shape[0]
        if self._ring_end is not None and b0 < self._ring_end:
            raise ValueError(
                f"block starts at sample {b0}, before the end of the previous one "
                f"({self._ring_end}); blocks must be fed in order"
            )
        if self._ring_end is not None and b0 > self._ring_end:
            self._ring_count = 0  # a sequence gap: older samples are not contiguous any more
        still: list[_Pending] = []
        for p in self._pending:
            if p.next < b0:  # samples that never arrived
                gap_end = min(b0, p.stop)
                if gap_end > p.next:
                    p.meta.setdefault("missing", []).append([p.next, gap_end])
                    p.next = gap_end
            lo, hi = max(p.next, b0), min(p.stop, b1)
            if hi > lo:
                p.buf[lo - p.first: hi - p.first] = counts[lo - b0: hi - b0]
                p.next = hi
            if p.next >= p.stop:
                self._ready.append(p)
            else:
                still.append(p)
        self._pending = still
        self._ensure_ring(counts.shape[0])
        self._write_ring(counts, b1)
        out = [self._to_capture(p, truncated=False) for p in self._ready]
        self._ready = []
        return out

    def flush(self) -> list[Capture]:
        """End of data: every capture, the unfinished ones cut short (meta["truncated"])."""
        out = [self._to_capture(p, truncated=False) for p in self._ready]
        out += [self._to_capture(p, truncated=True) for p in self._pending]
        self._ready, self._pending = [], []
        return out

    # ------------------------------------------------------------------ internals

    def _merge(self, event_id: str, ti: int, utc: float) -> bool:
        """Extend the event's start capture (still being filled, or complete but not yet
        returned) to cover an end trigger inside its post-trigger window."""
        for p in self._pending + self._ready:
            if p.event_id != event_id or p.trigger != "start" or ti >= p.stop:
                continue
            new_stop = ti + self._post
            if new_stop - p.trigger_index > self.max_merge_cycles * self.spc:
                return False
            if new_stop > p.stop:
                grown = np.zeros((new_stop - p.first, self.info.channels), dtype=np.int16)
                grown[: p.buf.shape[0]] = p.buf
                p.buf, p.stop = grown, new_stop
                if p in self._ready:  # fill what the ring already holds, then keep filling
                    self._ready.remove(p)
                    upto = min(p.stop, self._ring_end if self._ring_end is not None else p.next)
                    ring_start = (self._ring_end or 0) - self._ring_count
                    if upto > p.next >= ring_start:
                        p.buf[p.next - p.first: upto - p.first] = self._ring_slice(p.next, upto)
                        p.next = upto
                    (self._ready if p.next >= p.stop else self._pending).append(p)
            p.meta["end_trigger_index"] = ti
            p.meta["end_trigger_utc"] = float(utc)
            return True
        return False

    def _ensure_ring(self, block_len: int) -> None:
        """Grow the ring so a trigger found one block late still has its pre-trigger cycles:
        the detector sees a crossing only once the Urms(1/2) window ending in the NEXT block
        is complete, so the ring must span pre_cycles + two blocks + a cycle."""
        need = self._pre + 2 * block_len + 2 * self.spc
        n = self._ring.shape[0]
        if need <= n:
            return
        grown = np.zeros((need, self.info.channels), dtype=np.int16)
        if self._ring_end is not None and self._ring_count:
            a = self._ring_end - self._ring_count
            grown[np.arange(a, self._ring_end) % need] = self._ring_slice(a, self._ring_end)
        self._ring = grown

    def _ring_slice(self, a: int, b: int) -> npt.NDArray[np.int16]:
        """Samples [a, b) from the ring (caller guarantees they are held)."""
        n = self._ring.shape[0]
        idx = np.arange(a, b) % n
        return self._ring[idx]

    def _write_ring(self, counts: npt.NDArray[np.int16], end: int) -> None:
        n = self._ring.shape[0]
        tail = counts[-n:]
        m = tail.shape[0]
        pos = (end - m) % n
        first_part = min(m, n - pos)
        self._ring[pos: pos + first_part] = tail[:first_part]
        self._ring[: m - first_part] = tail[first_part:]
        self._ring_end = end
        self._ring_count = min(n, self._ring_count + counts.shape[0])

    def _to_capture(self, p: _Pending, *, truncated: bool) -> Capture:
        counts = p.buf[: p.next - p.first]
        meta = dict(p.meta)
        if truncated:
            meta["truncated"] = True
        return Capture(
            capture_id=p.capture_id, event_id=p.event_id, trigger=p.trigger,
            first_index=p.first, trigger_index=p.trigger_index, trigger_utc=p.trigger_utc,
            sample_rate=float(self.info.sample_rate), channel_names=self.info.channel_names,
            scale=self.scale.copy(), counts=counts,
            pre_cycles=self.pre_cycles, post_cycles=self.post_cycles, meta=meta,
        )
