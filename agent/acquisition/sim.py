"""Synthetic mains voltage from a scenario file (TOML), as a :class:`Source` of int16 counts.

A scenario describes steady-state mains, an ADC and timed disturbances. All generation is
vectorised block by block; the same file and seed give the same samples whatever the block
size (the analogue noise and the ADC noise each draw from their own seeded stream).

Scenario keys (every table is optional except ``[mains]``; unknown keys are rejected):

``[scenario]``
    ``name`` (str), ``description`` (str), ``seed`` (int, default 0),
    ``duration_s`` (float, default 60) [s], ``sample_rate`` (float, default 7680) [S/s],
    ``block_samples`` (int, default 1024): samples per yielded block;
    ``start_utc`` (str, optional): ISO 8601 UTC time of sample 0, e.g.
    ``"2026-06-01T12:00:00Z"``, for :meth:`SimSource.timebase` (default 0 = the epoch).
``[mains]``
    ``nominal_v`` (float, required) [V]: RMS of the fundamental, line to neutral;
    ``nominal_hz`` (float, default 60) [Hz].
``[[channels]]`` (default: one channel ``L1`` at 0°)
    ``name`` (str), ``phase_deg`` (float, default 0) [°]: e.g. split phase 0 / 180,
    ``level_pu`` (float, default 1.0): steady fundamental RMS as a fraction of nominal.
``[[harmonics]]``
    ``order`` (int ≥ 2), ``percent`` (float) [% of the fundamental amplitude],
    ``phase_deg`` (float, default 0) [°]: the component is ``sin(h·θ + φ)`` where θ is the
    channel's fundamental phase, so it follows drift and phase jumps.
``[noise]``
    ``snr_db`` (float) [dB re nominal RMS] **or** ``volts_rms`` (float) [V]: white Gaussian
    noise added on the mains side.
``[adc]``
    ``bits`` (int 8..16, default 16); ``full_scale_v`` (float) [V]: mains-side volts that map
    to code +2**(bits-1) (default 2 × nominal peak); ``offset_counts`` (float, default 0);
    ``gain_error`` (float, default 0): fractional, e.g. 0.002 = +0.2 %; ``inl_lsb`` (float,
    default 0) [LSB]: a smooth bow ``inl·(1 − x²)`` over the normalised code x ∈ [−1, 1];
    ``noise_lsb`` (float, default 0) [LSB RMS]. Codes are clipped to the ADC's range and the
    number of clipped samples is reported in the block flag ``clipped``.
    ``SourceInfo.volts_per_count`` is the *nominal* full_scale_v / 2**(bits-1); offset, gain
    error and INL are the errors a calibration has to find.
``[drift]``
    ``ramp_hz_per_s`` (float, default 0) [Hz/s]: linear frequency ramp;
    ``wander_hz`` (float, default 0) [Hz] and ``wander_period_s`` (float, default 60) [s]:
    sinusoidal wander ``f = f0 + ramp·t + wander·sin(2πt/T)``. Phase is the exact integral of
    this frequency, so it is continuous.
``[[events]]``
    ``kind``: ``dip`` | ``swell`` | ``interruption`` | ``phase_jump`` | ``leg_loss``;
    ``start_s`` [s]; ``duration_s`` [s] (required except for ``phase_jump`` and ``leg_loss``,
    where leaving it out means "until the end"); ``level_pu``: fundamental RMS during the
    event as a fraction of nominal (the residual voltage of a dip or interruption, the
    magnitude of a swell; interruption defaults to 0.0, leg_loss is always 0.0); ``channels``
    (list of names, default all); ``start_angle_deg`` [°]: point on wave — the event starts at
    the first sample at or after ``start_s`` where the first listed channel's fundamental
    phase has passed this angle (0° = positive-going zero crossing); ``jump_deg`` [°]:
    phase_jump only. Magnitude events *replace* the channel's level while active (the whole
    waveform, harmonics included, is scaled); where events overlap, the later one in the
    file wins. Phase jumps add up. Steps in level and phase are instantaneous (at a sample).
"""

from __future__ import annotations

import math
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from datetime import datetime, timedelta
from pathlib import Path

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.replay import write_wav
from agent.acquisition.timebase import ReplayTimebase
from agent.config import Section, load_toml

