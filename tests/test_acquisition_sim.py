"""Scenario simulator (agent.acquisition.sim) against analytic waveforms and numpy/scipy."""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import scipy.integrate
from _acquisition_helpers import clean_scenario, collect, rms, write_scenario

from agent.acquisition.replay import WavSource
from agent.acquisition.sim import SimSource, load_scenario
from agent.config import ConfigError
from agent.resources import examples_dir

FS = 7680.0


def _sim(tmp_path: Path, **over: Any) -> SimSource:
    return SimSource(write_scenario(tmp_path / "s.toml", clean_scenario(**over)))


def _volts(src: SimSource) -> np.ndarray:
    return collect(src) * src.info.volts_per_count


@pytest.mark.parametrize(("nominal", "hz"), [(120.0, 60.0), (230.0, 50.0)])
def test_clean_sine_rms_is_peak_over_root2(tmp_path: Path, nominal: float, hz: float) -> None:
    src = _sim(tmp_path, mains={"nominal_v": nominal, "nominal_hz": hz},
               adc={"bits": 16, "full_scale_v": 500.0})
    v = _volts(src)[:, 0]  # 1 s = whole cycles at 50 and 60 Hz
    lsb = 500.0 / 32768
    # RMS of a sine = peak/sqrt(2) (mathematics, exact; tests/SOURCES.md); rounding adds at
    # most lsb/sqrt(12)
    peak = nominal * math.sqrt(2)
    assert rms(v) == pytest.approx(peak / math.sqrt(2), abs=lsb / math.sqrt(12))
    assert np.max(np.abs(v)) == pytest.approx(peak, abs=lsb)


def test_harmonics_at_stated_amplitude_and_phase(tmp_path: Path) -> None:
    harm = [{"order": 3, "percent": 5.0, "phase_deg": 30.0},
            {"order": 5, "percent": 3.0, "phase_deg": 180.0},
            {"order": 11, "percent": 0.7}]
    src = _sim(tmp_path, harmonics=harm)
    v = _volts(src)[:, 0]
    spec = np.fft.rfft(v) * 2 / v.size  # numpy FFT oracle; 1 s window: 1-Hz bins
    peak = 120.0 * math.sqrt(2)
    assert abs(spec[60]) == pytest.approx(peak, rel=1e-4)
    for h in harm:
        k = 60 * int(h["order"])
        assert abs(spec[k]) / abs(spec[60]) == pytest.approx(h["percent"] / 100, abs=2e-5)
        # sin(h*theta + phi): FFT phase of the harmonic minus h x the fundamental's (both sines)
        rel = np.angle(spec[k]) + math.pi / 2 - h["order"] * (np.angle(spec[60]) + math.pi / 2)
        want = math.radians(float(h.get("phase_deg", 0.0)))
        assert math.remainder(rel - want, 2 * math.pi) == pytest.approx(0.0, abs=2e-3)
    # RMS of a sum of harmonics = sqrt(sum of squares) (mathematics, exact; tests/SOURCES.md)
    expect = 120.0 * math.sqrt(1 + sum((h["percent"] / 100) ** 2 for h in harm))
    assert rms(v) == pytest.approx(expect, rel=1e-5)


