"""Streaming measurement engine: counts in, Urms(1/2), 10/12-cycle values and aggregates out.

Every result depends only on the samples, never on how they were split into blocks: the
engine carries the samples after the last complete cycle, the filter and hysteresis state,
the open 10/12-cycle interval and the open aggregations from one block to the next. The carry
is bounded (about one basic interval of samples plus a few hundred crossings).

References
----------
IEC 61000-4-30 Ed.3: clause 4.4 and 5.2 (10/12-cycle basic interval, gapless, resynchronised
at each 10-min tick), 4.5 (aggregation), 4.7 (flagging), 5.1 (frequency), 5.4.2 (Urms(1/2)),
5.7 (unbalance), 5.8 with IEC 61000-4-7 (harmonics).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.timebase import Timebase
from agent.events.types import Thresholds
from agent.measurement.aggregate import rms_aggregate
from agent.measurement.conditioning import (
    BoxcarCascade,
    boxcar_gain,
    boxcar_lengths,
    grouped_dc_estimate,
)
from agent.measurement.frequency import whole_cycles
from agent.measurement.harmonics import (
    harmonic_subgroups,
    max_harmonic_order,
    resample_points,
    thd_from_subgroups,
    window_spectra,
)
from agent.measurement.imbalance import negative_sequence_ratio, split_phase_imbalance
from agent.measurement.quality import QualityMonitor
from agent.measurement.rms import rms_without_dc, segment_integrals
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
        if self.hc:
            hc = HalfCycleRms(np.concatenate([h[0] for h in self.hc]),
                              np.concatenate([h[1] for h in self.hc]),
                              np.concatenate([h[2] for h in self.hc]),
                              np.concatenate([h[3] for h in self.hc]))
        else:
            hc = HalfCycleRms(np.zeros(0), np.zeros(0), np.zeros((0, channels)),
                              np.zeros(0, bool))
        if self.iv:
            cols = [np.concatenate([r[i] for r in self.iv]) for i in range(7)]
            iv = BasicIntervals(cols[0], cols[1], cols[2], cols[3], cols[4], cols[5],
                                cols[6].astype(bool))
        else:
            iv = BasicIntervals(np.zeros(0), np.zeros(0), np.zeros((0, channels)),
                                np.zeros((0, channels)), np.zeros(0), np.zeros(0),
                                np.zeros(0, bool))
        return MeasurementOutput(hc, iv, self.aggregates, self.flags)


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
    """

    def __init__(self, info: SourceInfo, site: Site, thresholds: Thresholds, timebase: Timebase,
                 gains: npt.ArrayLike | None = None, *, dc_removal: bool = True,
                 band_fraction: float = 0.08) -> None:
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
        self._next: int | None = None
        # Aggregations survive gaps.
        self._g3: list[tuple[float, float, F64, F64, bool]] = []
        self._g3_period: int | None = None
        self._g10: list[tuple[F64, F64, bool]] = []
        self._g10_period: int | None = None
        self._f_period: int | None = None
        self._f_utc: list[float] = []
        self._f_syn: list[bool] = []
        self._f_flag = False
        self._buf: F64 = np.zeros((0, c))
        self._energy: tuple[F64] | None = None
        self._reset_signal(0)

    # ------------------------------------------------------------------ public API
    def process(self, block: Block) -> MeasurementOutput:
        """Measure one block; returns what became complete with it."""
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
        y = counts * self.scale
        self._buf = np.concatenate([self._buf, y], axis=0) if self._buf.shape[0] else y
        self._energy = None
        f = self._casc.process(y)
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
        return out.build(self.channels)

    # ------------------------------------------------------------------ signal chain
    def _reset_signal(self, anchor: int) -> None:
        c = self.channels
        self._casc = BoxcarCascade(self._lengths, c)
        self._delay = self._casc.delay
        self._settle_until = anchor + self._casc.settle
        self._seg: list[F64] = [np.zeros(0) for _ in range(c)]
        self._seg_start = [float(anchor)] * c
        self._state = [0] * c
        self._cand: list[F64] = [np.zeros(0) for _ in range(c)]
        self._horizon = [-math.inf] * c
        self._chain = ChainState(last=None, anchor=anchor + self._delay)
        self._buf = np.zeros((0, c))
        self._buf_start = anchor
        self._energy = None
        self._cx_t = np.zeros(0)
        self._cx_syn = np.zeros(0, bool)
        self._cx_utc = np.zeros(0)
        self._cx_p10 = np.zeros(0, np.int64)
        self._cx_wflag = np.zeros(0, bool)
        self._cx_base = 0
        self._next_win = 0
        self._iv_start = 0
        self._cx_dc = np.zeros((0, c))
        self._wmean_hist = np.zeros((0, c))
        self._quality.reset()

    def _measured_until(self) -> float:
        n = self._cx_t.shape[0]
        return float(self._cx_t[-1]) if n else float(self._buf_start)

    def _detect(self, f: F64, start: int) -> None:
        cap = int(4 * self._hp) + 2
        d = self._delay
        for c in range(self.channels):
            seg = np.concatenate([self._seg[c], f[:, c]]) if self._seg[c].shape[0] else f[:, c]
            s0 = self._seg_start[c] if self._seg[c].shape[0] else float(start)
            t, last_out, state = hysteresis_crossings(seg, self._band, self._state[c])
            if t.shape[0]:
                self._cand[c] = np.concatenate([self._cand[c], s0 + t - d])
            keep = max(last_out, 0, seg.shape[0] - cap)
            self._seg[c] = seg[keep:].copy()
            self._seg_start[c] = s0 + keep
            self._state[c] = state
            self._horizon[c] = s0 + keep - d

    def _advance(self, out: _Out, final: bool) -> None:
        new_t, new_syn = extend_chain(self._cand, self._horizon, self._chain, self._hp,
                                      3.0 * self._hp)
        if new_t.shape[0]:
            tb = self.timebase
            utc = np.array([tb.to_utc(float(v)) for v in new_t])
            self._cx_t = np.concatenate([self._cx_t, new_t])
            self._cx_syn = np.concatenate([self._cx_syn, new_syn])
            self._cx_utc = np.concatenate([self._cx_utc, utc])
            self._cx_p10 = np.concatenate([self._cx_p10,
                                           np.floor(utc / TEN_MIN_S).astype(np.int64)])
            self._cx_wflag = np.concatenate([self._cx_wflag, np.zeros(new_t.shape[0], bool)])
            self._cx_dc = np.concatenate([self._cx_dc, np.zeros((new_t.shape[0], self.channels))])
            floor = float(self._chain.last) + MIN_SPACING * self._hp  # type: ignore[arg-type]
            for c in range(self.channels):
                cand = self._cand[c]
                if cand.shape[0]:
                    self._cand[c] = cand[np.searchsorted(cand, floor):]
        self._emit_windows(out)
        self._emit_intervals(out, final)
        self._trim()

    def _chain_integrals(self, t_abs: F64) -> tuple[F64, F64]:
        """Integrals of x² [V² · samples] and x [V · samples] between consecutive crossings."""
        if self._energy is None:
            self._energy = (self._buf * self._buf,)
        rel = t_abs - self._buf_start
        return (segment_integrals(self._energy[0], rel), segment_integrals(self._buf, rel))

    def _emit_windows(self, out: _Out) -> None:
        base = self._cx_base
        k0, k1 = self._next_win, base + self._cx_t.shape[0] - 2
        if k1 <= k0:
            return
        a = self._cx_t[k0 - base:k1 - base]
        b = self._cx_t[k0 + 2 - base:k1 + 2 - base]
        iq, ix = self._chain_integrals(self._cx_t[k0 - base:k1 + 2 - base])
        span = (b - a)[:, None]
        msq = (iq[:-1] + iq[1:]) / span
        mean = (ix[:-1] + ix[1:]) / span
        if self._dc_removal:
            allm = np.concatenate([self._wmean_hist, mean], axis=0)
            first = k0 - self._wmean_hist.shape[0]
            dc = grouped_dc_estimate(allm, first, 2 * self._cycles,
                                     self._dc_history)[self._wmean_hist.shape[0]:]
            self._wmean_hist = allm[-(self._dc_history + 2 * self._cycles):]
            self._cx_dc[k0 - base:k1 - base] = dc
            urms = rms_without_dc(msq, mean, dc)
        else:
            urms = np.sqrt(np.maximum(msq, 0.0))
        syn = self._cx_syn
        synthetic = (syn[k0 - base:k1 - base] | syn[k0 + 1 - base:k1 + 1 - base]
                     | syn[k0 + 2 - base:k1 + 2 - base])
        flagged = np.any((urms < self._dip_v) | (urms > self._swell_v), axis=1)
        self._cx_wflag[k0 - base:k1 - base] = flagged
        out.hc.append((a.copy(), b.copy(), urms, synthetic))
        self._feed_freq(out, self._cx_utc[k0 - base:k1 - base], synthetic, flagged)
        self._next_win = k1

    def _emit_intervals(self, out: _Out, final: bool) -> None:
        base, total = self._cx_base, self._cx_base + self._cx_t.shape[0]
        found: list[tuple[int, int]] = []
        i0 = self._iv_start
        while True:
            if i0 - base >= self._cx_t.shape[0]:
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
        if not found:
            return
        i0s = np.array([f[0] for f in found]) - base
        cyc = np.array([f[1] for f in found])
        i1s = i0s + 2 * cyc
        s, e = self._cx_t[i0s], self._cx_t[i1s]
        lo = int(i0s[0])
        iq, ix = self._chain_integrals(self._cx_t[lo:int(i1s[-1]) + 1])
        gq = np.concatenate([np.zeros((1, self.channels)), np.cumsum(iq, axis=0)])
        gx = np.concatenate([np.zeros((1, self.channels)), np.cumsum(ix, axis=0)])
        span = (e - s)[:, None]
        msq = (gq[i1s - lo] - gq[i0s - lo]) / span
        mean = (gx[i1s - lo] - gx[i0s - lo]) / span
        rms = rms_without_dc(msq, mean, self._cx_dc[i0s])
        thd = np.full(rms.shape, np.nan)
        imb = np.full(cyc.shape[0], np.nan)
        # Spectra in batches so a huge block (a whole file at once) keeps memory bounded.
        for b0 in range(0, cyc.shape[0], SPECTRA_BATCH):
            sl = slice(b0, b0 + SPECTRA_BATCH)
            spec = window_spectra(self._buf, s[sl] - self._buf_start, e[sl] - self._buf_start,
                                  self._points, np.float32)
            if self._order >= 2:                # else the sample rate allows no harmonic
                thd[sl] = thd_from_subgroups(harmonic_subgroups(spec, cyc[sl], self._order,
                                                                e[sl] - s[sl]))
            if self._imbalance == "u2":         # fundamental phasors, (m, 3)
                imb[sl] = negative_sequence_ratio(spec[np.arange(spec.shape[0]), :, cyc[sl]])
        if self._imbalance == "split":
            imb = split_phase_imbalance(rms[:, 0], rms[:, 1], self.site.nominal_v)
        hz = cyc * self.timebase.sample_rate() / (e - s)
        # Windows i0-1 .. i1-1 overlap the interval [crossing i0, crossing i1].
        wcs = np.concatenate([[0], np.cumsum(self._cx_wflag)])
        flagged = (wcs[i1s] - wcs[np.maximum(i0s - 1, 0)]) > 0
        out.iv.append((s.copy(), e.copy(), rms, thd, imb, hz, flagged))
        for k in range(cyc.shape[0]):
            self._aggregate_interval(out, float(self._cx_utc[i0s[k]]),
                                     float(self._cx_utc[i1s[k]]), int(self._cx_p10[i0s[k]]),
                                     rms[k], thd[k], bool(flagged[k]))

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
            self._cx_base = keep_cx
        if self._cx_t.shape[0]:
            need = min(self._iv_start, self._next_win) - self._cx_base
            first = self._cx_t[min(max(need, 0), self._cx_t.shape[0] - 1)]
            keep_sample = math.floor(first) - 2
        else:
            keep_sample = math.floor(self._chain.anchor) - 2
        cut = min(keep_sample - self._buf_start, self._buf.shape[0])
        if cut > 0:
            self._buf = self._buf[cut:]
            self._buf_start += cut
            self._energy = None

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
            flagged=any(r[2] for r in g), count=len(g)))
        self._g10 = []

    def _feed_freq(self, out: _Out, utc: F64, syn: BOOL, flagged: BOOL) -> None:
        if utc.shape[0] == 0:
            return
        per = np.floor(utc / FREQ_INTERVAL_S).astype(np.int64)
        cuts = np.flatnonzero(np.diff(per)) + 1
        for idx in np.split(np.arange(utc.shape[0]), cuts):
            p = int(per[idx[0]])
            if self._f_period is not None and p != self._f_period:
                self._emit_freq(out)
            self._f_period = p
            self._f_utc.extend(utc[idx].tolist())
            self._f_syn.extend(syn[idx].tolist())
            self._f_flag = self._f_flag or bool(np.any(flagged[idx]) or np.any(syn[idx]))

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