__all__ = [
    "AdcModel",
    "ResolvedEvent",
    "Scenario",
    "SimSource",
    "load_scenario",
    "parse_scenario",
    "write_wav",
]

EVENT_KINDS = ("dip", "swell", "interruption", "phase_jump", "leg_loss")
_MAGNITUDE_KINDS = ("dip", "swell", "interruption", "leg_loss")

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class Channel:
    name: str
    phase_deg: float = 0.0
    level_pu: float = 1.0


@dataclass(frozen=True)
class Harmonic:
    order: int
    percent: float
    phase_deg: float = 0.0


@dataclass(frozen=True)
class AdcModel:
    """A linear ADC with offset, gain error, a bow-shaped INL and input-referred noise."""

    bits: int = 16
    full_scale_v: float = 400.0
    offset_counts: float = 0.0
    gain_error: float = 0.0
    inl_lsb: float = 0.0
    noise_lsb: float = 0.0

    @property
    def half_range(self) -> int:
        return 1 << (self.bits - 1)

    @property
    def volts_per_count(self) -> float:
        return self.full_scale_v / self.half_range


@dataclass(frozen=True)
class EventSpec:
    kind: str
    start_s: float
    duration_s: float | None
    level_pu: float | None
    channels: tuple[int, ...]
    start_angle_deg: float | None
    jump_deg: float


@dataclass(frozen=True)
class ResolvedEvent:
    """An event placed on the sample grid: active for ``start_index <= i < end_index``."""

    kind: str
    channels: tuple[str, ...]
    start_index: int
    end_index: int | None
    level_pu: float | None
    jump_deg: float
    channel_indices: tuple[int, ...] = ()


@dataclass(frozen=True)
class Scenario:
    """A parsed scenario file; see the module docstring for the keys."""

    nominal_v: float
    nominal_hz: float
    sample_rate: float
    duration_s: float
    channels: tuple[Channel, ...]
    harmonics: tuple[Harmonic, ...] = ()
    noise_v_rms: float = 0.0
    adc: AdcModel = field(default_factory=AdcModel)
    ramp_hz_per_s: float = 0.0
    wander_hz: float = 0.0
    wander_period_s: float = 60.0
    events: tuple[EventSpec, ...] = ()
    seed: int = 0
    block_samples: int = 1024
    name: str = ""
    description: str = ""
    path: str | None = None
    start_utc: float = 0.0  # [s since epoch] time of sample 0

    @property
    def total_samples(self) -> int:
        return round(self.duration_s * self.sample_rate)


def _positive(sec: Section, name: str, value: float) -> float:
    if not (math.isfinite(value) and value > 0):
        raise sec.error(name, f"must be a positive number, got {value!r}")
    return value


def _finite(sec: Section, name: str, value: float) -> float:
    if not math.isfinite(value):
        raise sec.error(name, f"must be a finite number, got {value!r}")
    return value


def load_scenario(path: str | Path) -> Scenario:
    """Read and check a scenario file; problems raise :class:`ConfigError` naming the key."""
    doc = load_toml(path)
    return parse_scenario(doc, path)


