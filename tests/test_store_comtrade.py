"""COMTRADE export checked with the independent ``comtrade`` package (PyPI) as the reader."""

from __future__ import annotations

import datetime as dt
from pathlib import Path

import comtrade
import numpy as np
import pytest

from agent.events.types import Capture
from agent.store.comtrade import cfg_text, write_comtrade
from agent.store.recorder import RecorderStore
from agent.wire import codec

FS = 7680.0
TRIGGER_UTC = 1_764_547_200.123456  # 2025-12-01 00:00:00.123456 UTC (invented capture)


def _capture(n: int = 1536, trigger_row: int = 384) -> Capture:
    t = np.arange(n) / FS
    # 230 V RMS, 50 Hz: peak 230*sqrt(2) = 325.3 V (RMS of a sine = peak/sqrt(2)).
    scale = np.array([0.0125, 0.0126])
    volts = np.stack([230 * np.sqrt(2) * np.sin(2 * np.pi * 50 * t),
                      230 * np.sqrt(2) * np.sin(2 * np.pi * 50 * t - 2 * np.pi / 3)], axis=1)
    counts = np.rint(volts / scale).astype(np.int16)
    # negative rail: written as -32767 (0x8000 means missing: from memory, tests/SOURCES.md)
    counts[10, 0] = -32768
    counts[11, 1] = 32767
    return Capture(capture_id="cap-1", event_id="ev-1", trigger="start", first_index=100_000,
                   trigger_index=100_000 + trigger_row, trigger_utc=TRIGGER_UTC, sample_rate=FS,
                   channel_names=("L1", "L2"), scale=scale, counts=counts, pre_cycles=10,
                   post_cycles=30)


@pytest.mark.parametrize("rev_year", [1999, 2013])
def test_comtrade_reader_sees_our_values(tmp_path: Path, rev_year: int) -> None:
    cap = _capture()
    cfg, dat = write_comtrade(cap, tmp_path, station="site-1", rec_dev_id="dev-1",
                              line_hz=50.0, rev_year=rev_year)
    rec = comtrade.Comtrade()
    rec.load(str(cfg), str(dat))
    # Header, channel list, rates: IEEE C37.111-1999 cl. 6 (configuration file).
    assert rec.station_name == "site-1" and rec.rec_dev_id == "dev-1"
    assert str(rec.rev_year) == str(rev_year)
    assert rec.analog_count == 2 and rec.status_count == 0
    assert rec.analog_channel_ids == ["L1", "L2"]
    assert rec.frequency == 50.0
    assert rec.cfg.sample_rates == [[FS, 1536]]
    assert rec.cfg.ft == "BINARY"
    assert rec.total_samples == 1536
    # Values: a·x + b with a = V/count, b = 0 (C37.111 analog channel line). The reader keeps
    # float32 arrays, so the tolerance is float32 epsilon (numpy.finfo(float32).eps).
    expected = cap.counts.astype(np.float64) * cap.scale
    expected[10, 0] = -32767 * cap.scale[0]
    for i in range(2):
        np.testing.assert_allclose(np.asarray(rec.analog[i]), expected[:, i],
                                   rtol=float(np.finfo(np.float32).eps))
    # Times: trigger from the cfg; first sample = trigger - 384 samples at 7680 S/s (50 ms).
    trig = dt.datetime(2025, 12, 1, 0, 0, 0, 123456)
    assert rec.trigger_timestamp == trig
    assert rec.start_timestamp == trig - dt.timedelta(microseconds=50_000)
    assert rec.trigger_time == pytest.approx(384 / FS, abs=1e-6)
    np.testing.assert_allclose(np.asarray(rec.time), np.arange(1536) / FS, atol=1e-6)
    # Cross-check the record layout by hand (C37.111 binary data file: uint32 n, uint32 t,
    # int16 per channel; little-endian from memory).
    raw = np.frombuffer(dat.read_bytes(), dtype=[("n", "<u4"), ("t", "<u4"), ("x", "<i2", 2)])
    assert raw["n"][0] == 1 and raw["n"][-1] == 1536
    assert raw["t"][1] == round(1e6 / FS)


def test_cfg_rejects_bad_input() -> None:
    cap = _capture()
    with pytest.raises(ValueError, match="rev_year"):
        cfg_text(cap, station="s", rec_dev_id="d", line_hz=50.0, rev_year=1991)
    with pytest.raises(ValueError, match="line frequency"):
        cfg_text(cap, station="s", rec_dev_id="d", line_hz=0.0)
    cap.scale = np.array([0.01])
    with pytest.raises(ValueError, match="one entry per channel"):
        cfg_text(cap, station="s", rec_dev_id="d", line_hz=50.0)


def test_stored_capture_exports(tmp_path: Path) -> None:
    """Codec chunks → store (real SQLite file) → COMTRADE → independent reader."""
    from agent.store.comtrade import export_capture

    cap = _capture()
    ident = codec.Identity(site="site-1", device="dev-1", epoch="e1")
    bodies = codec.capture_bodies(cap, topic="hc/v1/site-1/dev-1/capture", max_packet=4096)
    assert len(bodies) > 1
    msgs = [codec.decode(codec.encode(ident.stamp(b, seq))) for seq, b in
            enumerate(bodies, start=1)]
    with RecorderStore(f"sqlite:///{tmp_path / 'r.db'}", tmp_path / "caps") as store:
        store.commit_batch(list(reversed(msgs)))
        with pytest.raises(ValueError, match="line_hz"):
            export_capture(store, "cap-1", tmp_path / "out")
        store.update_device_model("dev-1", "site-1", {"nominal_hz": 50.0})
        cfg, dat = export_capture(store, "cap-1", tmp_path / "out")
    rec = comtrade.Comtrade()
    rec.load(str(cfg), str(dat))
    assert rec.station_name == "site-1" and rec.frequency == 50.0
    np.testing.assert_allclose(np.asarray(rec.analog[1]),
                               cap.counts[:, 1].astype(np.float64) * cap.scale[1],
                               rtol=float(np.finfo(np.float32).eps))
