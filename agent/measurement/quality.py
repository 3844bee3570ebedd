"""Data-quality checks on the raw counts: clipping, flatline (sensor fault), sample gaps.

References
----------
Common practice for ADC front ends (no standard clause): samples held at a converter rail for
two or more samples are clipped; a channel whose counts do not change over a whole cycle while
the mains is present is a sensor fault. IEC 61000-4-30 Ed.3 clause 4.7 motivates flagging
values that cannot be trusted.
"""

from __future__ import annotations

import numpy as np
import numpy.typing as npt

from agent.measurement.types import QualityFlag

I16 = npt.NDArray[np.int16]
BOOL = npt.NDArray[np.bool_]


def adc_rails(adc_bits: int) -> tuple[int, int]:
    """Lowest and highest code [count] of a two's-complement converter of ``adc_bits``."""
    return -(1 << (adc_bits - 1)), (1 << (adc_bits - 1)) - 1


def clipped_mask(counts: npt.ArrayLike, lo: int, hi: int, min_run: int = 2) -> BOOL:
    """Samples that belong to runs of at least ``min_run`` samples at or beyond a rail.

    Parameters
    ----------
    counts : (n, channels)  [count]
    lo, hi : rails  [count]
    """
    c = np.asarray(counts)
    rail = (c <= lo) | (c >= hi)
    n = rail.shape[0]
    out = np.zeros_like(rail)
    if n < min_run:
        return out
    run_start = rail[: n - min_run + 1].copy()
    for k in range(1, min_run):
        run_start &= rail[k: n - min_run + 1 + k]
    for k in range(min_run):
        out[k: n - min_run + 1 + k] |= run_start
    return out


def flat_chunks(counts: npt.ArrayLike, chunk: int, nominal_peak_counts: npt.ArrayLike,
                dead_fraction: float = 0.02, live_fraction: float = 0.2) -> tuple[BOOL, BOOL]:
    """Per-chunk flatline test on whole chunks of ``chunk`` samples (about one cycle).

    A chunk is flat on a channel if its counts are constant, or if its peak-to-peak is below
    ``dead_fraction`` of the nominal peak-to-peak while another channel is above
    ``live_fraction`` of it (loss of one sensor while the mains is present).

    Returns
    -------
    flat : (m, channels) bool; constant : (m, channels) bool (the first reason)
    """
    nominal_pp = 2.0 * np.asarray(nominal_peak_counts, dtype=np.float64)
    return _flat_from_ptp(chunk_ptp(counts, chunk), live_fraction * nominal_pp,
                          dead_fraction * nominal_pp)


def chunk_ptp(counts: npt.ArrayLike, chunk: int) -> npt.NDArray[np.int64]:
    """Peak-to-peak [count] of each whole chunk of ``chunk`` rows: (m, channels)."""
    c = np.asarray(counts)
    m = c.shape[0] // chunk
    # Channel-major, so both reductions run over contiguous chunks.
    seg = np.ascontiguousarray(c[: m * chunk].T).reshape(c.shape[1], m, chunk)
    return np.asarray((seg.max(axis=2).astype(np.int64) - seg.min(axis=2)).T)


def _flat_from_ptp(ptp: npt.NDArray[np.int64], live_pp: npt.NDArray[np.float64],
                   dead_pp: npt.NDArray[np.float64]) -> tuple[BOOL, BOOL]:
    """flat_chunks' two masks from the chunks' peak-to-peak and the two thresholds [count]."""
    constant = ptp == 0
    live = ptp >= live_pp
    if not live.any():          # no channel live: only constant chunks count
        return constant, constant
    dead = ptp <= dead_pp
    live_count = live.sum(axis=1, keepdims=True)
    others_live = (live_count - live) > 0
    return constant | (dead & others_live), constant


class _Regions:
    """Merge per-channel hit positions into regions, closed after ``gap`` samples without one."""

    def __init__(self, kind: str, channels: int, gap: int) -> None:
        self.kind = kind
        self.gap = gap
        self.open: list[list[float] | None] = [None] * channels  # [start, last_end, count]
        self.reason: list[str] = [""] * channels

    def add(self, c: int, starts: npt.NDArray[np.int64], ends: npt.NDArray[np.int64],
            reason: str, out: list[QualityFlag]) -> None:
        if starts.shape[0] == 0:
            return
        brk = np.flatnonzero(starts[1:] - ends[:-1] > self.gap) + 1
        groups = np.split(np.arange(starts.shape[0]), brk)
        for g in groups:
            s, e, k = float(starts[g[0]]), float(ends[g[-1]]), float(np.sum(ends[g] - starts[g]))
            cur = self.open[c]
            if cur is not None and s - cur[1] <= self.gap:
                cur[1], cur[2] = e, cur[2] + k
            else:
                self.close(c, out)
                self.open[c] = [s, e, k]
                self.reason[c] = reason

    def close_stale(self, now: int, out: list[QualityFlag]) -> None:
        for c, cur in enumerate(self.open):
            if cur is not None and now - cur[1] > self.gap:
                self.close(c, out)

    def close(self, c: int, out: list[QualityFlag]) -> None:
        cur = self.open[c]
        if cur is None:
            return
        detail: dict[str, float | int | str] = {"samples": int(cur[2])}
        if self.reason[c]:
            detail["reason"] = self.reason[c]
        out.append(QualityFlag(self.kind, cur[0], cur[1], (c,), detail))
        self.open[c] = None

    def close_all(self, out: list[QualityFlag]) -> None:
        for c in range(len(self.open)):
            self.close(c, out)