def parse_scenario(doc: dict[str, object], path: str | Path | None = None) -> Scenario:
    root = Section(doc, path)
    root.reject_unknown(
        {"scenario", "mains", "channels", "harmonics", "noise", "adc", "drift", "events"}
    )
    sc = root.section("scenario")
    sc.reject_unknown(
        {"name", "description", "seed", "duration_s", "sample_rate", "block_samples", "start_utc"}
    )
    start_utc = 0.0
    if sc.has("start_utc"):
        text = sc.get("start_utc", str, required=True)
        try:
            when = datetime.fromisoformat(text)
        except ValueError:
            raise sc.error("start_utc", f"{text!r} is not an ISO 8601 time") from None
        if when.utcoffset() != timedelta(0):
            raise sc.error("start_utc", f"{text!r} must be UTC (end in Z or +00:00)")
        start_utc = when.timestamp()
    seed = sc.get("seed", int, 0)
    duration_s = _positive(sc, "duration_s", sc.get("duration_s", float, 60.0))
    rate = _positive(sc, "sample_rate", sc.get("sample_rate", float, 7680.0))
    block = sc.get("block_samples", int, 1024)
    if not 1 <= block <= 1 << 20:
        raise sc.error("block_samples", f"must be 1..{1 << 20}, got {block}")

    mains = root.section("mains", required=True)
    mains.reject_unknown({"nominal_v", "nominal_hz"})
    nominal_v = _positive(mains, "nominal_v", mains.get("nominal_v", float, required=True))
    nominal_hz = _positive(mains, "nominal_hz", mains.get("nominal_hz", float, 60.0))
    if nominal_hz * 4 > rate:
        raise sc.error("sample_rate", f"{rate} S/s is too low for {nominal_hz} Hz mains")

    channels: list[Channel] = []
    for ch in root.sections("channels"):
        ch.reject_unknown({"name", "phase_deg", "level_pu"})
        level = ch.get("level_pu", float, 1.0)
        if not (math.isfinite(level) and level >= 0):
            raise ch.error("level_pu", f"must be >= 0, got {level!r}")
        channels.append(
            Channel(
                name=ch.get("name", str, required=True),
                phase_deg=_finite(ch, "phase_deg", ch.get("phase_deg", float, 0.0)),
                level_pu=level,
            )
        )
    if not channels:
        channels = [Channel("L1")]
    names = [c.name for c in channels]
    if len(set(names)) != len(names) or not all(names):
        raise root.error("channels", f"channel names must be unique and non-empty: {names}")

    harmonics: list[Harmonic] = []
    for h in root.sections("harmonics"):
        h.reject_unknown({"order", "percent", "phase_deg"})
        order = h.get("order", int, required=True)
        if order < 2:
            raise h.error("order", f"must be >= 2, got {order}")
        if order * nominal_hz >= rate / 2:
            raise h.error("order", f"harmonic {order} is above the Nyquist frequency {rate / 2} Hz")
        pct = h.get("percent", float, required=True)
        if not (math.isfinite(pct) and pct >= 0):
            raise h.error("percent", f"must be >= 0, got {pct!r}")
        phase = _finite(h, "phase_deg", h.get("phase_deg", float, 0.0))
        harmonics.append(Harmonic(order, pct, phase))

    noise = root.section("noise")
    noise.reject_unknown({"snr_db", "volts_rms"})
    if noise.has("snr_db") and noise.has("volts_rms"):
        raise noise.error("snr_db", "give snr_db or volts_rms, not both")
    noise_v = 0.0
    if noise.has("snr_db"):
        snr = _finite(noise, "snr_db", noise.get("snr_db", float, required=True))
        noise_v = nominal_v / 10 ** (snr / 20)
    elif noise.has("volts_rms"):
        noise_v = noise.get("volts_rms", float, required=True)
        if not (math.isfinite(noise_v) and noise_v >= 0):
            raise noise.error("volts_rms", f"must be >= 0, got {noise_v!r}")

    adc_sec = root.section("adc")
    adc_sec.reject_unknown(
        {"bits", "full_scale_v", "offset_counts", "gain_error", "inl_lsb", "noise_lsb"}
    )
    bits = adc_sec.get("bits", int, 16)
    if not 8 <= bits <= 16:
        raise adc_sec.error("bits", f"must be 8..16 (int16 counts), got {bits}")
    fs_default = 2.0 * nominal_v * math.sqrt(2.0)
    adc = AdcModel(
        bits=bits,
        full_scale_v=_positive(
            adc_sec, "full_scale_v", adc_sec.get("full_scale_v", float, fs_default)
        ),
        offset_counts=_finite(adc_sec, "offset_counts", adc_sec.get("offset_counts", float, 0.0)),
        gain_error=_finite(adc_sec, "gain_error", adc_sec.get("gain_error", float, 0.0)),
        inl_lsb=_finite(adc_sec, "inl_lsb", adc_sec.get("inl_lsb", float, 0.0)),
        noise_lsb=_finite(adc_sec, "noise_lsb", adc_sec.get("noise_lsb", float, 0.0)),
    )
    if adc.noise_lsb < 0:
        raise adc_sec.error("noise_lsb", "must be >= 0")
    if abs(adc.gain_error) >= 0.5:
        raise adc_sec.error("gain_error", f"{adc.gain_error} is not a plausible fractional error")

    drift = root.section("drift")
    drift.reject_unknown({"ramp_hz_per_s", "wander_hz", "wander_period_s"})
    ramp = _finite(drift, "ramp_hz_per_s", drift.get("ramp_hz_per_s", float, 0.0))
    wander = _finite(drift, "wander_hz", drift.get("wander_hz", float, 0.0))
    period = _positive(drift, "wander_period_s", drift.get("wander_period_s", float, 60.0))
    f_min = nominal_hz - abs(ramp) * duration_s - abs(wander)
    if f_min <= 0:
        raise drift.error("ramp_hz_per_s", "drift takes the frequency to zero or below")

    events = [_parse_event(ev, names) for ev in root.sections("events")]
    for k, ev in enumerate(events):
        if ev.start_s >= duration_s:
            raise root.error(
                f"events[{k}].start_s", f"{ev.start_s} s is not inside the {duration_s}-s scenario"
            )
    return Scenario(
        nominal_v=nominal_v,
        nominal_hz=nominal_hz,
        sample_rate=rate,
        duration_s=duration_s,
        channels=tuple(channels),
        harmonics=tuple(harmonics),
        noise_v_rms=noise_v,
        adc=adc,
        ramp_hz_per_s=ramp,
        wander_hz=wander,
        wander_period_s=period,
        events=tuple(events),
        seed=seed,
        block_samples=block,
        name=sc.get("name", str, ""),
        description=sc.get("description", str, ""),
        path=str(path) if path is not None else None,
        start_utc=start_utc,
    )


