"""Per-channel Urms(1/2) windows: a phase jump on one phase leaves the others untouched.

IEC 61000-4-30 Ed.3 clause 5.4.2 (from memory for the clause number): Urms(1/2) is measured on
each channel over one cycle commencing at that channel's own fundamental zero crossing.
"""

from __future__ import annotations

import numpy as np
import pytest

from agent.acquisition.base import SourceInfo
from agent.acquisition.timebase import ReplayTimebase
from agent.events.detector import EventDetector
from agent.events.types import Thresholds
from agent.measurement.engine import MeasurementEngine
from agent.site import Site
from tests._measurement_helpers import Adc, phase_of, run, wave

FS = 7680.0
TRUE_V = 120.0


def _engine() -> MeasurementEngine:
    names = ("L1", "L2", "L3")
    info = SourceInfo(FS, names, np.full(3, 0.01), adc_bits=16)
    site = Site(nominal_v=120.0, nominal_hz=60.0, service_type="120/208", channel_names=names)
    return MeasurementEngine(info, site, Thresholds(), ReplayTimebase(FS, 0.0))


def _service(jump_deg: float, jumped: int, seconds: float = 3.0) -> np.ndarray:
    """120/208 V wye service (invented), 60 Hz, a phase jump on one phase at t = 1.237 s."""
    n = int(FS * seconds)
    base = phase_of(FS, n, 60.0, 0.4)
    cols = []
    for c, shift in enumerate((0.0, -2 * np.pi / 3, 2 * np.pi / 3)):
        ph = base + shift
        if c == jumped:
            ph = ph + np.where(np.arange(n) >= int(1.237 * FS), np.deg2rad(jump_deg), 0.0)
        cols.append(wave(ph, TRUE_V * np.sqrt(2)))
    return np.stack(cols, axis=1)


@pytest.mark.parametrize("jumped", [0, 1])
@pytest.mark.parametrize("jump_deg", [-30.0, -60.0, 90.0])
def test_phase_jump_on_one_phase_leaves_the_others_within_0p1_percent(
        jump_deg: float, jumped: int) -> None:
    # Issue floor: the untouched phases read within 0.1 % of their true value (IEC 61000-4-30
    # Ed.3 magnitude uncertainty ±0.1 % of Udin, tests/SOURCES.md, from memory) and stay out of
    # any event's channel list.
    counts = Adc(0.01, noise_counts=0.5)(_service(jump_deg, jumped))
    eng = _engine()
    r = run(eng, counts, 7680)
    settled = r.start > 0.2 * FS
    assert settled.sum() > 300
    others = [c for c in range(3) if c != jumped]
    err = np.abs(r.urms[settled][:, others] / TRUE_V - 1.0)
    assert err.max() < 1e-3, f"max error {err.max():.2e}"
    # The jumped phase itself is disturbed around the jump (the check can fail).
    near = settled & (np.abs(r.start - 1.237 * FS) < FS / 30)
    assert np.abs(r.urms[near, jumped] / TRUE_V - 1.0).max() > 1e-3
    det = EventDetector(120.0, 3, Thresholds(), ReplayTimebase(FS, 0.0), "120/208")
    from agent.measurement.types import HalfCycleRms
    ups = det.update(HalfCycleRms(r.start, r.end, r.urms, r.synthetic))
    ups += det.finish(float(r.end[-1]))
    for u in ups:
        assert set(u.event.channels) <= {jumped}, (u.event.kind, u.event.channels)


def test_block_split_invariance_with_a_phase_jump() -> None:
    # Common practice: a streaming result must not depend on the block size.
    counts = Adc(0.01, noise_counts=1.0)(_service(90.0, 0))
    res = [run(_engine(), counts, b) for b in (1, 333, 7680, 10**9)]
    ref = res[-1]
    for r in res[:-1]:
        np.testing.assert_allclose(r.start, ref.start, rtol=0, atol=1e-9)
        np.testing.assert_allclose(r.urms, ref.urms, rtol=0, atol=1e-9)
        np.testing.assert_array_equal(r.iv_flagged, ref.iv_flagged)
