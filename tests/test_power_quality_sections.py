"""Harmonics and flicker sections (agent.report.power_quality) for analyze and the report."""

from __future__ import annotations

import json
import math
import wave
from pathlib import Path

import numpy as np
import pytest

from agent.cli.main import main
from agent.measurement.types import Aggregate
from agent.report.power_quality import analysis_sections, device_sections
from agent.wire.codec import aggregate_body


def _agg(t: float, pst: float, plt: float | None = None, count: int = 3000,
         flagged: bool = False) -> Aggregate:
    h = [0.001] * 39
    h[1] = 0.03
    return Aggregate(kind="10min", t_utc=t, duration_s=600.0, rms=(120.0,), thd=(0.031,),
                     count=count, harmonics=(tuple(h),), pst=(pst,),
                     plt=None if plt is None else (plt,), flicker_flagged=flagged, lamp="120V")


def test_analysis_sections_keep_complete_intervals_and_2h_plt() -> None:
    aggs = [_agg(600.0 * k, 0.5, 0.5 if k == 11 else None) for k in range(12)]
    aggs.append(_agg(7200.0, 0.9, count=1200))                  # incomplete: left out
    out = analysis_sections(aggs)
    assert [e["t"] for e in out["flicker"]] == [600.0 * k for k in range(12)]
    assert out["flicker"][0] == {"t": 0.0, "pst": [0.5], "flagged": False}
    assert out["plt"] == [{"t": 7200.0, "plt": [0.5]}]


def test_device_sections_judge_each_channel() -> None:
    payloads = [aggregate_body(_agg(600.0 * k, 0.4, 0.45 if k % 12 == 11 else None), ["L1"])
                for k in range(24)]
    out = device_sections(payloads)
    (en, ieee) = out["harmonics"]["channels"]["L1"]
    assert en["rule"] == "en50160_harmonics" and en["passed"] is True
    assert en["verdict"] == "provisional"                       # a day, not a week
    assert ieee["rule"] == "ieee519_voltage" and ieee["passed"] is True
    fl = out["flicker"]["channels"]["L1"]
    assert fl["rule"] == "en50160_flicker" and fl["basis"]["plt_values"] == 2
    assert "indicative" not in out["flicker"]  # said once, at the top of the report
    # v1 payloads (no harmonics, no flicker): no data, not a failure.
    old = [{k: v for k, v in p.items() if k not in ("harmonics", "flicker")} for p in payloads]
    assert device_sections(old)["flicker"]["channels"]["L1"]["verdict"] == "no_data"


def test_analyze_json_gains_flicker(capsys: pytest.CaptureFixture[str], tmp_path: Path) -> None:
    # An invented 11-min WAV at 3840 S/s, 120 V / 60 Hz, with the Table 5 point 110 changes/min
    # at 0.844 % (120 V lamp, IEC 61000-4-15 Ed.2: Pst = 1.00 ± 5 %): one complete interval
    # from the file start, flagged (the meter settles in its first minute).
    fs, seconds = 3840, 660
    t = np.arange(fs * seconds) / fs
    sq = np.where(np.floor(t * 110 / 60.0) % 2 == 0, 1.0, -1.0)
    v = 120 * math.sqrt(2) * (1 + 0.5 * 0.00844 * sq) * np.sin(2 * np.pi * 60 * t)
    path = tmp_path / "flicker.wav"
    with wave.open(str(path), "wb") as w:
        w.setnchannels(1)
        w.setsampwidth(2)
        w.setframerate(fs)
        w.writeframes(np.round(v / 0.01).astype("<i2").tobytes())
    assert main(["analyze", str(path), "--volts-per-count", "0.01", "--nominal", "120",
                 "--frequency", "60", "--json"]) == 0
    res = json.loads(capsys.readouterr().out)
    assert len(res["flicker"]) == 1 and res["plt"] == []
    entry = res["flicker"][0]
    assert entry["t"] == 0.0 and entry["flagged"] is True
    assert entry["pst"][0] == pytest.approx(1.0, abs=0.05)


def test_fleet_report_device_sections_carry_harmonics_and_flicker(tmp_path: Path) -> None:
    # A real SQLite recorder store with a day of invented v2 10-min aggregates.
    from agent.report.fleet import fleet_report
    from agent.store.recorder import RecorderStore

    store = RecorderStore(f"sqlite:///{tmp_path / 'r.db'}", tmp_path / "captures")
    try:
        msgs = []
        for k in range(24):
            body = aggregate_body(_agg(1_700_000_400.0 + 600.0 * k, 0.4,
                                       0.45 if k % 12 == 11 else None), ["L1"])
            msgs.append(body | {"device": "home-1", "site": "street", "epoch": "e1",
                                "seq": k + 1})
        store.commit_batch(msgs)
        rep = fleet_report(store, now=1_700_020_000.0)
    finally:
        store.close()
    (dev,) = [d for d in rep["devices"] if d.get("device") == "home-1"]
    assert dev["harmonics"]["channels"]["L1"][0]["rule"] == "en50160_harmonics"
    assert dev["flicker"]["channels"]["L1"]["basis"]["plt_values"] == 2
    json.dumps(rep)                                    # JSON-ready