def _parse_event(ev: Section, names: list[str]) -> EventSpec:
    ev.reject_unknown(
        {"kind", "start_s", "duration_s", "level_pu", "channels", "start_angle_deg", "jump_deg"}
    )
    kind = ev.choice("kind", EVENT_KINDS)
    start = ev.get("start_s", float, required=True)
    if not (math.isfinite(start) and start >= 0):
        raise ev.error("start_s", f"must be >= 0, got {start!r}")
    duration = ev.optional("duration_s", float)
    if duration is None and kind in ("dip", "swell", "interruption"):
        raise ev.error("duration_s", f"required for a {kind}")
    if duration is not None and not (math.isfinite(duration) and duration > 0):
        raise ev.error("duration_s", f"must be > 0, got {duration!r}")
    level = ev.optional("level_pu", float)
    if kind == "leg_loss":
        if level not in (None, 0.0):
            raise ev.error("level_pu", "a leg_loss is always 0.0 pu")
        level = 0.0
    elif kind == "interruption" and level is None:
        level = 0.0
    elif kind in ("dip", "swell") and level is None:
        raise ev.error("level_pu", f"required for a {kind}")
    elif kind == "phase_jump" and level is not None:
        raise ev.error("level_pu", "not used by a phase_jump (add a dip for the magnitude)")
    if level is not None and not (math.isfinite(level) and level >= 0):
        raise ev.error("level_pu", f"must be >= 0, got {level!r}")
    if kind == "dip" and level is not None and level >= 1.0:
        raise ev.error("level_pu", f"a dip needs level_pu < 1, got {level}")
    if kind == "swell" and level is not None and level <= 1.0:
        raise ev.error("level_pu", f"a swell needs level_pu > 1, got {level}")
    jump = ev.get("jump_deg", float, 0.0)
    if kind == "phase_jump":
        if not ev.has("jump_deg"):
            raise ev.error("jump_deg", "required for a phase_jump")
        _finite(ev, "jump_deg", jump)
    elif ev.has("jump_deg"):
        raise ev.error("jump_deg", "only a phase_jump takes jump_deg")
    chan_names = ev.get("channels", list, names)
    idx: list[int] = []
    for n in chan_names:
        if n not in names:
            raise ev.error("channels", f"unknown channel {n!r} (have {', '.join(names)})")
        idx.append(names.index(n))
    if not idx:
        raise ev.error("channels", "must name at least one channel")
    angle = ev.optional("start_angle_deg", float)
    if angle is not None:
        _finite(ev, "start_angle_deg", angle)
    return EventSpec(kind, start, duration, level, tuple(idx), angle, jump)


