"""Streaming measurement engine: counts in, Urms(1/2), 10/12-cycle values and aggregates out.

Every result depends only on the samples, never on how they were split into blocks: the
engine carries the samples after the last complete cycle, the filter and hysteresis state,
the open 10/12-cycle interval and the open aggregations from one block to the next. The carry
is bounded (about one basic interval of samples plus a few hundred crossings).

References
----------
IEC 61000-4-30 Ed.3 (clause numbers from memory, tests/SOURCES.md): clause 4.4 (10/12-cycle
basic interval, gapless), 4.5 (aggregation, resynchronised at each 10-min tick), 4.7
(flagging), 5.1 (frequency), 5.4.2 (Urms(1/2)), 5.7 (unbalance), 5.8 with IEC 61000-4-7
(harmonics).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.timebase import Timebase, utc_many
from agent.events.types import Thresholds
from agent.measurement.aggregate import rms_aggregate
from agent.measurement.conditioning import (
    IntegerBoxcarCascade,
    boxcar_gain,
    boxcar_lengths,
)
from agent.measurement.flagging import event_window_flags
from agent.measurement.flicker import FlickerInterval, FlickerMeter
from agent.measurement.frequency import whole_cycles
from agent.measurement.harmonics import (
    harmonic_ratios,
    max_harmonic_order,
    resample_points,
    thd_from_squares,
    window_subgroups,
)
from agent.measurement.imbalance import negative_sequence_ratio, split_phase_imbalance
from agent.measurement.quality import QualityMonitor
from agent.measurement.rms import rms_without_dc
from agent.measurement.types import (
    Aggregate,
    BasicIntervals,
    HalfCycleRms,
    MeasurementOutput,
    QualityFlag,
)
from agent.measurement.zerocross import MIN_SPACING, ChainState, extend_chain, hysteresis_crossings
from agent.site import Site

F64 = npt.NDArray[np.float64]
F32 = npt.NDArray[np.float32]
I64 = npt.NDArray[np.int64]
BOOL = npt.NDArray[np.bool_]

TEN_MIN_S = 600.0
FREQ_INTERVAL_S = 10.0
INTERVALS_PER_3S = 15          # 150/180 cycles = 15 basic intervals (IEC 61000-4-30 cl. 4.5.2)
SPECTRA_BATCH = 64             # basic intervals resampled and transformed at once


@dataclass
class _Out:
    hc: list[tuple[F64, F64, F64, BOOL]] = field(default_factory=list)
    iv: list[tuple[F64, ...]] = field(default_factory=list)
    aggregates: list[Aggregate] = field(default_factory=list)
    flags: list[QualityFlag] = field(default_factory=list)

    def build(self, channels: int) -> MeasurementOutput:
        if len(self.hc) == 1:                 # the common case: fresh arrays, no copy
            hc = HalfCycleRms(*self.hc[0])
        elif self.hc:
            hc = HalfCycleRms(np.concatenate([h[0] for h in self.hc]),
                              np.concatenate([h[1] for h in self.hc]),
                              np.concatenate([h[2] for h in self.hc]),
                              np.concatenate([h[3] for h in self.hc]))
        else:
            hc = HalfCycleRms(np.zeros(0), np.zeros(0), np.zeros((0, channels)),
                              np.zeros(0, bool))
        if len(self.iv) == 1:
            r = self.iv[0]
            iv = BasicIntervals(r[0], r[1], r[2], r[3], r[4], r[5], r[6].astype(bool, copy=False))
        elif self.iv:
            cols = [np.concatenate([r[i] for r in self.iv]) for i in range(7)]
            iv = BasicIntervals(cols[0], cols[1], cols[2], cols[3], cols[4], cols[5],
                                cols[6].astype(bool))
        else:
            iv = BasicIntervals(np.zeros(0), np.zeros(0), np.zeros((0, channels)),
                                np.zeros((0, channels)), np.zeros(0), np.zeros(0),
                                np.zeros(0, bool))
        return MeasurementOutput(hc, iv, self.aggregates, self.flags)


def _median_of_rows(x: F64) -> F64:
    """np.median(x, axis=0) for finite x (the same values), without its first-call cost."""
    srt = np.sort(x, axis=0)
    k = x.shape[0]
    if k % 2:
        return np.asarray(srt[k // 2])
    return np.asarray(0.5 * (srt[k // 2 - 1] + srt[k // 2]))


class MeasurementEngine:
    """IEC 61000-4-30 Ed.3 Class A methods over a stream of :class:`Block`.

    Parameters
    ----------
    info : the source's static facts (sample rate [S/s], volts per count [V/count], ADC bits)
    site : nominal voltage Udin [V], nominal frequency [Hz], service type
    thresholds : dip / swell thresholds [fraction of Udin] used for flagging (clause 4.7)
    timebase : sample index -> UTC [s], for clock-aligned aggregates
    gains : per-channel calibration gain [dimensionless], default 1
    dc_removal : remove the front-end DC offset from the RMS values, estimated as the median
        of the one-cycle means over the previous two basic intervals, refreshed every basic
        interval's worth of windows (crossings, frequency and harmonics do not need it: whole
        cycles cancel the offset's effect on them)
    band_fraction : zero-crossing hysteresis half-width [fraction of nominal peak]; below it
        no crossings are found and the nominal-period fallback takes over
    flicker : run the IEC 61000-4-15 flickermeter (Pst/Plt on the 10-min aggregates, which
        are then held until its interval is closed: at most about a second)
    lamp : "230V" or "120V" weighting (default: 120V below 180 V declared, else 230V)
    """

    def __init__(self, info: SourceInfo, site: Site, thresholds: Thresholds, timebase: Timebase,
                 gains: npt.ArrayLike | None = None, *, dc_removal: bool = True,
                 band_fraction: float = 0.08, flicker: bool = True,
                 lamp: str | None = None) -> None:
        c = info.channels
        if c < 1:
            raise ValueError("source has no channels")
        vpc = np.asarray(info.volts_per_count, dtype=np.float64).reshape(-1)
        if vpc.shape[0] != c:
            raise ValueError(f"volts_per_count has {vpc.shape[0]} entries for {c} channels")
        g = np.ones(c) if gains is None else np.asarray(gains, dtype=np.float64).reshape(-1)
        if g.shape[0] != c or not np.all(np.isfinite(g)) or np.any(g <= 0):
            raise ValueError(f"gains must be {c} finite positive numbers, got {g!r}")
        if not info.sample_rate > 0:
            raise ValueError("sample_rate must be positive")
        self.info = info
        self.site = site
        self.thresholds = thresholds
        self.timebase = timebase
        self.channels = c
        self.scale: F64 = vpc * g
        """Volts per count per channel, calibration gain included [V/count]."""
        fs, f0 = float(info.sample_rate), float(site.nominal_hz)
        self._fs, self._f0 = fs, f0
        self._hp = fs / (2.0 * f0)
        self._cycles = site.cycles_per_basic_interval
        self._lengths = boxcar_lengths(fs, f0)
        nominal_peak = math.sqrt(2.0) * site.nominal_v
        self._band = band_fraction * nominal_peak * boxcar_gain(self._lengths, f0, fs)
        self._order = max_harmonic_order(fs, f0)
        # Resample points: enough for a 10/12-cycle window down to 0.9 f0 without decimation.
        self._points = resample_points(math.ceil(self._cycles * fs / (0.9 * f0)))
        self._frac = np.arange(self._points) / self._points
        # [V/count] and [V²/count²], to scale the integrals of counts and of counts².
        self._scale_xq = np.stack([self.scale, self.scale * self.scale])[:, None, :]
        chunk = max(1, round(fs / f0))
        self._dc_removal = dc_removal
        # Unbalance needs the legs of one service: split-phase |V1-V2|/Vnom, three-phase u2.
        self._imbalance = ""
        if site.service_type == "120/240" and c == 2:
            self._imbalance = "split"
        elif site.service_type in ("3ph", "120/208") and c == 3:
            self._imbalance = "u2"
        self._dc_history = 4 * self._cycles      # windows: 2 basic intervals of cycles
        self._quality = QualityMonitor(c, info.adc_bits, chunk, nominal_peak / self.scale)
        self._dip_v = thresholds.dip * site.nominal_v
        self._swell_v = thresholds.swell * site.nominal_v
        # Flags follow the detector's events, hysteresis tail included (agent.measurement.flagging).
        self._dip_end_v = (thresholds.dip + thresholds.hysteresis) * site.nominal_v
        self._swell_end_v = (thresholds.swell - thresholds.hysteresis) * site.nominal_v
        self._in_dip = self._in_swell = False
        self._next: int | None = None
        # Aggregations survive gaps.
        self._g3: list[tuple[float, float, F64, F64, bool]] = []
        self._g3_period: int | None = None
        self._g10: list[tuple[F64, F64, bool]] = []
        # Individual harmonics h2..H per 10-min period: sums of squared ratios and counts of
        # finite values, (channels, orders) each.
        self._h_sums: dict[int, tuple[F64, int]] = {}
        self._g10_period: int | None = None
        self._f_period: int | None = None
        self._f_utc: list[float] = []
        self._f_syn: list[bool] = []
        self._f_flag = False
        self._wave: F32 = np.zeros((c, 0), np.float32)
        # Flicker (IEC 61000-4-15): the lamp model follows the declared voltage by default.
        self.lamp = lamp or ("120V" if site.nominal_v < 180.0 else "230V")
        self._flicker = (FlickerMeter(fs, c, site.nominal_v, self.lamp, f0) if flicker
                         else None)
        self._flicker_done: dict[int, FlickerInterval] = {}
        self._held: list[Aggregate] = []
        self._reset_signal(0)

    @property
    def thd_max_order(self) -> int:
        """Highest harmonic order the THD values cover (40 unless the sample rate caps it;
        0 when it allows no harmonic); label with :func:`harmonics.thd_label`."""
        return self._order if self._order >= 2 else 0

    @property
    def _buf(self) -> F32:
        """The carried samples (n, channels) [V], float32 (all the harmonics need)."""
        return self._wave.T

    # ------------------------------------------------------------------ public API
    def process(self, block: Block) -> MeasurementOutput:
        """Measure one block; returns what became complete with it."""
        m = self._process(block)
        m.aggregates = self._release(m.aggregates)
        return m

    def _process(self, block: Block) -> MeasurementOutput:
        out = _Out()
        counts = np.asarray(block.counts)
        if counts.ndim != 2 or counts.shape[1] != self.channels:
            raise ValueError(f"block counts must have shape (n, {self.channels}), got "
                             f"{counts.shape}")
        if not np.issubdtype(counts.dtype, np.integer):
            raise ValueError(f"block counts must be integer ADC counts, got {counts.dtype}")
        start = int(block.start_index)
        for kind, n_bad in sorted(block.flags.items()):
            if kind != "sequence_gap" and n_bad:
                out.flags.append(QualityFlag(kind, float(start), float(block.end_index), (),
                                             {"count": int(n_bad)}))
        if self._next is None:
            self._reset_signal(start)
        elif start < self._next:
            # Rows already measured: drop them, say so, keep going.
            dup = min(self._next - start, counts.shape[0])
            out.flags.append(QualityFlag("sequence_gap", float(start), float(start + dup), (),
                                         {"duplicate_samples": int(dup)}))
            counts, start = counts[dup:], start + dup
            if counts.shape[0] == 0:
                return out.build(self.channels)
        elif start > self._next:
            out.flags.append(QualityFlag("sample_gap", float(self._next), float(start), (),
                                         {"missing": int(start - self._next),
                                          "unmeasured_from": self._measured_until()}))
            self._flush_signal(out)
            self._reset_signal(start)
        elif block.flags.get("sequence_gap"):
            out.flags.append(QualityFlag("sequence_gap", float(start), float(start), (),
                                         {"count": int(block.flags["sequence_gap"]),
                                          "unmeasured_from": self._measured_until()}))
            self._flush_signal(out)
            self._reset_signal(start)
        n = counts.shape[0]
        if n == 0:
            return out.build(self.channels)
        self._next = start + n
        out.flags.extend(self._quality.update(counts, start))
        f = self._casc.process_running_sums(self._append_samples(counts))
        if self._flicker is not None:
            for iv in self._flicker.feed(self._wave[:, -n:], start, self.timebase.to_utc):
                self._flicker_done[iv.period] = iv
        head = self._settle_until - start
        if head > 0:
            f[: min(head, n)] = 0.0
        self._detect(f, start)
        self._advance(out, final=False)
        return out.build(self.channels)

    def finish(self) -> MeasurementOutput:
        """Flush everything that can be flushed at the end of data (partial intervals and
        aggregates included; ``count`` says how many values they hold)."""
        out = _Out()
        if self._next is not None:
            self._flush_signal(out)
        self._emit_3s(out)
        self._emit_10min(out)
        self._emit_freq(out)
        out.flags.extend(self._quality.finish())
        self._next = None
        if self._flicker is not None:
            for iv in self._flicker.finish():
                self._flicker_done[iv.period] = iv
        m = out.build(self.channels)
        m.aggregates = self._release(m.aggregates, final=True)
        return m

    def _release(self, new: list[Aggregate], final: bool = False) -> list[Aggregate]:
        """Aggregates in emission order, a 10-min one held (with all after it) until the
        flickermeter has closed its interval, then given its Pst/Plt."""
        if self._flicker is None:
            return new
        self._held.extend(new)
        out: list[Aggregate] = []
        front = self._flicker.frontier
        reached = -math.inf if front is None else self.timebase.to_utc(float(front))
        while self._held:
            agg = self._held[0]
            if agg.kind == "10min":
                period = round(agg.t_utc / TEN_MIN_S)
                iv = self._flicker_done.pop(period, None)
                if iv is None and not final and reached < agg.t_utc + TEN_MIN_S:
                    break                       # the flickermeter has not got there yet
                if iv is not None:
                    agg.pst = iv.pst
                    agg.plt = iv.plt
                    agg.flicker_flagged = iv.flagged or agg.flagged
                    agg.lamp = self.lamp
                for k in [k for k in self._flicker_done if k < period]:
                    del self._flicker_done[k]   # intervals with no 10-min aggregate
            out.append(self._held.pop(0))
        return out

    # ------------------------------------------------------------------ signal chain
    def _reset_signal(self, anchor: int) -> None:
        c = self.channels
        self._casc = IntegerBoxcarCascade(self._lengths, c)   # fed the running sums
        self._delay = self._casc.delay
        self._settle_until = anchor + self._casc.settle
        # The band in the cascade's units (sums of counts) per channel.
        self._band_sums = [float(v) for v in self._band / (self.scale * self._casc.norm)]
        self._seg: list[I64] = [np.zeros(0, np.int64) for _ in range(c)]
        self._seg_start = [float(anchor)] * c
        self._state = [0] * c
        self._cand: list[F64] = [np.zeros(0) for _ in range(c)]
        self._horizon = [-math.inf] * c
        self._chain = ChainState(last=None, anchor=anchor + self._delay)
        # Each channel's own crossing chain (IEC 61000-4-30 Ed.3 cl. 5.4.2: Urms(1/2) on that
        # channel's fundamental zero crossings): times, synthetic flags and the integrals of
        # counts [0] and counts² [1] at each crossing, (2, m).
        self._own_cand: list[F64] = [np.zeros(0) for _ in range(c)]
        self._own_chain = [ChainState(last=None, anchor=anchor + self._delay) for _ in range(c)]
        self._oc_t: list[F64] = [np.zeros(0) for _ in range(c)]
        self._oc_p: list[I64] = [np.zeros((2, 0), np.int64) for _ in range(c)]
        self._oc_r: list[F64] = [np.zeros((2, 0)) for _ in range(c)]
        self._wave = np.zeros((c, 0), np.float32)
        # Running sums of counts [0] and counts² [1] before each carried row, (2, n+1, c)
        # [count, count²] (int64, exact; they may wrap around, differences stay exact).
        self._p: I64 = np.zeros((2, 1, c), np.int64)
        self._buf_start = anchor
        self._cx_t = np.zeros(0)
        self._cx_syn = np.zeros(0, bool)
        self._cx_utc = np.zeros(0)
        self._cx_p10 = np.zeros(0, np.int64)
        self._cx_wflag = np.zeros(0, bool)
        self._cx_base = 0
        self._next_win = 0
        self._iv_start = 0
        self._cx_dc = np.zeros((0, c))
        # Integrals of the interpolant of the counts [0] and counts² [1] from the origin of
        # the running sums to each crossing, (2, m, c): an exact integer part (running sum at
        # the crossing's floor) plus a fractional rest.
        self._cx_p: I64 = np.zeros((2, 0, c), np.int64)
        self._cx_r = np.zeros((2, 0, c))
        self._wmean_hist = np.zeros((0, c))
        self._dc_cache: dict[int, F64] = {}
        self._quality.reset()

    def _append_samples(self, counts: npt.NDArray[np.integer]) -> I64:
        """Carry the block: float32 volts for the harmonics, running sums for the RMS.
        Returns the running sums of the counts for the block's rows (n+1, channels)."""
        n, c = counts.shape
        old = self._wave.shape[1]
        wave = np.empty((c, old + n), np.float32)
        wave[:, :old] = self._wave
        # Volts in float64, then rounded once to float32.
        np.multiply(counts.T, self.scale[:, None], out=wave[:, old:], casting="same_kind")
        p = np.empty((2, old + n + 1, c), np.int64)
        p[:, :old + 1] = self._p
        x = p[0, old + 1:]
        x[...] = counts
        np.multiply(x, x, out=p[1, old + 1:])
        p[:, old:].cumsum(axis=1, out=p[:, old:])
        self._wave, self._p = wave, p
        return p[0, old:]

    def _measured_until(self) -> float:
        n = self._cx_t.shape[0]
        return float(self._cx_t[-1]) if n else float(self._buf_start)

    def _detect(self, f: I64, start: int) -> None:
        cap = int(4 * self._hp) + 2
        d = self._delay
        for c in range(self.channels):
            old = self._seg[c]
            seg = np.concatenate([old, f[:, c]]) if old.shape[0] else f[:, c]
            s0 = self._seg_start[c] if old.shape[0] else float(start)
            t, last_out, state = hysteresis_crossings(seg, self._band_sums[c], self._state[c])
            if t.shape[0]:
                t += s0 - d
                cand = self._cand[c]
                self._cand[c] = np.concatenate([cand, t]) if cand.shape[0] else t
                own = self._own_cand[c]
                self._own_cand[c] = np.concatenate([own, t]) if own.shape[0] else t
            keep = max(last_out, 0, seg.shape[0] - cap)
            self._seg[c] = seg[keep:].copy()
            self._seg_start[c] = s0 + keep
            self._state[c] = state
            self._horizon[c] = s0 + keep - d

    def _advance(self, out: _Out, final: bool) -> None:
        prev_last = self._chain.last
        new_t, new_syn = extend_chain(self._cand, self._horizon, self._chain, self._hp,
                                      3.0 * self._hp)
        self._ref_new: tuple[F64, I64, F64] | None = None
        self._ref_prev = prev_last
        self._ref_real = bool(new_t.shape[0]) and not bool(new_syn.any())
        if new_t.shape[0]:
            utc = utc_many(self.timebase, new_t)
            whole, rest = self._crossing_integrals(new_t)
            self._ref_new = (new_t, whole, rest)
            self._cx_t = np.concatenate([self._cx_t, new_t])
            self._cx_syn = np.concatenate([self._cx_syn, new_syn])
            self._cx_utc = np.concatenate([self._cx_utc, utc])
            self._cx_p10 = np.concatenate([self._cx_p10,
                                           np.floor(utc / TEN_MIN_S).astype(np.int64)])
            self._cx_wflag = np.concatenate([self._cx_wflag, np.zeros(new_t.shape[0], bool)])
            self._cx_dc = np.concatenate([self._cx_dc, np.zeros((new_t.shape[0], self.channels))])
            self._cx_p = np.concatenate([self._cx_p, whole], axis=1)
            self._cx_r = np.concatenate([self._cx_r, rest], axis=1)
            floor = float(self._chain.last) + MIN_SPACING * self._hp  # type: ignore[arg-type]
            for c in range(self.channels):
                cand = self._cand[c]
                if cand.shape[0]:
                    self._cand[c] = cand[np.searchsorted(cand, floor):]
        self._extend_own_chains()
        self._emit_windows(out, final)
        self._emit_intervals(out, final)
        self._trim()

    def _extend_own_chains(self) -> None:
        """Extend every channel's own crossing chain from its own candidates only."""
        news: list[F64] = []
        ref = self._ref_new
        for c in range(self.channels):
            st = self._own_chain[c]
            cand = self._own_cand[c]
            if (ref is not None and self._ref_real and st.last is not None
                    and st.last == self._ref_prev):
                # In step with the shared chain, whose new crossings are all real: if they
                # are this channel's next candidates, its own chain takes them as they are
                # (the same choice extend_chain would make: channel 0, usually).
                k = ref[0].shape[0]
                i = int(cand.searchsorted(st.last + MIN_SPACING * self._hp))
                if i + k <= cand.shape[0] and (cand[i:i + k] == ref[0]).all():
                    st.last = float(ref[0][-1])
                    news.append(ref[0])
                    self._own_cand[c] = cand[i + k:]
                    continue
            new_t, _ = extend_chain([cand], [self._horizon[c]], st, self._hp,
                                    3.0 * self._hp)
            news.append(new_t)
            if new_t.shape[0]:
                cand = self._own_cand[c]
                floor = float(st.last) + MIN_SPACING * self._hp  # type: ignore[arg-type]
                self._own_cand[c] = cand[np.searchsorted(cand, floor):]
        # A channel whose new crossings are the shared chain's (channel 0, usually) takes
        # their integrals as they are; the others get one pass (each reads its own column).
        shared = [ref is not None and t.shape == ref[0].shape and bool((t == ref[0]).all())
                  for t in news]
        counts = [0 if sh else t.shape[0] for t, sh in zip(news, shared, strict=True)]
        own = [c for c, n in enumerate(counts) if n]
        parts: dict[int, tuple[I64, F64]] = {}
        if len(own) == 1:           # the usual case: one channel off the shared chain
            c = own[0]
            parts[c] = self._crossing_integrals(news[c], np.full(counts[c], c, np.intp))
        elif own:
            chan = np.repeat(np.arange(self.channels), counts)
            whole, rest = self._crossing_integrals(np.concatenate([news[c] for c in own]), chan)
            cuts = np.cumsum(counts)[:-1]
            parts = dict(enumerate(zip(np.split(whole, cuts, axis=1),
                                       np.split(rest, cuts, axis=1), strict=True)))
        for c, t in enumerate(news):
            if not t.shape[0]:
                continue
            if shared[c]:
                assert ref is not None
                w, r = ref[1][:, :, c], ref[2][:, :, c]
            else:
                w, r = parts[c]
            self._oc_t[c] = np.concatenate([self._oc_t[c], t])
            self._oc_p[c] = np.concatenate([self._oc_p[c], w], axis=1)
            self._oc_r[c] = np.concatenate([self._oc_r[c], r], axis=1)

    def _own_windows(self, starts: F64, ends: F64, urms: F64, dc: F64 | None) -> None:
        """Replace urms[:, c] by channel c's own Urms(1/2): the one-cycle window on c's own
        crossings that ended last at or before each row's end (in place). Rows before c's
        chain holds a whole window keep the shared-chain value. Crossings no later row can
        need are dropped."""
        for c in range(self.channels):
            t = self._oc_t[c]
            idx = np.searchsorted(t, ends, side="right") - 1
            j = idx - 2
            rows: slice | BOOL | None = slice(None)   # the rows c's own windows replace
            hi, lo = idx, j
            if j[0] >= 0:                       # all rows (j ascends)
                if (t[idx] == ends).all() and (t[j] == starts).all():
                    rows = None                 # the shared windows already: same values
            else:
                ok = j >= 0
                rows = ok if ok.any() else None
                hi, lo = idx[ok], j[ok]
            if rows is not None:
                pc, rc = self._oc_p[c], self._oc_r[c]
                d = (pc[:, hi] - pc[:, lo]).astype(np.float64)
                d += rc[:, hi]
                d -= rc[:, lo]
                sc = self.scale[c]
                span = t[hi] - t[lo]
                msq = d[1] * (sc * sc) / span
                mean = d[0] * sc / span
                if dc is not None:
                    urms[rows, c] = rms_without_dc(msq, mean, dc[rows, c])
                else:
                    urms[rows, c] = np.sqrt(np.maximum(msq, 0.0))
            drop = int(idx[-1]) - 3
            if drop > 0:
                self._oc_t[c] = t[drop:]
                self._oc_p[c] = self._oc_p[c][:, drop:]
                self._oc_r[c] = self._oc_r[c][:, drop:]

    def _crossing_integrals(self, t_abs: F64, channel: npt.NDArray[np.intp] | None = None
                            ) -> tuple[I64, F64]:
        """Integrals of the piecewise-linear interpolant of the counts x [0] and of x² [1]
        from the origin of the running sums to each crossing [count · samples, count² ·
        samples], (2, m, channels), as an exact integer part (the running sum at the
        crossing's floor) and a float rest.

        The integral over [a, b] is (int_b - int_a) + (rest_b - rest_a): trapezoid rule
        inside, linear interpolation at the fractional edges (as ``rms.segment_integrals``).
        """
        floor = np.floor(t_abs)
        rows = floor.astype(np.intp)
        rows -= self._buf_start
        rows = rows[:, None] + np.arange(3)  # the floor row, and two more for the samples
        frac = (t_abs - floor)[:, None]
        w1 = frac * frac
        w1 *= 0.5                          # weight of (v1 - v0): integral of the slope
        w0 = frac + 0.5                    # weight of v0 (its half-trapezoid included)
        w0 -= w1
        if channel is not None:            # one channel per crossing: (2, m, 3)
            pc = self._p[:, rows, channel[:, None]]
            dc = pc[:, :, 1:] - pc[:, :, :-1]
            rest_c = dc[:, :, 0] * w0[:, 0]
            rest_c += dc[:, :, 1] * w1[:, 0]
            return pc[:, :, 0], rest_c
        p = self._p[:, rows]               # (2, m, 3, channels)
        d = p[:, :, 1:] - p[:, :, :-1]     # samples at the floor and the next row, exact
        rest = d[:, :, 0] * w0
        rest += d[:, :, 1] * w1
        return p[:, :, 0], rest

    def _between(self, lo: npt.NDArray[np.intp] | slice, hi: npt.NDArray[np.intp] | slice
                 ) -> tuple[F64, F64]:
        """Integrals of x² [V² · samples] and x [V · samples] between crossing rows lo, hi."""
        d = (self._cx_p[:, hi] - self._cx_p[:, lo]).astype(np.float64)
        d += self._cx_r[:, hi]
        d -= self._cx_r[:, lo]
        d *= self._scale_xq
        return d[1], d[0]

    def _emit_windows(self, out: _Out, final: bool = False) -> None:
        base = self._cx_base
        k0, k1 = self._next_win, base + self._cx_t.shape[0] - 2
        if k1 <= k0:
            return
        lo, hi = k0 - base, k1 - base
        if not final:
            # A row waits until every channel's own chain is final past its end.
            lasts = [st.last for st in self._own_chain]
            if any(v is None for v in lasts):
                return
            limit = min(float(v) for v in lasts if v is not None)
            hi = lo + int(np.searchsorted(self._cx_t[lo + 2:hi + 2], limit, side="right"))
            if hi <= lo:
                return
            k1 = base + hi
        a = self._cx_t[lo:hi]
        b = self._cx_t[lo + 2:hi + 2]
        iq, ix = self._between(slice(lo, hi), slice(lo + 2, hi + 2))
        span = (b - a)[:, None]
        msq = iq / span
        mean = ix / span
        if self._dc_removal:
            dc = self._window_dc(mean, k0)
            self._cx_dc[lo:hi] = dc
            urms = rms_without_dc(msq, mean, dc)
        else:
            dc = None
            urms = np.sqrt(np.maximum(msq, 0.0))
        self._own_windows(a, b, urms, dc)
        syn = self._cx_syn
        synthetic = syn[lo:hi] | syn[lo + 1:hi + 1]
        synthetic |= syn[lo + 2:hi + 2]
        flagged, self._in_dip, self._in_swell = event_window_flags(
            urms, self._dip_v, self._dip_end_v, self._swell_v, self._swell_end_v,
            self._in_dip, self._in_swell)
        self._cx_wflag[lo:hi] = flagged
        out.hc.append((a.copy(), b.copy(), urms, synthetic))
        self._feed_freq(out, self._cx_utc[lo:hi], synthetic, flagged)
        self._next_win = k1

    def _window_dc(self, mean: F64, k0: int) -> F64:
        """DC estimate [V] for windows k0 .. k0 + len(mean) - 1, given their means [V].

        Window k gets the median of the means of windows g - history .. g - 1, with
        g = group * floor(k / group) (zero for g = 0): the values of
        ``conditioning.grouped_dc_estimate``, each group's median computed once.
        """
        group, history = 2 * self._cycles, self._dc_history
        hist = self._wmean_hist
        allm = np.concatenate([hist, mean], axis=0) if hist.shape[0] else mean
        first = k0 - hist.shape[0]                       # window index of allm[0]
        k1 = k0 + mean.shape[0]
        g_first = (k0 // group) * group
        cache = self._dc_cache
        todo = [g for g in range(max(g_first, history), k1, group) if g not in cache]
        if todo:                    # the common case: full histories, one vectorised median
            lo = np.array(todo) - (first + history)
            idx = lo[:, None] + np.arange(history)[None, :]
            srt = allm.T[:, idx]                                  # (channels, groups, H)
            srt.sort(axis=-1)
            est = 0.5 * (srt[:, :, (history - 1) // 2] + srt[:, :, history // 2])
            for j, g in enumerate(todo):
                cache[g] = est[:, j]
        for g in range(g_first, min(history, k1), group):    # just after a start
            if g not in cache:
                cache[g] = (np.zeros(self.channels) if g == 0
                            else _median_of_rows(allm[-first:g - first]))
        groups = range(g_first, k1, group)
        for g in [g for g in cache if g < g_first]:
            del cache[g]
        self._wmean_hist = allm[-(history + group):]
        if len(groups) == 1:
            dc = np.empty(mean.shape)
            dc[...] = cache[g_first]
            return dc
        # Rows per group: from its start (or k0) to the next group's start (or k1).
        reps = [min(g + group, k1) - max(g, k0) for g in groups]
        return np.array([cache[g] for g in groups]).repeat(reps, axis=0)

    def _find_intervals(self, final: bool) -> tuple[npt.NDArray[np.intp], npt.NDArray[np.intp]]:
        """Basic intervals that became complete: first crossing (global index) and cycles."""
        base, n = self._cx_base, self._cx_t.shape[0]
        total = base + n
        if not final:          # an interval's flag needs every window that overlaps it
            total = min(total, self._next_win + 2)
            n = total - base
        i0 = self._iv_start
        step = 2 * self._cycles
        if i0 - base < n and self._cx_p10[i0 - base] == self._cx_p10[n - 1]:
            # No 10-min tick ahead: whole intervals of `cycles`, closed form.
            k = max(0, (total - 1 - i0) // step if final else (total - 2 - i0) // step)
            starts = list(range(i0, i0 + k * step, step))
            cycles = [self._cycles] * k
            i0 += k * step
            if final and (total - 1 - i0) // 2 >= 1:
                starts.append(i0)
                cycles.append((total - 1 - i0) // 2)   # partial interval at end of data
                i0 += 2 * cycles[-1]
            self._iv_start = i0
            return np.array(starts, np.intp), np.array(cycles, np.intp)
        found: list[tuple[int, int]] = []
        while True:
            if i0 - base >= n:
                break
            p0 = self._cx_p10[i0 - base]
            close_m = 0
            for m in range(1, self._cycles + 1):
                j = i0 + 2 * m
                if j >= total:
                    break
                if m == self._cycles or self._cx_p10[j - base] != p0:
                    close_m = m
                    break
            if close_m == 0 or (not final and i0 + 2 * close_m + 1 >= total):
                if final and close_m == 0:
                    close_m = (total - 1 - i0) // 2   # partial interval at end of data
                    if close_m < 1:
                        break
                elif not final:
                    break
            found.append((i0, close_m))
            i0 += 2 * close_m
        self._iv_start = i0
        return (np.array([f[0] for f in found], np.intp),
                np.array([f[1] for f in found], np.intp))

    def _emit_intervals(self, out: _Out, final: bool) -> None:
        first, cyc = self._find_intervals(final)
        if not first.shape[0]:
            return
        i0s = first - self._cx_base
        i1s = i0s + 2 * cyc
        s, e = self._cx_t[i0s], self._cx_t[i1s]
        iq, ix = self._between(i0s, i1s)
        span = (e - s)[:, None]
        msq = iq / span
        mean = ix / span
        rms = rms_without_dc(msq, mean, self._cx_dc[i0s])
        thd = np.full(rms.shape, np.nan)
        imb = np.full(cyc.shape[0], np.nan)
        ysg2 = np.zeros((self.channels, cyc.shape[0], self._order if self._order >= 2 else 0))
        # Spectra in batches so a huge block (a whole file at once) keeps memory bounded.
        for b0 in range(0, cyc.shape[0], SPECTRA_BATCH):
            sl = slice(b0, b0 + SPECTRA_BATCH)
            ysg, fund = window_subgroups(self._wave, s[sl] - self._buf_start,
                                         e[sl] - self._buf_start, cyc[sl],
                                         max(self._order, 1), self._points, self._frac)
            if self._order >= 2:                # else the sample rate allows no harmonic
                sq2 = np.square(ysg, out=ysg2[:, sl])
                thd[sl] = thd_from_squares(ysg[..., 0], sq2).T
            if self._imbalance == "u2":         # fundamental phasors, (m, 3)
                imb[sl] = negative_sequence_ratio(fund.T)
        # Individual harmonics need the 5 Hz bins of a whole basic interval (IEC 61000-4-7):
        # the short interval before a 10-min tick or at the end of data is left out. Sums of
        # squared subgroups (orders 1..H) per 10-min period, the block's intervals at once.
        if ysg2.shape[-1]:
            p10_arr = self._cx_p10[i0s]
            if p10_arr[0] == p10_arr[-1] and int(cyc.min()) == self._cycles:
                per = int(p10_arr[0])       # the common case: whole intervals, one period
                sq, n = self._h_sums.get(per, (0.0, 0))
                self._h_sums[per] = (ysg2.sum(axis=1) + sq, cyc.shape[0] + n)
            else:
                full = cyc == self._cycles
                for per in np.unique(p10_arr).tolist():
                    rows = full & (p10_arr == per)
                    if rows.any():
                        sq, n = self._h_sums.get(per, (0.0, 0))
                        self._h_sums[per] = (ysg2[:, rows].sum(axis=1) + sq,
                                             int(rows.sum()) + n)
        if self._imbalance == "split":
            imb = split_phase_imbalance(rms[:, 0], rms[:, 1], self.site.nominal_v)
        hz = cyc * self.timebase.sample_rate() / (e - s)
        # Windows i0-1 .. i1-1 overlap the interval [crossing i0, crossing i1].
        wcs = np.concatenate([[0], self._cx_wflag.cumsum()])
        flagged = (wcs[i1s] - wcs[np.maximum(i0s - 1, 0)]) > 0
        out.iv.append((s, e, rms, thd, imb, hz, flagged))
        utc0 = self._cx_utc[i0s].tolist()
        utc1 = self._cx_utc[i1s].tolist()
        p10 = self._cx_p10[i0s].tolist()
        flag_list = flagged.tolist()
        for k in range(cyc.shape[0]):
            self._aggregate_interval(out, utc0[k], utc1[k], p10[k], rms[k], thd[k],
                                     flag_list[k])

    def _trim(self) -> None:
        base = self._cx_base
        keep_cx = max(min(self._iv_start - 1, self._next_win), base)
        drop = keep_cx - base
        if drop > 0:
            self._cx_t = self._cx_t[drop:]
            self._cx_syn = self._cx_syn[drop:]
            self._cx_utc = self._cx_utc[drop:]
            self._cx_p10 = self._cx_p10[drop:]
            self._cx_wflag = self._cx_wflag[drop:]
            self._cx_dc = self._cx_dc[drop:]
            self._cx_p = self._cx_p[:, drop:]
            self._cx_r = self._cx_r[:, drop:]
            self._cx_base = keep_cx
        if self._cx_t.shape[0]:
            need = min(self._iv_start, self._next_win) - self._cx_base
            first = self._cx_t[min(max(need, 0), self._cx_t.shape[0] - 1)]
            keep_sample = math.floor(first) - 2
        else:
            keep_sample = math.floor(self._chain.anchor) - 2
        for st in self._own_chain:       # each channel's next crossing needs its samples
            own = st.anchor if st.last is None else st.last
            keep_sample = min(keep_sample, math.floor(own) - 2)
        cut = min(keep_sample - self._buf_start, self._wave.shape[1])
        if cut > 0:
            self._wave = self._wave[:, cut:]
            self._p = self._p[:, cut:]
            self._buf_start += cut

    def _flush_signal(self, out: _Out) -> None:
        self._advance(out, final=True)
        base = self._cx_base
        rest = slice(self._next_win - base, None)
        if self._cx_t[rest].shape[0]:
            n = self._cx_t[rest].shape[0]
            self._feed_freq(out, self._cx_utc[rest], self._cx_syn[rest], np.zeros(n, bool))
            self._next_win += n
        # A break: no cycle spans a gap or a restart.
        self._f_utc.append(math.nan)
        self._f_syn.append(False)

    # ------------------------------------------------------------------ aggregation
    def _aggregate_interval(self, out: _Out, t0: float, t1: float, p10: int, rms: F64,
                            thd: F64, flagged: bool) -> None:
        if self._g3 and self._g3_period != p10:
            self._emit_3s(out)                     # resynchronised at the 10-min tick
        if self._g10 and self._g10_period != p10:
            self._emit_10min(out)
        self._g3_period = self._g10_period = p10
        self._g3.append((t0, t1, rms, thd, flagged))
        self._g10.append((rms, thd, flagged))
        if len(self._g3) == INTERVALS_PER_3S:
            self._emit_3s(out)

    def _emit_3s(self, out: _Out) -> None:
        if not self._g3:
            return
        g = self._g3
        out.aggregates.append(Aggregate(
            kind="3s", t_utc=g[0][0], duration_s=g[-1][1] - g[0][0],
            rms=tuple(float(v) for v in rms_aggregate(np.array([r[2] for r in g]))),
            thd=tuple(float(v) for v in rms_aggregate(np.array([r[3] for r in g]))),
            flagged=any(r[4] for r in g), count=len(g)))
        self._g3 = []

    def _emit_10min(self, out: _Out) -> None:
        if not self._g10 or self._g10_period is None:
            return
        g = self._g10
        out.aggregates.append(Aggregate(
            kind="10min", t_utc=self._g10_period * TEN_MIN_S, duration_s=TEN_MIN_S,
            rms=tuple(float(v) for v in rms_aggregate(np.array([r[0] for r in g]))),
            thd=tuple(float(v) for v in rms_aggregate(np.array([r[1] for r in g]))),
            flagged=any(r[2] for r in g), count=len(g), harmonics=self._harmonics_10min()))
        self._g10 = []

    def _harmonics_10min(self) -> tuple[tuple[float, ...], ...]:
        """Each channel's h2..H over the period being emitted: the RMS of each order's
        subgroup over the period's whole basic intervals (IEC 61000-4-30 cl. 4.5
        aggregation) relative to the fundamental's; NaN where there is none."""
        if self._order < 2 or self._g10_period is None:
            return ()
        period = self._g10_period
        got = self._h_sums.pop(period, None)
        for k in [k for k in self._h_sums if k < period]:
            del self._h_sums[k]
        if got is None:
            return tuple(tuple([math.nan] * (self._order - 1)) for _ in range(self.channels))
        sq, _n = got                       # (channels, H); the count cancels in the ratio
        ratio = harmonic_ratios(np.sqrt(sq))
        return tuple(tuple(float(v) for v in row) for row in ratio)

    def _feed_freq(self, out: _Out, utc: F64, syn: BOOL, flagged: BOOL) -> None:
        if utc.shape[0] == 0:
            return
        per = np.floor(utc / FREQ_INTERVAL_S).astype(np.int64)
        if per[0] == per[-1] and (per == per[0]).all():
            parts: list[slice | npt.NDArray[np.intp]] = [slice(None)]
        else:
            cuts = np.flatnonzero(np.diff(per)) + 1
            parts = list(np.split(np.arange(utc.shape[0]), cuts))
        for idx in parts:
            p = int(per[idx][0])
            if self._f_period is not None and p != self._f_period:
                self._emit_freq(out)
            self._f_period = p
            self._f_utc.extend(utc[idx].tolist())
            self._f_syn.extend(syn[idx].tolist())
            self._f_flag = self._f_flag or bool(flagged[idx].any() or syn[idx].any())

    def _emit_freq(self, out: _Out) -> None:
        if self._f_period is None:
            return
        cycles, dur = whole_cycles(np.array(self._f_utc), np.array(self._f_syn, bool))
        if cycles or any(not math.isnan(v) for v in self._f_utc):
            out.aggregates.append(Aggregate(
                kind="10s", t_utc=self._f_period * FREQ_INTERVAL_S, duration_s=FREQ_INTERVAL_S,
                hz=cycles / dur if cycles and dur > 0 else None, flagged=self._f_flag,
                count=cycles))
        self._f_period = None
        self._f_utc, self._f_syn, self._f_flag = [], [], False
