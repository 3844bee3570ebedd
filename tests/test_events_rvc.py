"""Rapid voltage changes (agent.events.rvc) on invented Urms(1/2) sequences and waveforms.

Method: IEC 61000-4-30 Ed.3 RVC (clause 5.11, from memory; tests/SOURCES.md "More limits for
the verdicts"): 1-s sliding mean of Urms(1/2) (100/120 values), threshold and hysteresis
user-set, ΔUmax and ΔUss, never overlapping a dip or swell.
"""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from agent.acquisition.timebase import ReplayTimebase
from agent.events.classify import classify_event
from agent.events.rvc import RvcDetector, RvcSettings, steady_windows
from agent.events.types import EventUpdate, Thresholds
from agent.measurement.types import HalfCycleRms

FS = 7680.0
HP = FS / 120.0          # half period at 60 Hz [samples]


def _half(u: np.ndarray, first_row: int = 0) -> HalfCycleRms:
    u = np.asarray(u, float).reshape(len(u), -1)
    start = (np.arange(u.shape[0]) + first_row) * HP
    return HalfCycleRms(start, start + 2 * HP, u, np.zeros(u.shape[0], bool))


def _run(u: np.ndarray, chunks: list[int] | None = None,
         settings: RvcSettings | None = None) -> list[EventUpdate]:
    u = np.asarray(u, float).reshape(len(u), -1)
    det = RvcDetector(120.0, 60.0, u.shape[1], Thresholds(), settings or RvcSettings(),
                      ReplayTimebase(FS, 0.0), id_factory=iter(map(str, range(99))).__next__)
    out: list[EventUpdate] = []
    cuts = [0, *np.cumsum(chunks or []).tolist(), len(u)]
    for a, b in itertools.pairwise(cuts):
        if b > a:
            out += det.update(_half(u[a:b], a))
    return out + det.finish()


def _step(before: float, after: float, at: int = 300, rows: int = 700,
          ramp: tuple[float, ...] = ()) -> np.ndarray:
    u = np.full(rows, before)
    u[at:at + len(ramp)] = ramp
    u[at + len(ramp):] = after
    return u


def test_step_of_4_percent_is_one_rvc_with_analytic_deltas() -> None:
    # A 4 % step (4.8 V at 120 V) with one transitional value (2 %, below the threshold): it
    # starts at the first value beyond 3 % and ends where the new steady second begins, one
    # value later at the earliest. The mean before it holds the transitional value:
    # (119 × 120 + 122.4) / 120 = 120.02 V, so ΔUss = ΔUmax = 124.8 - 120.02 = 4.78 V (analytic).
    ups = _run(_step(120.0, 124.8, ramp=(122.4,)))
    assert [u.change for u in ups] == ["started", "ended"]
    ev = ups[0].event
    assert ev.kind == "rvc" and ev.channels == (0,)
    assert ev.start == pytest.approx(301 * HP) and ev.end == pytest.approx(302 * HP)
    assert ev.delta_uss_v == pytest.approx(4.78) and ev.delta_umax_v == pytest.approx(4.78)
    c = classify_event(ev, 60.0)
    assert c["rvc"]["delta_uss_pu"] == pytest.approx(4.78 / 120)
    assert c["en50160_rvc"]["within_5pct"] is True


def test_overshoot_sets_delta_umax_above_delta_uss() -> None:
    # Capacitor switching (invented): overshoot to 126 V for 2 values, then 125 V, settles at
    # 123.6 V. The new steady second may hold the 125 V value (1.39 V from its mean, inside
    # the 1.8 V band of threshold minus hysteresis), so it begins at row 302; ΔUss is its
    # mean minus 120 V = 3.6 + 1.4/120 V (analytic).
    u = _step(120.0, 123.6, ramp=(126.0, 126.0, 125.0))
    ev = _run(u)[0].event
    assert ev.delta_umax_v == pytest.approx(6.0)
    assert ev.delta_uss_v == pytest.approx(3.6 + 1.4 / 120)
    assert ev.start == pytest.approx(300 * HP) and ev.end == pytest.approx(302 * HP)


def test_change_below_threshold_is_no_rvc() -> None:
    # 2.5 % < 3 % default threshold.
    assert _run(_step(120.0, 123.0)) == []


def test_dip_is_not_an_rvc_and_detection_restarts_after_it() -> None:
    # A dip to 80 % (below the 90 % dip threshold) is the dip detector's, not an RVC; a
    # genuine 4 % step well after it (new steady state first) is found.
    u = np.full(1200, 120.0)
    u[300:310] = 96.0
    u[700:] = 124.8
    ups = _run(u)
    assert len(ups) == 2 and ups[0].event.start == pytest.approx(700 * HP)


def test_rvc_that_runs_into_a_swell_is_discarded() -> None:
    # Starts as a 4 % step, then crosses the 110 % swell threshold before settling.
    u = _step(120.0, 124.8)
    u[310:330] = 133.0
    assert _run(u) == []


def test_no_steady_state_yet_means_no_rvc() -> None:
    # Values change before the first second of steady values: nothing to compare with.
    u = _step(120.0, 124.8, at=50)
    assert _run(u) == []


