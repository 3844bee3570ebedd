"""Individual harmonics h2..h40 aggregated to 10 min per channel (IEC 61000-4-7 subgroups,
IEC 61000-4-30 Ed.3 cl. 4.5 aggregation) on invented signals with known content."""

from __future__ import annotations

import numpy as np
import pytest

from agent.measurement.harmonics import harmonic_ratios
from tests._measurement_helpers import Adc, make_engine, phase_of, run, wave

FS = 7680.0


def test_harmonic_ratios_against_numpy_fft() -> None:
    # Independent oracle: numpy's FFT of a 10-cycle window with exact bins.
    n = 1536                                   # 10 cycles of 50 Hz at 7680 S/s
    ph = 2 * np.pi * 50 * np.arange(n) / FS
    x = 325 * (np.sin(ph) + 0.05 * np.sin(5 * ph + 0.3) + 0.02 * np.sin(11 * ph))
    spec = np.abs(np.fft.rfft(x)) * 2 / n
    # Subgroup h: the bin 10 h and its two neighbours (IEC 61000-4-7 Ed.2 cl. 5.6).
    ysg = np.sqrt(np.array([(spec[10 * h - 1:10 * h + 2] ** 2).sum() for h in range(1, 41)]))
    r = harmonic_ratios(ysg)
    assert r.shape == (39,)
    assert r[3] == pytest.approx(0.05, rel=1e-9) and r[9] == pytest.approx(0.02, rel=1e-9)
    assert np.all(np.delete(r, [3, 9]) < 1e-9)
    assert np.isnan(harmonic_ratios(np.zeros(40))).all()


@pytest.mark.parametrize(("nominal_v", "hz", "channels"), [(230.0, 50.0, 1), (120.0, 60.0, 2)])
def test_ten_minute_harmonics_match_the_injected_content(nominal_v: float, hz: float,
                                                          channels: int) -> None:
    # Injected h3 4 %, h5 3 %, h7 1 %, h13 0.5 % (invented); IEC 61000-4-7 Class I accuracy
    # ±5 % of the reading for Uh >= 1 % of Unom, ±0.05 % of Unom below (from memory).
    n = int(FS * 20)
    harm = {3: (0.04, 0.2), 5: (0.03, 1.1), 7: (0.01, 0.0), 13: (0.005, 2.0)}
    x = wave(phase_of(FS, n, hz * 1.002, 0.4), nominal_v * np.sqrt(2), harm)
    volts = np.stack([x, -x], axis=1)[:, :channels]
    vpc = 0.02 if nominal_v > 200 else 0.01
    r = run(make_engine(FS, nominal_v, hz, channels, vpc), Adc(vpc, noise_counts=1.0)(volts),
            7680)
    (agg,) = r.aggs("10min")
    assert len(agg.harmonics) == channels
    for ch in agg.harmonics:
        h = np.array(ch)
        assert h.shape == (39,)                       # h2 .. h40
        for order, (amp, _) in harm.items():
            tol = 0.05 * amp if amp >= 0.01 else 0.0005
            assert abs(h[order - 2] - amp) <= tol, (order, h[order - 2])
        others = np.delete(h, [o - 2 for o in harm])
        assert np.all(others < 0.0005)
    assert all(a.harmonics == () for a in r.aggs("3s"))