class QualityMonitor:
    """Streaming clipping and flatline checks with bounded carry-over between blocks."""

    def __init__(self, channels: int, adc_bits: int, chunk: int,
                 nominal_peak_counts: npt.ArrayLike) -> None:
        self.lo, self.hi = adc_rails(adc_bits)
        self.chunk = chunk
        self.nominal_peak_counts = np.asarray(nominal_peak_counts, dtype=np.float64)
        self._live_pp = 0.2 * 2.0 * self.nominal_peak_counts    # flat_chunks' defaults
        self._dead_pp = 0.02 * 2.0 * self.nominal_peak_counts
        self.channels = channels
        self._clip = _Regions("clipping", channels, chunk)
        self._flat = _Regions("flatline", channels, 0)
        self.reset()

    def reset(self) -> None:
        """Forget the sample carry (after a gap); open regions stay open."""
        self._prev_rail = np.zeros(self.channels, bool)
        self._prev_counted = np.zeros(self.channels, bool)
        self._part: npt.NDArray[np.integer] = np.zeros((0, self.channels), np.int16)
        self._part_start = -1

    def update(self, counts: npt.NDArray[np.integer], start: int) -> list[QualityFlag]:
        out: list[QualityFlag] = []
        n = counts.shape[0]
        if n == 0:
            return out
        # Clipping: runs of >= 2 samples at a rail, across block edges. Most blocks never
        # touch a rail: two reductions decide that.
        if counts.max() < self.hi and counts.min() > self.lo:
            self._prev_rail[:] = False
            self._prev_counted[:] = False
            self._clip.close_stale(start + n, out)
        else:
            self._clip_runs(counts, start, out)
        self._flatline(counts, start, out)
        return out

    def _clip_runs(self, counts: npt.NDArray[np.integer], start: int,
                   out: list[QualityFlag]) -> None:
        n = counts.shape[0]
        rail = (counts <= self.lo) | (counts >= self.hi)
        ext = np.concatenate([self._prev_rail[None, :], rail], axis=0)
        pair = ext[:-1] & ext[1:]
        member = np.zeros_like(ext)
        member[:-1] |= pair
        member[1:] |= pair
        member[0] &= ~self._prev_counted
        self._prev_rail = rail[-1].copy()
        self._prev_counted = member[-1].copy()
        if member.any():
            for ch in np.flatnonzero(member.any(axis=0)):
                pos = np.flatnonzero(member[:, ch]).astype(np.int64) + (start - 1)
                self._clip.add(int(ch), pos, pos + 1, "", out)
        self._clip.close_stale(start + n, out)

    def _flatline(self, counts: npt.NDArray[np.integer], start: int,
                  out: list[QualityFlag]) -> None:
        # Flatline on chunks aligned to absolute sample index.
        if self._part.shape[0] and self._part_start + self._part.shape[0] == start:
            data, dstart = np.concatenate([self._part, counts], axis=0), self._part_start
        else:
            skip = (-start) % self.chunk
            data, dstart = counts[skip:], start + skip
        m = data.shape[0] // self.chunk
        self._part = data[m * self.chunk:].copy()
        self._part_start = dstart + m * self.chunk
        if m:
            ptp = chunk_ptp(data[: m * self.chunk], self.chunk)
            if all(cur is None for cur in self._flat.open) and (ptp > self._dead_pp).all():
                return                  # the common case: nothing can be flat, nothing open
            flat, constant = _flat_from_ptp(ptp, self._live_pp, self._dead_pp)
            cs = dstart + self.chunk * np.arange(m, dtype=np.int64)
            for c in range(self.channels):
                hit = np.flatnonzero(flat[:, c])
                if hit.shape[0]:
                    reason = "constant" if constant[hit[0], c] else "no_signal_while_others_live"
                    self._flat.add(c, cs[hit], cs[hit] + self.chunk, reason, out)
                # A chunk without the fault closes an open region.
                cur = self._flat.open[c]
                if cur is not None and (not flat[-1, c]):
                    self._flat.close(c, out)

    def finish(self) -> list[QualityFlag]:
        out: list[QualityFlag] = []
        self._clip.close_all(out)
        self._flat.close_all(out)
        self.reset()
        return out