def test_dip_has_stated_residual_timing_and_point_on_wave(tmp_path: Path) -> None:
    src = _sim(
        tmp_path,
        scenario={"seed": 1, "duration_s": 2.0, "sample_rate": FS, "block_samples": 999},
        channels=[{"name": "L1", "phase_deg": 0.0}, {"name": "L2", "phase_deg": 180.0}],
        events=[{"kind": "dip", "start_s": 0.5, "duration_s": 0.2, "level_pu": 0.6,
                 "channels": ["L1"], "start_angle_deg": 90.0}],
    )
    v = _volts(src)
    (ev,) = src.resolved_events
    assert ev.end_index is not None
    t_start = ev.start_index / FS
    # point on wave: first sample at or after 0.5 s whose phase reached 90 degrees
    assert 0.5 <= t_start < 0.5 + 1 / 60
    step = 360 * 60 / FS  # degrees per sample
    phase_deg = (360 * 60 * t_start) % 360
    assert 90.0 <= phase_deg < 90.0 + step
    assert ev.end_index - ev.start_index == round(0.2 * FS)
    # analytic oracle for the whole record, written from the stated parameters
    t = np.arange(v.shape[0]) / FS
    level = np.where((np.arange(v.shape[0]) >= ev.start_index)
                     & (np.arange(v.shape[0]) < ev.end_index), 0.6, 1.0)
    want_l1 = level * 120 * math.sqrt(2) * np.sin(2 * math.pi * 60 * t)
    want_l2 = 120 * math.sqrt(2) * np.sin(2 * math.pi * 60 * t + math.pi)
    lsb = 400.0 / 32768
    assert np.max(np.abs(v[:, 0] - want_l1)) <= lsb / 2 + 1e-9
    assert np.max(np.abs(v[:, 1] - want_l2)) <= lsb / 2 + 1e-9
    # one-cycle RMS wholly inside the dip = residual x nominal (RMS of a sine, exact)
    inside = v[ev.start_index + 128 : ev.start_index + 256, 0]
    assert rms(inside) == pytest.approx(0.6 * 120, abs=lsb)


def test_interruption_and_leg_loss(tmp_path: Path) -> None:
    src = _sim(
        tmp_path,
        channels=[{"name": "L1", "phase_deg": 0.0}, {"name": "L2", "phase_deg": 180.0}],
        events=[{"kind": "interruption", "start_s": 0.2, "duration_s": 0.1},
                {"kind": "leg_loss", "start_s": 0.6, "channels": ["L2"]}],
    )
    counts = collect(src)
    intr, leg = src.resolved_events
    assert np.all(counts[intr.start_index : intr.end_index] == 0)
    assert leg.end_index is None
    assert np.all(counts[leg.start_index :, 1] == 0)
    assert rms(counts[leg.start_index :, 0] * src.info.volts_per_count[0]) == pytest.approx(
        120.0, abs=0.01
    )


def test_phase_continuous_under_drift_matches_integrated_frequency(tmp_path: Path) -> None:
    drift = {"ramp_hz_per_s": 0.5, "wander_hz": 0.3, "wander_period_s": 0.7}
    scen = {"seed": 1, "duration_s": 3.0, "sample_rate": FS, "block_samples": 1000}
    src = _sim(tmp_path, scenario=scen, drift=drift)
    v = _volts(src)[:, 0]
    # scipy oracle: integrate f(t) numerically on a fine grid, then sample the phase
    fine = np.linspace(0.0, 3.0, 3_000_001)
    f = 60 + 0.5 * fine + 0.3 * np.sin(2 * math.pi * fine / 0.7)
    cycles = scipy.integrate.cumulative_trapezoid(f, fine, initial=0.0)
    t = np.arange(v.size) / FS
    want = 120 * math.sqrt(2) * np.sin(2 * math.pi * np.interp(t, fine, cycles))
    assert np.max(np.abs(v - want)) < 0.02  # [V] ~1.6 LSB; trapezoid + interpolation error
    # no discontinuity at block edges: |dv| bounded by the sine's slew at f_max (calculus)
    f_max = 60 + 0.5 * 3 + 0.3
    assert np.max(np.abs(np.diff(v))) <= 2 * math.pi * f_max * 120 * math.sqrt(2) / FS + 0.02


def test_phase_jump_shifts_zero_crossings(tmp_path: Path) -> None:
    src = _sim(tmp_path, events=[{"kind": "phase_jump", "start_s": 0.5, "jump_deg": 30.0}])
    v = _volts(src)[:, 0]
    t = np.arange(v.size) / FS
    up = np.nonzero((v[:-1] < 0) & (v[1:] >= 0))[0]
    # interpolated positive-going zero crossings
    tz = t[up] + (0 - v[up]) / (v[up + 1] - v[up]) / FS
    before, after = tz[tz < 0.49], tz[tz > 0.52]
    # a +30 degree jump makes crossings come 30/360 of a cycle early (analytic)
    frac_before = np.mod(before * 60, 1.0)
    frac_after = np.mod(after * 60 + 30 / 360, 1.0)
    assert np.max(np.minimum(frac_before, 1 - frac_before)) < 1e-3
    assert np.max(np.minimum(frac_after, 1 - frac_after)) < 1e-3


