"""Test helpers for the measurement stage: waveform synthesis, a small ADC model, a runner.

The ADC model is deliberately independent of agent/acquisition (invented test signals only).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.timebase import ReplayTimebase
from agent.events.types import Thresholds
from agent.measurement.engine import MeasurementEngine
from agent.measurement.types import Aggregate, QualityFlag
from agent.site import Site

F64 = npt.NDArray[np.float64]


def phase_of(fs: float, n: int, freq: float | F64, phase0: float = 0.0) -> F64:
    """Fundamental phase [rad] at each sample for a constant or per-sample frequency [Hz]."""
    f = np.broadcast_to(np.asarray(freq, dtype=np.float64), (n,))
    # Trapezoid integral of 2*pi*f dt, exact for a linear ramp.
    inc = np.pi * (f[1:] + f[:-1]) / fs
    return phase0 + np.concatenate([[0.0], np.cumsum(inc)])


def wave(phase: F64, peak: float | F64, harmonics: dict[int, tuple[float, float]] | None = None
         ) -> F64:
    """peak * (sin(phase) + sum a_h sin(h phase + phi_h)) [V]."""
    x = np.sin(phase)
    for h, (a, phi) in (harmonics or {}).items():
        x = x + a * np.sin(h * phase + phi)
    return np.asarray(peak * x)


@dataclass
class Adc:
    """Voltage sensor + ADC: counts = round((v/vpc)(1+gain_error) + offset + INL + noise).

    ``inl_counts`` is a smooth bow inl*(1 - u^2) - inl/3 with u = code / full scale (zero mean
    over a uniform input, peak error ``inl_counts``); the output is clipped at the rails of
    ``bits`` and stored as int16.
    """

    volts_per_count: float
    bits: int = 16
    offset_counts: float = 0.0
    gain_error: float = 0.0
    inl_counts: float = 0.0
    noise_counts: float = 0.0
    seed: int = 1
    rng: np.random.Generator = field(init=False)

    def __post_init__(self) -> None:
        self.rng = np.random.default_rng(self.seed)

    def __call__(self, volts: F64) -> npt.NDArray[np.int16]:
        full = float(1 << (self.bits - 1))
        code = volts / self.volts_per_count * (1.0 + self.gain_error)
        u = code / full
        code = code + self.offset_counts + self.inl_counts * (1.0 - u * u)
        if self.noise_counts:
            code = code + self.rng.normal(0.0, self.noise_counts, code.shape)
        return np.clip(np.round(code), -full, full - 1).astype(np.int16)


@dataclass
class Result:
    start: F64
    end: F64
    urms: F64
    synthetic: npt.NDArray[np.bool_]
    iv_start: F64
    iv_end: F64
    iv_rms: F64
    iv_thd: F64
    iv_imb: F64
    iv_hz: F64
    iv_flagged: npt.NDArray[np.bool_]
    aggregates: list[Aggregate]
    flags: list[QualityFlag]

    def aggs(self, kind: str) -> list[Aggregate]:
        return [a for a in self.aggregates if a.kind == kind]


def make_engine(fs: float, nominal_v: float, nominal_hz: float, channels: int,
                volts_per_count: float, bits: int = 16, gains: F64 | None = None,
                origin: float = 0.0) -> MeasurementEngine:
    names = ("L1", "L2", "L3")[:channels]
    service = {1: "1ph", 2: "120/240", 3: "3ph"}[channels]
    info = SourceInfo(fs, names, np.full(channels, volts_per_count), adc_bits=bits)
    site = Site(nominal_v=nominal_v, nominal_hz=nominal_hz, service_type=service,
                channel_names=names)
    return MeasurementEngine(info, site, Thresholds(), ReplayTimebase(fs, origin), gains)


def run(engine: MeasurementEngine, counts: npt.NDArray[np.int16], block: int,
        start_index: int = 0, gaps: dict[int, int] | None = None) -> Result:
    """Feed ``counts`` in blocks of ``block`` rows; ``gaps`` maps a row to samples lost
    before it."""
    outs = []
    skip = 0
    gaps = gaps or {}
    cuts = sorted(set(range(0, counts.shape[0], block)) | set(gaps))
    for i, s in enumerate(cuts):
        e = cuts[i + 1] if i + 1 < len(cuts) else counts.shape[0]
        skip += gaps.get(s, 0)
        outs.append(engine.process(Block(start_index + s + skip, counts[s:e])))
    outs.append(engine.finish())
    hc = [o.half_cycles for o in outs]
    iv = [o.intervals for o in outs]
    return Result(
        np.concatenate([h.start for h in hc]), np.concatenate([h.end for h in hc]),
        np.concatenate([h.urms for h in hc]), np.concatenate([h.synthetic for h in hc]),
        np.concatenate([b.start for b in iv]), np.concatenate([b.end for b in iv]),
        np.concatenate([b.rms for b in iv]), np.concatenate([b.thd for b in iv]),
        np.concatenate([b.imbalance for b in iv]), np.concatenate([b.hz for b in iv]),
        np.concatenate([b.flagged for b in iv]),
        [a for o in outs for a in o.aggregates], [f for o in outs for f in o.flags])
