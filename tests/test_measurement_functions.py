"""Pure measurement functions against analytic results and numpy/scipy oracles.

All signals are invented test data."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.signal
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.events.types import Thresholds
from agent.measurement.aggregate import clock_period, rms_aggregate
from agent.measurement.conditioning import (
    boxcar,
    boxcar_gain,
    counts_to_volts,
    grouped_dc_estimate,
    remove_dc_blockwise,
)
from agent.measurement.flagging import event_window_flags
from agent.measurement.frequency import frequency_from_crossings, whole_cycles
from agent.measurement.harmonics import max_harmonic_order, thd_label, window_thd
from agent.measurement.imbalance import (
    negative_sequence_ratio,
    split_phase_imbalance,
    u2_from_line_magnitudes,
)
from agent.measurement.quality import QualityMonitor, adc_rails, clipped_mask, flat_chunks
from agent.measurement.rms import half_cycle_rms, rms, segment_integrals, window_rms
from agent.measurement.zerocross import fundamental_zero_crossings
from tests._measurement_helpers import make_engine, phase_of, wave

FS = 7680.0


def test_rms_of_sine_is_peak_over_root2() -> None:
    t = np.arange(7680) / FS                     # exactly 50 cycles of 50 Hz
    x = 325.0 * np.sin(2 * np.pi * 50 * t)
    assert rms(x) == pytest.approx(325.0 / np.sqrt(2), rel=1e-12)  # analytic: peak/sqrt(2)


def test_rms_of_harmonic_sum_is_root_sum_square() -> None:
    t = np.arange(7680) / FS
    x = (325 * np.sin(2 * np.pi * 50 * t) + 30 * np.sin(2 * np.pi * 150 * t + 0.3)
         + 12 * np.sin(2 * np.pi * 250 * t + 1.1))
    expected = np.sqrt((325**2 + 30**2 + 12**2) / 2)  # analytic: RMS of harmonics = RSS
    assert rms(x) == pytest.approx(expected, rel=1e-12)


@pytest.mark.parametrize("freq", [49.5, 50.5, 59.5, 60.5])
def test_half_cycle_rms_matches_analytic_integral(freq: float) -> None:
    # IEC 61000-4-30 Ed.3 cl. 5.4.2: RMS over one cycle from zero crossing k to k+2,
    # refreshed every half cycle. Signal with a 3rd harmonic and a step in amplitude, so the
    # windows differ; reference = closed-form integral of x^2 over each window.
    n = 8000
    ph0 = 0.4
    a1, a3 = 325.0, 20.0
    phase = phase_of(FS, n, freq, ph0)
    x = a1 * np.sin(phase) + a3 * np.sin(3 * phase)
    k = np.arange(1, int(phase[-1] / np.pi) - 1)
    crossings = (k * np.pi - ph0) / (2 * np.pi * freq) * FS     # analytic zero crossings
    crossings = crossings[(crossings > 1) & (crossings < n - 3)]
    start, end, urms = half_cycle_rms(x, crossings)

    w = 2 * np.pi * freq / FS

    def prim(t: np.ndarray) -> np.ndarray:    # antiderivative of x(t)^2 [V^2 * samples]
        p = w * t + ph0
        return (a1**2 * (t / 2 - np.sin(2 * p) / (4 * w))
                + a3**2 * (t / 2 - np.sin(6 * p) / (12 * w))
                + a1 * a3 * (np.sin(2 * p) / (2 * 2 * w) - np.sin(4 * p) / (2 * 4 * w)))

    expected = np.sqrt((prim(end) - prim(start)) / (end - start))
    np.testing.assert_allclose(urms, expected, rtol=2e-5)      # analytic integral
    assert np.all(np.abs(np.diff(start) * 2 * freq / FS - 1) < 1e-9)  # half-cycle refresh


def test_window_rms_rejects_bad_windows() -> None:
    with pytest.raises(ValueError):
        window_rms(np.ones(10), [5.0], [3.0])


def _analytic_crossings(phase: np.ndarray) -> np.ndarray:
    """Sample positions where the fundamental phase passes k*pi (linear interpolation)."""
    k = np.arange(np.ceil(phase[0] / np.pi), np.floor(phase[-1] / np.pi) + 1)
    return np.interp(k * np.pi, phase, np.arange(phase.shape[0]))


def test_zero_crossings_with_harmonics_phase_jump_and_noise() -> None:
    # IEC 61000-4-30 Ed.3 cl. 5.1: crossings of the fundamental, harmonics and noise suppressed.
    n = int(FS * 2)
    phase = phase_of(FS, n, 50.0)
    phase[n // 2:] += np.pi / 6                                # 30 degree phase jump
    x = wave(phase, 325.0, {3: (0.05, 0.7), 5: (0.06, 2.1)})
    rms_x = np.sqrt(np.mean(x**2))
    x = x + np.random.default_rng(4).normal(0, rms_x / 100, n)  # 40 dB SNR
    t, syn = fundamental_zero_crossings(x, FS, 50.0, 325.0)
    truth = _analytic_crossings(phase)
    truth = truth[(truth >= t[0] - 2) & (truth <= t[-1] + 2)]
    assert not syn.any()
    assert t.shape[0] == truth.shape[0]                         # exactly the right count
    far = np.abs(t - truth) > 2.0
    # Within 2 samples except the few crossings right at the jump, which the filter smears.
    assert np.count_nonzero(far) <= 3 and np.all(np.abs(t - truth) < 0.2 * FS / 100)
    # Two crossings per cycle: 100 s^-1 for 50 Hz over the record (common practice count).
    assert abs(t.shape[0] - (t[-1] - t[0]) / FS * 100) <= 1.5


def test_zero_crossings_fall_back_to_nominal_period_during_zero_volts() -> None:
    n = int(FS * 1.5)
    phase = phase_of(FS, n, 50.0)
    x = 325.0 * np.sin(phase)
    x[int(0.5 * FS):int(1.0 * FS)] = 0.0                        # 0 V for 0.5 s
    t, syn = fundamental_zero_crossings(x, FS, 50.0, 325.0)
    d = np.diff(t)
    hp = FS / 100
    inside = syn & (t > 0.55 * FS) & (t < 0.95 * FS)
    assert inside.sum() >= 35                                   # ~40 half cycles synthetic
    np.testing.assert_allclose(d[syn[1:] & syn[:-1]], hp, rtol=1e-12)  # nominal half-period
    assert not syn[t < 0.45 * FS].any() and not syn[t > 1.1 * FS].any()
    assert np.all(d >= 0.3 * hp)                                # spacing rule


@pytest.mark.parametrize(("freq", "nominal", "cycles"), [(50.0, 50.0, 10), (60.0, 60.0, 12),
                                                         (50.7, 50.0, 10), (59.3, 60.0, 12)])
def test_thd_of_synthesized_wave(freq: float, nominal: float, cycles: int) -> None:
    # IEC 61000-4-7 subgroups; analytic THD of 5 % 3rd + 6 % 5th = sqrt(0.05^2 + 0.06^2).
    n = 4000
    phase = phase_of(FS, n, freq, 0.2)
    x = wave(phase, 325.0, {3: (0.05, 1.0), 5: (0.06, 2.0)})
    start = (2 * np.pi - 0.2) / (2 * np.pi * freq) * FS
    end = start + cycles * FS / freq
    thd = window_thd(x, [start], [end], [cycles], FS, nominal)
    assert thd[0, 0] == pytest.approx(np.hypot(0.05, 0.06), rel=1e-3)


def test_thd_against_scipy_resample_oracle() -> None:
    # Oracle: scipy.signal.resample (FFT method) of an exact 10-cycle window (1536 samples at
    # 50 Hz, 7680 S/s) to 2048 points, numpy rfft, subgroups per IEC 61000-4-7 by hand.
    rng = np.random.default_rng(7)
    amps = {h: (rng.uniform(0, 0.03), rng.uniform(0, 6.28)) for h in range(2, 31)}
    n = 1536 * 3
    phase = phase_of(FS, n, 50.0)
    x = wave(phase, 325.0, amps)
    seg = x[1536:3072]
    res = scipy.signal.resample(seg, 2048)
    mag = np.abs(np.fft.rfft(res))
    sub = np.sqrt(mag[9::10][:40] ** 2 + mag[10::10][:40] ** 2 + mag[11::10][:40] ** 2)
    oracle = np.sqrt(np.sum(sub[1:40] ** 2)) / sub[0]
    ours = window_thd(x, [1536.0], [3072.0], [10], FS, 50.0)[0, 0]
    analytic = np.sqrt(sum(a * a for a, _ in amps.values()))
    assert ours == pytest.approx(oracle, rel=2e-4)
    assert oracle == pytest.approx(analytic, rel=1e-6)


def test_max_harmonic_order_limited_by_sample_rate() -> None:
    # h * f1 must stay below 0.45 fs (common practice), capped at 40 (EN 50160 / IEC 61000-4-7).
    assert max_harmonic_order(7680, 50) == 40
    assert max_harmonic_order(3200, 50) == 28        # 28*50 = 1400 < 1440 <= 29*50
    assert max_harmonic_order(2000, 60) == 14        # 14*60 = 840 < 900


def test_thd_label_says_which_orders_it_covers() -> None:
    # Issue 7 item 11: THD to the 40th is plain "THD" (EN 50160 limit up to h40, pub); a THD
    # capped by the sample rate names its orders.
    assert thd_label(40) == "THD" and thd_label(None) == "THD"
    assert thd_label(max_harmonic_order(3200, 50)) == "THD (h2–h28)"
    assert thd_label(max_harmonic_order(3840, 50)) == "THD (h2–h34)"
    assert "no harmonic" in thd_label(0)
    fs = 2000.0
    engine = make_engine(fs, 120, 60, 1, 0.01)
    assert engine.thd_max_order == max_harmonic_order(fs, 60) == 14


def test_split_phase_and_three_phase_imbalance() -> None:
    assert split_phase_imbalance(121.0, 118.0, 120.0) == pytest.approx(0.025)  # |V1-V2|/Vnom
    a = np.exp(2j * np.pi / 3)
    pos, neg = 230.0, 4.6
    v = np.array([pos + neg, pos * a**2 + neg * a, pos * a + neg * a**2])  # Fortescue synthesis
    assert negative_sequence_ratio(v) == pytest.approx(neg / pos, rel=1e-12)  # IEC 61000-4-30 5.7.1
    # IEC 61000-4-30 Ed.3 cl. 5.7.2 magnitude formula agrees with the phasor definition.
    uab, ubc, uca = abs(v[0] - v[1]), abs(v[1] - v[2]), abs(v[2] - v[0])
    assert u2_from_line_magnitudes(uab, ubc, uca) == pytest.approx(neg / pos, rel=1e-9)


def test_frequency_from_whole_cycles() -> None:
    # IEC 61000-4-30 Ed.3 cl. 5.1: whole cycles / their cumulative duration (from memory).
    t = np.arange(0, 1001) / 100.4       # half-cycle crossings of 50.2 Hz [s]
    assert frequency_from_crossings(t) == pytest.approx(50.2, rel=1e-12)
    syn = np.zeros(t.shape, bool)
    syn[500] = True
    n, d = whole_cycles(t, syn)
    assert n == 500 - 2  # the two cycles touching crossing 500 are skipped
    assert d == pytest.approx(n / 50.2)
    broken = np.concatenate([t[:11], [np.nan], t[11:21]])
    assert whole_cycles(broken)[0] == 5 + 4


def test_rms_aggregate_and_clock_period() -> None:
    v = np.array([[230.0, 1.0], [240.0, np.nan]])
    np.testing.assert_allclose(rms_aggregate(v), [np.sqrt((230**2 + 240**2) / 2), 1.0])  # cl. 4.5
    assert clock_period(1199.99, 600) == 1 and clock_period(1200.0, 600) == 2


def test_counts_to_volts_and_blockwise_dc() -> None:
    v = counts_to_volts(np.array([[100, -100]]), [0.01, 0.02], [1.0, 0.5])
    np.testing.assert_allclose(v, [[1.0, -1.0]])                # counts * V/count * gain
    x = np.sin(np.arange(300) * 2 * np.pi / 100) + 3.0
    np.testing.assert_allclose(remove_dc_blockwise(x, 100).mean(), 0.0, atol=1e-12)


def test_boxcar_nulls_harmonics_and_streams() -> None:
    # A boxcar of L samples nulls every multiple of fs/L (standard DSP result).
    fs, length = 7200.0, 48                                     # nulls at 150 Hz multiples
    assert boxcar_gain((length,), 150.0, fs) == pytest.approx(0.0, abs=1e-12)
    x = np.random.default_rng(0).normal(size=(1000, 2))
    whole, _ = boxcar(x, length)
    a, tail = boxcar(x[:333], length)
    b, _ = boxcar(x[333:], length, tail)
    np.testing.assert_allclose(np.concatenate([a, b]), whole, atol=1e-12)
    np.testing.assert_allclose(whole[100], x[53:101].mean(axis=0), atol=1e-12)  # numpy oracle


def test_grouped_dc_estimate_is_median_of_earlier_windows() -> None:
    means = np.array([[1.0], [2.0], [30.0], [4.0], [5.0], [6.0], [7.0]])
    # numpy oracle: windows 0-1 get 0; windows 2-3 the median of windows 0-1; windows 4-5 the
    # median of windows 1-3 (history 3), where the transient 30 does not dominate.
    dc = grouped_dc_estimate(means, 0, group=2, history=3)
    np.testing.assert_allclose(dc[:, 0], [0, 0, 1.5, 1.5, 4.0, 4.0, 5.0])
    part = grouped_dc_estimate(means[3:], 3, group=2, history=3)   # history not supplied
    assert np.isnan(part[0, 0]) and np.isnan(part[1, 0])


def test_segment_integrals_match_fine_grid_trapezoid() -> None:
    # numpy oracle: trapezoid on a 2000x finer grid of the piecewise-linear interpolant.
    rng = np.random.default_rng(2)
    v = rng.normal(size=(60, 2))
    t = np.array([0.3, 7.9, 8.2, 21.5, 40.0, 57.75])
    ours = segment_integrals(v, t)
    for j in range(t.shape[0] - 1):
        grid = np.linspace(t[j], t[j + 1], 200001)
        for c in range(2):
            ref = np.trapezoid(np.interp(grid, np.arange(60), v[:, c]), grid)
            assert ours[j, c] == pytest.approx(ref, abs=1e-6)


def test_clipping_needs_two_samples_at_a_rail_even_across_blocks() -> None:
    # Common practice: >= 2 consecutive samples at the converter rail = clipped.
    lo, hi = adc_rails(12)
    assert (lo, hi) == (-2048, 2047)                           # two's complement, 12 bit
    c = np.zeros((300, 1), np.int16)
    c[50, 0] = hi                                              # a single rail sample: not clipping
    c[99:101, 0] = lo                                          # two samples across a block edge
    np.testing.assert_array_equal(np.flatnonzero(clipped_mask(c, lo, hi)), [99, 100])
    mon = QualityMonitor(1, 12, 40, np.array([1000.0]))
    flags = mon.update(c[:100], 0) + mon.update(c[100:], 100) + mon.finish()
    clip = [f for f in flags if f.kind == "clipping"]
    assert len(clip) == 1 and clip[0].start == 99 and clip[0].end == 101
    assert clip[0].detail["samples"] == 2


def test_flat_chunks_constant_and_dead_channel() -> None:
    rng = np.random.default_rng(5)
    live = np.round(1000 * np.sin(np.arange(400) * 2 * np.pi / 40)).astype(np.int16)
    dead = rng.integers(-3, 4, 400).astype(np.int16)           # noise only, a lost sensor
    stuck = np.full(400, 17, np.int16)
    flat, constant = flat_chunks(np.stack([live, dead, stuck], axis=1), 40, [1000.0] * 3)
    assert not flat[:, 0].any() and flat[:, 1].all() and flat[:, 2].all()
    assert constant[:, 2].all() and not constant[:, 1].any()


def _flags_row_by_row(u: np.ndarray, th: Thresholds) -> list[bool]:
    """The dip and swell rules written as a plain loop (IEC 61000-4-30 Ed.3 cl. 5.4: start on
    any channel past the threshold, end when all are back past threshold + hysteresis)."""
    in_dip = in_swell = False
    out = []
    for row in u:
        if in_dip and all(v >= th.dip + th.hysteresis for v in row):
            in_dip = False
        if not in_dip and any(v < th.dip for v in row):
            in_dip = True
        if in_swell and all(v <= th.swell - th.hysteresis for v in row):
            in_swell = False
        if not in_swell and any(v > th.swell for v in row):
            in_swell = True
        out.append(in_dip or in_swell)
    return out


@settings(max_examples=200, deadline=None)
@given(levels=st.lists(st.sampled_from([0.0, 0.5, 0.895, 0.905, 0.915, 0.925, 1.0, 1.075,
                                        1.085, 1.095, 1.105, 1.3]), min_size=1, max_size=60),
       channels=st.integers(1, 3), cut=st.integers(0, 60), seed=st.integers(0, 2**16))
def test_event_window_flags_follow_the_event_rules(levels: list[float], channels: int,
                                                   cut: int, seed: int) -> None:
    # Invented Urms(1/2) rows around the thresholds and inside the hysteresis bands; the
    # flags must equal the row-by-row rules and not depend on where the stream is split.
    rng = np.random.default_rng(seed)
    u = np.column_stack([levels] + [rng.choice(levels, size=len(levels))
                                    for _ in range(channels - 1)])
    th = Thresholds()
    nominal = 230.0
    args = (th.dip * nominal, (th.dip + th.hysteresis) * nominal, th.swell * nominal,
            (th.swell - th.hysteresis) * nominal)
    whole, *_ = event_window_flags(u * nominal, *args, False, False)
    assert whole.tolist() == _flags_row_by_row(u, th)
    cut = min(cut, len(levels))
    a, d, s = event_window_flags(u[:cut] * nominal, *args, False, False)
    b, *_ = event_window_flags(u[cut:] * nominal, *args, d, s)
    assert np.concatenate([a, b]).tolist() == whole.tolist()