def test_adc_offset_gain_inl_noise(tmp_path: Path) -> None:
    adc = {"bits": 16, "full_scale_v": 400.0, "offset_counts": 5.0, "gain_error": 0.01,
           "inl_lsb": 2.0, "noise_lsb": 1.0}
    src = _sim(tmp_path, adc=adc, scenario={"seed": 3, "duration_s": 2.0, "sample_rate": FS})
    counts = collect(src).astype(np.float64)[:, 0]
    ideal = 120 * math.sqrt(2) * np.sin(2 * math.pi * 60 * np.arange(counts.size) / FS)
    ideal_counts = ideal / (400.0 / 32768) * 1.01
    a = np.max(np.abs(ideal_counts)) / 32768
    # mean of offset + inl*(1 - x^2) over whole cycles of x = a*sin: offset + inl*(1 - a^2/2)
    assert counts.mean() == pytest.approx(5.0 + 2.0 * (1 - a * a / 2), abs=0.05)
    # gain error scales the AC part (analytic)
    ac = counts - counts.mean()
    assert rms(ac) / rms(ideal / (400.0 / 32768)) == pytest.approx(1.01, abs=2e-5)
    # residual noise: 1 LSB gaussian + 1/12 LSB^2 rounding (common practice)
    resid = counts - (ideal_counts + 5.0 + 2.0 * (1 - (ideal_counts / 32768) ** 2))
    assert np.std(resid) == pytest.approx(math.sqrt(1 + 1 / 12), rel=0.03)


def test_mains_noise_from_snr(tmp_path: Path) -> None:
    src = _sim(tmp_path, noise={"snr_db": 40.0},
               scenario={"seed": 9, "duration_s": 2.0, "sample_rate": FS})
    v = _volts(src)[:, 0]
    clean = 120 * math.sqrt(2) * np.sin(2 * math.pi * 60 * np.arange(v.size) / FS)
    # SNR 40 dB re 120 V RMS -> 1.2 V RMS of noise (definition of dB)
    assert np.std(v - clean) == pytest.approx(1.2, rel=0.03)


def test_clipping_is_flagged_not_silent(tmp_path: Path) -> None:
    src = _sim(tmp_path, adc={"bits": 12, "full_scale_v": 150.0})
    clipped = sum(b.flags.get("clipped", 0) for b in src.blocks())
    # samples whose ideal code falls outside the 12-bit range -2048..2047 after rounding
    code = 120 * math.sqrt(2) * np.sin(2 * math.pi * 60 * np.arange(int(FS)) / FS) / (150 / 2048)
    assert clipped == np.count_nonzero((code > 2047.5) | (code < -2048.5))
    # ... which is near the continuous fraction 1 - (2/pi) asin(150/peak) (analytic)
    frac = 1 - 2 / math.pi * math.asin(150 / (120 * math.sqrt(2)))
    assert clipped / FS == pytest.approx(frac, abs=2 / 128)  # +-1 sample per half cycle
    assert collect(_sim(tmp_path, adc={"bits": 12, "full_scale_v": 150.0})).max() == 2047


def test_deterministic_with_seed_and_independent_of_block_size(tmp_path: Path) -> None:
    base = {"seed": 42, "duration_s": 1.0, "sample_rate": FS, "block_samples": 1024}
    kw = {"noise": {"volts_rms": 0.5}, "adc": {"bits": 16, "full_scale_v": 400.0, "noise_lsb": 1.0}}
    a = collect(_sim(tmp_path, scenario=base, **kw))
    b = collect(_sim(tmp_path, scenario={**base, "block_samples": 77}, **kw))
    c = collect(_sim(tmp_path, scenario={**base, "seed": 43}, **kw))
    np.testing.assert_array_equal(a, b)
    assert np.count_nonzero(a != c) > a.size // 2


