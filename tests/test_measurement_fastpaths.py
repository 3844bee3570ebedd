"""The vectorised fast paths of the measurement engine against brute-force or external oracles.

All signals are invented test data."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
import scipy.signal

from agent.acquisition.base import Block
from agent.measurement.conditioning import BoxcarCascade, IntegerBoxcarCascade
from agent.measurement.engine import _median_of_rows
from agent.measurement.harmonics import (
    catmull_rom_rows,
    harmonic_subgroups,
    thd_from_subgroups,
    window_spectra,
    window_subgroups,
)
from agent.measurement.quality import chunk_ptp
from agent.measurement.zerocross import hysteresis_crossings
from tests._measurement_helpers import make_engine, phase_of, wave

FS = 7680.0
LENGTHS = (43, 26, 18)             # T/3, T/5, T/7 at 60 Hz and 7680 S/s


def _box_kernel(lengths: tuple[int, ...]) -> np.ndarray:
    k = np.ones(1, np.int64)
    for length in lengths:
        k = np.convolve(k, np.ones(length, np.int64))
    return k


def test_integer_cascade_is_exact_convolution_in_any_split() -> None:
    # numpy oracle: np.convolve of the counts with the cascaded boxcar kernel, exact integers.
    rng = np.random.default_rng(11)
    x = rng.integers(-32768, 32768, size=(5000, 2)).astype(np.int16)
    k = _box_kernel(LENGTHS)
    ref = np.stack([np.convolve(x[:, c].astype(np.int64), k)[:5000] for c in range(2)], axis=1)
    casc = IntegerBoxcarCascade(LENGTHS, 2)
    cuts = [0, 1, 17, 700, 701, 5000]
    got = np.concatenate([casc.process(x[a:b]) for a, b in itertools.pairwise(cuts)])
    np.testing.assert_array_equal(got, ref)
    # The float cascade agrees to its rounding (moving averages = sums / prod(lengths)).
    avg = BoxcarCascade(LENGTHS, 2).process(x.astype(np.float64))
    np.testing.assert_allclose(avg, ref * casc.norm, rtol=0, atol=1e-9)


def test_integer_cascade_from_running_sums_survives_int64_wraparound() -> None:
    # numpy oracle as above; the running sums start just below 2**63 and wrap around, which
    # two's-complement differences absorb exactly (common practice for CIC integrators).
    rng = np.random.default_rng(12)
    x = rng.integers(-32768, 32768, size=(3000, 2)).astype(np.int64)
    k = _box_kernel(LENGTHS)
    ref = np.stack([np.convolve(x[:, c], k)[:3000] for c in range(2)], axis=1)
    base = np.full((1, 2), np.iinfo(np.int64).max - 10**6, np.int64)
    with np.errstate(over="ignore"):
        sums = np.cumsum(np.concatenate([base, x]), axis=0)   # wraps past 2**63 - 1
    assert (sums[1:] < sums[:-1]).any()                         # it did wrap
    casc = IntegerBoxcarCascade(LENGTHS, 2)
    got = np.concatenate([casc.process_running_sums(sums[:1001]),
                          casc.process_running_sums(sums[1000:])])
    np.testing.assert_array_equal(got, ref)


def _crossings_by_definition(y: np.ndarray, band: float, state0: int) -> tuple[list[float], int,
                                                                               int]:
    """Per-sample reference: an exit is the first sample beyond the band on the side opposite
    the last out-of-band sample; its crossing is the last raw sign change before it,
    linearly interpolated (the sample before the exit if there is none)."""
    state, last_out, t = state0, -1, []
    for i, v in enumerate(y):
        side = 1 if v > band else (-1 if v < -band else 0)
        if side == 0:
            continue
        if state != 0 and side != state:
            k = next((j for j in range(i - 1, -1, -1) if (y[j] > 0) != (y[j + 1] > 0)), None)
            kk = max(i - 1, 0) if k is None else k
            y0, y1 = float(y[kk]), float(y[min(kk + 1, len(y) - 1)])
            r = y0 / (y0 - y1) if y0 != y1 else y0
            t.append(kk + min(max(r, 0.0), 1.0))
        state, last_out = side, i
    return t, last_out, state


@pytest.mark.parametrize("kind", ["int", "float"])
def test_hysteresis_crossings_match_per_sample_definition(kind: str) -> None:
    # Brute-force oracle: the definition in the docstring, one sample at a time (common
    # practice for validating a vectorised state machine).
    rng = np.random.default_rng(13)
    for trial in range(400):
        n = int(rng.integers(1, 120))
        if trial % 3 == 0:
            y = np.round(40 * np.sin(np.arange(n) * rng.uniform(0.05, 0.6))
                         + rng.normal(0, 6, n))
        elif trial % 3 == 1:
            y = rng.integers(-12, 13, n).astype(np.float64)
        else:                                     # long in-band stretches, exits without
            y = np.repeat(rng.integers(-2, 3, n // 6 + 1) * 7.0, 6)[:n]  # a sign change
        arr = y.astype(np.int64) if kind == "int" else y + rng.uniform(-0.3, 0.3, n)
        band = float(rng.choice([0.0, 3.0, 6.5, 7.0]))
        state0 = int(rng.choice([-1, 0, 1]))
        t, last_out, state = hysteresis_crossings(arr, band, state0)
        ref_t, ref_last, ref_state = _crossings_by_definition(arr, band, state0)
        np.testing.assert_allclose(t, ref_t, rtol=0, atol=1e-12)
        assert (last_out, state) == (ref_last, ref_state)


def test_catmull_rom_reproduces_quadratics() -> None:
    # Keys (1981), cubic convolution with a = -1/2 (= Catmull-Rom) reproduces polynomials of
    # degree <= 2 exactly (from memory); float64 rows, so only rounding remains.
    n = np.arange(60.0)
    rows = np.stack([0.3 * n**2 - 2.0 * n + 5.0, 1.5 * n - 7.0])
    pos = np.linspace(1.0, 56.9, 500).reshape(5, 100)
    out = catmull_rom_rows(rows, pos)
    np.testing.assert_allclose(out[0], 0.3 * pos**2 - 2.0 * pos + 5.0, rtol=0, atol=1e-9)
    np.testing.assert_allclose(out[1], 1.5 * pos - 7.0, rtol=0, atol=1e-9)


def test_window_subgroups_thd_against_scipy_and_analytic() -> None:
    # Oracle: scipy.signal.resample (FFT method) of an exact 12-cycle window (1536 samples at
    # 60 Hz, 7680 S/s) to 2048 points, numpy rfft, IEC 61000-4-7 subgroups by hand; and the
    # analytic THD = sqrt(sum a_h^2).
    rng = np.random.default_rng(14)
    amps = {h: (rng.uniform(0, 0.03), rng.uniform(0, 6.28)) for h in range(2, 31)}
    x = wave(phase_of(FS, 1536 * 3, 60.0), 170.0, amps)
    rows = np.stack([x, -0.5 * x]).astype(np.float32)
    ysg, fund = window_subgroups(rows, np.array([1536.0]), np.array([3072.0]), [12], 40, 2048)
    thd = thd_from_subgroups(ysg)                               # (channels, windows)
    mag = np.abs(np.fft.rfft(scipy.signal.resample(x[1536:3072], 2048)))
    sub = np.sqrt(mag[11::12][:40] ** 2 + mag[12::12][:40] ** 2 + mag[13::12][:40] ** 2)
    oracle = np.sqrt(np.sum(sub[1:40] ** 2)) / sub[0]
    analytic = np.sqrt(sum(a * a for a, _ in amps.values()))
    np.testing.assert_allclose(thd[:, 0], oracle, rtol=2e-4)
    np.testing.assert_allclose(thd[:, 0], analytic, rtol=2e-4)
    np.testing.assert_allclose(np.abs(fund[:, 0]), [170.0, 85.0], rtol=1e-3)  # peak amplitude
    # The same numbers as the spectra-then-subgroups route (refactoring check).
    spec = window_spectra(rows.T.astype(np.float64), np.array([1536.0]), np.array([3072.0]),
                          2048, np.float32)
    np.testing.assert_array_equal(
        ysg.transpose(1, 0, 2), harmonic_subgroups(spec, [12], 40, np.array([1536.0])))


def test_median_of_rows_and_chunk_ptp_match_numpy() -> None:
    # numpy oracles: np.median along axis 0, np.ptp per chunk.
    rng = np.random.default_rng(15)
    for k in range(1, 50):
        a = rng.normal(size=(k, 3))
        np.testing.assert_array_equal(_median_of_rows(a), np.median(a, axis=0))
    c = rng.integers(-32768, 32768, size=(1000, 2)).astype(np.int16)
    ref = np.ptp(c[:896].astype(np.int64).reshape(7, 128, 2), axis=1)
    np.testing.assert_array_equal(chunk_ptp(c, 128), ref)


def test_engine_results_unchanged_when_running_sums_wrap_around() -> None:
    # The RMS integrals are differences of int64 running sums; two's-complement wrap-around
    # (after about two weeks of full-scale signal) must not change them (common practice).
    n = int(FS * 3)
    x = wave(phase_of(FS, n, 60.0, 0.4), 170.0, {3: (0.04, 0.2)})
    counts = np.round(np.stack([x, -0.97 * x], axis=1) / 0.01).astype(np.int16)
    plain, shifted = make_engine(FS, 120, 60, 2, 0.01), make_engine(FS, 120, 60, 2, 0.01)
    outs: dict[str, list[np.ndarray]] = {"plain": [], "shifted": []}
    for s in range(0, n, 7680):
        block = Block(s, counts[s:s + 7680])
        if s == 7680:   # move both sums' origin to just below 2**63: the next rows wrap
            offset = np.iinfo(np.int64).max - int(shifted._p[:, -1].max()) - 1000
            with np.errstate(over="ignore"):
                shifted._p += offset
                shifted._cx_p += offset
                for own in shifted._oc_p:      # each channel's own crossing chain
                    own += offset
            shifted._casc._sums_tail = None if shifted._casc._sums_tail is None else (
                shifted._casc._sums_tail + offset)
        for name, eng in (("plain", plain), ("shifted", shifted)):
            o = eng.process(block)
            outs[name] += [o.half_cycles.urms, o.intervals.rms, o.intervals.thd]
    assert (shifted._p[0, 1:] < shifted._p[0, :-1]).any() or (
        shifted._p[1, 1:] < shifted._p[1, :-1]).any()            # it did wrap
    for a, b in zip(outs["plain"], outs["shifted"], strict=True):
        np.testing.assert_array_equal(a, b)
    assert sum(a.shape[0] for a in outs["plain"][0::3]) > 300      # Urms(1/2) values compared