class SimSource:
    """A :class:`~agent.acquisition.base.Source` that renders a :class:`Scenario`.

    ``resolved_events`` lists every event on the sample grid (after point-on-wave
    placement), so tests can compare detections with the truth. With ``speed`` set, blocks
    are paced to ``speed`` × real time and stamped with ``wall_time`` like a live source
    (for demos); by default they come as fast as they are made, without wall time.
    """

    def __init__(
        self,
        scenario: Scenario | str | Path,
        *,
        block_samples: int | None = None,
        speed: float | None = None,
        now: Callable[[], float] = time.time,
        sleep: Callable[[float], None] = time.sleep,
    ) -> None:
        if speed is not None and not (math.isfinite(speed) and speed > 0):
            raise ValueError(f"speed must be positive, got {speed}")
        self.speed = speed
        self._now = now
        self._sleep = sleep
        if not isinstance(scenario, Scenario):
            scenario = load_scenario(scenario)
        self.scenario = scenario
        self.block_samples = block_samples or scenario.block_samples
        if self.block_samples < 1:
            raise ValueError("block_samples must be >= 1")
        adc = scenario.adc
        self.info = SourceInfo(
            sample_rate=scenario.sample_rate,
            channel_names=tuple(c.name for c in scenario.channels),
            volts_per_count=np.full(len(scenario.channels), adc.volts_per_count),
            adc_bits=adc.bits,
            description=f"simulated scenario {scenario.name or scenario.path or ''}".strip(),
        )
        self.resolved_events: tuple[ResolvedEvent, ...] = self._resolve_events()
        self._closed = False

    # -- truth ---------------------------------------------------------------------------
    def base_phase(self, index: npt.NDArray[np.int64] | F64) -> F64:
        """Fundamental phase of a 0° channel at sample ``index`` [rad], before phase jumps.

        The integral of ``f(t) = f0 + ramp·t + wander·sin(2πt/T)`` from 0 to t, times 2π.
        """
        s = self.scenario
        t = np.asarray(index, dtype=np.float64) / s.sample_rate
        cycles = s.nominal_hz * t + 0.5 * s.ramp_hz_per_s * t * t
        if s.wander_hz:
            w = 2.0 * math.pi / s.wander_period_s
            cycles = cycles + s.wander_hz / w * (1.0 - np.cos(w * t))
        return np.asarray(2.0 * math.pi * cycles, dtype=np.float64)

    def frequency(self, index: F64) -> F64:
        """Instantaneous fundamental frequency at sample ``index`` [Hz]."""
        s = self.scenario
        t = np.asarray(index, dtype=np.float64) / s.sample_rate
        f = s.nominal_hz + s.ramp_hz_per_s * t
        if s.wander_hz:
            f = f + s.wander_hz * np.sin(2.0 * math.pi * t / s.wander_period_s)
        return np.asarray(f, dtype=np.float64)

    def _jumps(self, channel: int, index: npt.NDArray[np.int64], upto: int | None = None) -> F64:
        out = np.zeros(index.shape, dtype=np.float64)
        events = self.resolved_events if upto is None else self._partial[:upto]
        for ev in events:
            if ev.kind != "phase_jump" or channel not in ev.channel_indices:
                continue
            active = index >= ev.start_index
            if ev.end_index is not None:
                active &= index < ev.end_index
            out[active] += math.radians(ev.jump_deg)
        return out

    def channel_phase(self, channel: int, index: npt.NDArray[np.int64]) -> F64:
        """Fundamental phase of ``channel`` including its offset and phase jumps [rad]."""
        ph = math.radians(self.scenario.channels[channel].phase_deg)
        return self.base_phase(index) + ph + self._jumps(channel, index)

    def _resolve_events(self) -> tuple[ResolvedEvent, ...]:
        s = self.scenario
        fs = s.sample_rate
        order = sorted(range(len(s.events)), key=lambda k: s.events[k].start_s)
        placed: dict[int, ResolvedEvent] = {}
        self._partial: list[ResolvedEvent] = []
        for k in order:
            ev = s.events[k]
            start = math.ceil(ev.start_s * fs - 1e-9)
            if ev.start_angle_deg is not None:
                start = self._point_on_wave(ev.channels[0], start, ev.start_angle_deg)
            end = None if ev.duration_s is None else start + max(1, round(ev.duration_s * fs))
            r = ResolvedEvent(
                kind=ev.kind,
                channels=tuple(s.channels[c].name for c in ev.channels),
                start_index=start,
                end_index=end,
                level_pu=ev.level_pu,
                jump_deg=ev.jump_deg,
                channel_indices=ev.channels,
            )
            placed[k] = r
            self._partial.append(r)
        return tuple(placed[k] for k in range(len(s.events)))

    def _point_on_wave(self, channel: int, start: int, angle_deg: float) -> int:
        """First sample >= start whose phase has reached ``angle_deg`` (mod 360)."""
        fs = self.scenario.sample_rate
        f_min = max(1e-3, float(self.frequency(np.array([float(start)]))[0]) * 0.5)
        span = math.ceil(fs / f_min) + 2
        idx = np.arange(start - 1, start + span, dtype=np.int64)
        ph0 = math.radians(self.scenario.channels[channel].phase_deg)
        phase = self.base_phase(idx) + ph0 + self._jumps(channel, idx, upto=len(self._partial))
        rel = np.mod(phase - math.radians(angle_deg), 2.0 * math.pi)
        # a wrap of rel (large drop) between idx[j-1] and idx[j] means the angle was passed.
        wrapped = np.nonzero(np.diff(rel) < -math.pi)[0]
        if rel[1] < 1e-9:
            return start
        if wrapped.size == 0:
            return start
        return int(idx[wrapped[0] + 1])

    def levels(self, channel: int, index: npt.NDArray[np.int64]) -> F64:
        """Fundamental level of ``channel`` at each index [pu of nominal]."""
        out = np.full(index.shape, self.scenario.channels[channel].level_pu, dtype=np.float64)
        for ev in self.resolved_events:
            if ev.kind not in _MAGNITUDE_KINDS or channel not in ev.channel_indices:
                continue
            active = index >= ev.start_index
            if ev.end_index is not None:
                active &= index < ev.end_index
            assert ev.level_pu is not None
            out[active] = ev.level_pu
        return out

    def clean_volts(self, start: int, n: int) -> F64:
        """Noise-free mains-side voltage for samples ``start .. start+n-1``, shape (n, ch) [V]."""
        s = self.scenario
        idx = np.arange(start, start + n, dtype=np.int64)
        out = np.empty((n, len(s.channels)), dtype=np.float64)
        peak = math.sqrt(2.0) * s.nominal_v
        for c in range(len(s.channels)):
            theta = self.channel_phase(c, idx)
            wave = np.sin(theta)
            for h in s.harmonics:
                wave += h.percent / 100.0 * np.sin(h.order * theta + math.radians(h.phase_deg))
            out[:, c] = peak * self.levels(c, idx) * wave
        return out

    def timebase(self) -> ReplayTimebase:
        """The scenario's own time: sample 0 at ``[scenario] start_utc``."""
        return ReplayTimebase(self.scenario.sample_rate, self.scenario.start_utc)

    # -- Source --------------------------------------------------------------------------
    def blocks(self) -> Iterator[Block]:
        s = self.scenario
        adc = s.adc
        seeds = np.random.SeedSequence(s.seed).spawn(2)
        analog_rng = np.random.default_rng(seeds[0])
        adc_rng = np.random.default_rng(seeds[1])
        nch = len(s.channels)
        half = adc.half_range
        lsb = adc.volts_per_count
        total = s.total_samples
        start = 0
        t_begin = self._now()
        while start < total and not self._closed:
            n = min(self.block_samples, total - start)
            volts = self.clean_volts(start, n)
            if s.noise_v_rms:
                volts += s.noise_v_rms * analog_rng.standard_normal((n, nch))
            code = volts / lsb * (1.0 + adc.gain_error) + adc.offset_counts
            if adc.inl_lsb:
                x = np.clip(code / half, -1.0, 1.0)
                code += adc.inl_lsb * (1.0 - x * x)
            if adc.noise_lsb:
                code += adc.noise_lsb * adc_rng.standard_normal((n, nch))
            code = np.rint(code)
            clipped = int(np.count_nonzero((code < -half) | (code > half - 1)))
            counts = np.clip(code, -half, half - 1).astype(np.int16)
            flags = {"clipped": clipped} if clipped else {}
            wall = None
            if self.speed is not None:
                due = t_begin + (start + n) / s.sample_rate / self.speed
                delay = due - self._now()
                if delay > 0:
                    self._sleep(delay)
                wall = self._now()
            yield Block(start_index=start, counts=counts, flags=flags, wall_time=wall)
            start += n

    def close(self) -> None:
        self._closed = True