@pytest.mark.parametrize(
    ("over", "key", "problem"),
    [
        ({"events": [{"kind": "dip", "start_s": 1.0, "duration_s": 0.1, "level_pu": 1.2}]},
         "events[0].level_pu", "a dip needs level_pu < 1"),
        ({"events": [{"kind": "sag", "start_s": 1.0}]}, "events[0].kind", "must be one of"),
        ({"events": [{"kind": "dip", "start_s": 1.0, "level_pu": 0.5}]},
         "events[0].duration_s", "required for a dip"),
        ({"events": [{"kind": "swell", "start_s": 1, "duration_s": 1, "level_pu": 1.2,
                      "channels": ["L9"]}]}, "events[0].channels", "unknown channel 'L9'"),
        ({"harmonics": [{"order": 80, "percent": 1.0}]}, "harmonics[0].order", "Nyquist"),
        ({"noise": {"snr_db": 40.0, "volts_rms": 1.0}}, "noise.snr_db", "not both"),
        ({"adc": {"bits": 24}}, "adc.bits", "must be 8..16"),
        ({"mains": {"nominal_v": "120"}}, "mains.nominal_v", "expected float"),
        ({"drift": {"ramp_hz": 1.0}}, "drift.ramp_hz", "unknown key"),
        ({"events": [{"kind": "leg_loss", "start_s": 5.0}]}, "events[0].start_s", "not inside"),
    ],
)
def test_config_errors_name_file_and_key(
    tmp_path: Path, over: dict[str, Any], key: str, problem: str
) -> None:
    path = write_scenario(tmp_path / "bad.toml", clean_scenario(**over))
    with pytest.raises(ConfigError) as err:
        load_scenario(path)
    assert err.value.key == key and err.value.path == str(path)
    assert problem in err.value.problem


def test_bundled_examples_are_labelled_invented_and_load() -> None:
    for name, channels, seconds in (("invented-street", 2, 60.0), ("invented-230v", 1, 30.0)):
        path = examples_dir() / f"{name}.toml"
        assert "INVENTED" in path.read_text()
        scen = load_scenario(path)
        assert len(scen.channels) == channels and scen.duration_s == seconds
    assert "invented" in (examples_dir() / "README.md").read_text().lower()


def test_bundled_wav_is_the_rendered_street_scenario() -> None:
    # the recording must be reproducible from its scenario (deterministic seed)
    src = SimSource(examples_dir() / "invented-street.toml")
    wav = WavSource(examples_dir() / "invented-street.wav", 400.0 / 32768,
                    channel_names=["L1", "L2"], block_frames=5000)
    assert wav.info.sample_rate == src.info.sample_rate
    np.testing.assert_array_equal(collect(wav), collect(src))
    # scale documented in agent/examples/README.md
    assert src.info.volts_per_count[0] == 400.0 / 32768
    assert "0.01220703125" in (examples_dir() / "README.md").read_text()


def test_start_utc_and_paced_blocks(tmp_path: Path) -> None:
    scen = {"seed": 1, "duration_s": 0.5, "sample_rate": FS, "block_samples": 768,
            "start_utc": "2026-06-01T12:00:00Z"}
    path = write_scenario(tmp_path / "s.toml", clean_scenario(scenario=scen))
    fake_now = [1000.0]
    slept: list[float] = []

    def sleep(dt: float) -> None:
        slept.append(dt)
        fake_now[0] += dt

    src = SimSource(path, speed=2.0, now=lambda: fake_now[0], sleep=sleep)
    # 2026-06-01T12:00:00Z as a POSIX timestamp (datetime arithmetic, stdlib)
    assert src.timebase().to_utc(0) == 1780315200.0
    assert src.timebase().to_utc(FS) == 1780315201.0
    walls = [b.wall_time for b in src.blocks()]
    # at 2x real time, block k (0.1 s of signal) ends 0.05 s x (k+1) after the start
    assert walls == pytest.approx([1000.0 + 0.05 * (k + 1) for k in range(5)])
    assert sum(slept) == pytest.approx(0.25)