def test_polyphase_any_channel_starts_and_involves_only_the_changed_one() -> None:
    u = np.stack([_step(120.0, 124.8), np.full(700, 119.0), np.full(700, 121.0)], axis=1)
    ups = _run(u)
    assert len(ups) == 2 and ups[0].event.channels == (0,)


@pytest.mark.parametrize("chunks", [[1] * 700, [7, 113, 250, 330], [120] * 6])
def test_block_split_gives_the_same_rvcs(chunks: list[int]) -> None:
    # Common practice: a streaming result must not depend on the block size.
    u = _step(120.0, 123.6, ramp=(126.0, 126.0, 125.0))
    u = np.concatenate([u, _step(123.6, 119.0, at=200, rows=500)])
    ref, got = _run(u), _run(u, chunks)
    assert len(ref) == 4 and len(got) == 4
    for a, b in zip(ref, got, strict=True):
        assert (a.change, a.event.start, a.event.end) == (b.change, b.event.start, b.event.end)
        assert a.event.delta_umax_v == pytest.approx(b.event.delta_umax_v, abs=1e-9)
        assert a.event.delta_uss_v == pytest.approx(b.event.delta_uss_v, abs=1e-9)


def test_threshold_and_hysteresis_are_configurable_and_checked() -> None:
    assert _run(_step(120.0, 123.0), settings=RvcSettings(0.02, 0.01)) != []
    with pytest.raises(ValueError, match="hysteresis"):
        RvcSettings(0.03, 0.03)
    with pytest.raises(ValueError, match="threshold"):
        RvcSettings(0.2, 0.01)


def test_steady_windows_against_a_plain_loop() -> None:
    # Independent oracle: a plain Python loop over the windows (common practice).
    rng = np.random.default_rng(4)
    u = 120 + rng.normal(0, 1.0, (300, 2))
    ok, mean = steady_windows(u, 120, 2.5)
    for k in range(0, 181, 9):
        w = u[k:k + 120]
        assert mean[k] == pytest.approx(w.mean(axis=0))
        assert ok[k] == bool((np.abs(w - w.mean(axis=0)) <= 2.5).all())


def test_waveform_step_through_the_pipeline_gives_one_rvc_and_a_dip_gives_none() -> None:
    # Invented 120 V / 60 Hz service: a 4 % step up at 2.0 s (PV ramp, invented) and a dip
    # to 70 % at 5.0 s. ΔUss is the step, 4.8 V, within the ±0.2 % Udin dip/swell residual
    # uncertainty of IEC 61000-4-30 Ed.3 (tests/SOURCES.md, from memory): the RVC measures
    # the same Urms(1/2).
    from agent.acquisition.base import Block, SourceInfo
    from agent.pipeline import Frame, edge_stages, push
    from agent.report.analysis import AnalysisCollector
    from agent.site import Site
    from tests._measurement_helpers import Adc, phase_of, wave

    n = int(FS * 7)
    env = np.ones(n)
    env[int(2.0 * FS):] = 1.04
    env[int(5.0 * FS):int(5.2 * FS)] = 0.7
    x = wave(phase_of(FS, n, 60.0, 0.3), 120 * np.sqrt(2)) * env
    counts = Adc(0.01, noise_counts=1.0)(x[:, None])
    info = SourceInfo(FS, ("L1",), np.array([0.01]), adc_bits=16)
    site = Site(nominal_v=120.0, nominal_hz=60.0, service_type="1ph", channel_names=("L1",))
    sink = AnalysisCollector(rate=FS)
    stages, parts = edge_stages(info, site, ReplayTimebase(FS, 0.0), sinks=[sink])
    assert parts.rvc is not None
    for s in range(0, n, 7680):
        push(stages, Frame(Block(s, counts[s:s + 7680])))
    push(stages, Frame(None))
    kinds = [e.kind for e in sink.events]
    assert kinds.count("rvc") == 1 and kinds.count("dip") == 1
    rvc = next(e for e in sink.events if e.kind == "rvc")
    assert abs(rvc.start_utc - 2.0) < 1 / 60
    assert rvc.delta_uss_v == pytest.approx(4.8, abs=0.002 * 120)
    assert rvc.classification is not None and "rvc" in rvc.classification


def test_rvc_event_on_the_wire_validates_and_round_trips() -> None:
    # Independent check: the general jsonschema validator agrees with ours on the v2 schema.
    import json

    import jsonschema

    from agent.wire.codec import decode, encode, event_body, event_from_message
    from agent.wire.validate import schemas_dir

    ev = _run(_step(120.0, 124.8, ramp=(122.4,)))[1].event
    classify_event(ev, 60.0)
    ident = {"device": "d1", "site": "s1", "epoch": "e1", "seq": 5}
    for change in ("started", "ended"):
        body = event_body(ev, change) | ident
        schema = json.loads((schemas_dir() / "event.schema.json").read_text())
        jsonschema.Draft202012Validator(schema).validate(body)
        back = event_from_message(decode(encode(body))).event
        assert back.kind == "rvc" and body["v"] == 2
        assert back.delta_umax_v == pytest.approx(ev.delta_umax_v)
        assert back.delta_uss_v == pytest.approx(ev.delta_uss_v)
        assert back.rvc_threshold == 0.03
