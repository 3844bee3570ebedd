"""``halfcycle calibrate``: a known ADC gain error is found and then corrected."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from agent.acquisition.calibration import CalibrationRecord
from agent.acquisition.open_source import open_source
from agent.acquisition.timebase import ReplayTimebase
from agent.cli.main import main
from agent.measurement.engine import MeasurementEngine
from agent.settings import load_edge_settings

SCENARIO = """
# INVENTED scenario for a calibration test.
[scenario]
name = "cal"
seed = 3
duration_s = 6.0
sample_rate = 7680.0
[mains]
nominal_v = 230.0
nominal_hz = 50.0
[[channels]]
name = "L1"
level_pu = 1.0
[adc]
bits = 16
full_scale_v = 500.0
gain_error = 0.006
inl_lsb = 1.0
noise_lsb = 0.7
"""

CONFIG = """
[site]
site = "lab"
device = "bench-1"
nominal_v = 230.0
nominal_hz = 50.0
service_type = "1ph"
channels = ["L1"]
[source]
kind = "sim"
scenario = "cal.toml"
[calibration]
file = "calibration.toml"
"""


def _setup(tmp_path: Path) -> Path:
    (tmp_path / "cal.toml").write_text(SCENARIO)
    cfg = tmp_path / "edge.toml"
    cfg.write_text(CONFIG)
    return cfg


def test_calibrate_finds_gain_error_and_fixes_the_reading(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = _setup(tmp_path)
    assert (
        main(
            [
                "calibrate",
                "--config",
                str(cfg),
                "--reference-volts",
                "230.0",
                "--uncertainty",
                "0.05",
                "--seconds",
                "4",
            ]
        )
        == 0
    )
    record = CalibrationRecord.load(tmp_path / "calibration.toml")
    # The invented ADC reads 0.6 % high, so the gain is 1 / 1.006 (analytic).
    assert record.channel_gains["L1"] == pytest.approx(1 / 1.006, abs=2e-4)
    assert record.reference_volts == 230.0 and record.reference_uncertainty_v == 0.05
    assert record.device == "bench-1"
    # With the gain loaded, 10-cycle values are within ±0.1 % of Udin of the true 230 V
    # (IEC 61000-4-30 Ed.3 Class A magnitude uncertainty, from memory: tests/SOURCES.md).
    settings = load_edge_settings(cfg)
    source = open_source(settings.source)
    engine = MeasurementEngine(
        source.info,
        settings.site,
        settings.thresholds,
        ReplayTimebase(source.info.sample_rate),
        settings.gains(),
    )
    rms = np.concatenate([engine.process(b).intervals.rms for b in source.blocks()])
    assert rms.size > 20
    assert np.all(np.abs(rms - 230.0) <= 0.001 * 230.0)


def test_calibrate_refuses_an_implausible_gain(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = _setup(tmp_path)
    assert (
        main(["calibrate", "--config", str(cfg), "--reference-volts", "100.0", "--seconds", "2"])
        == 2
    )
    assert "gain" in capsys.readouterr().err
    assert not (tmp_path / "calibration.toml").exists()


def test_config_error_names_file_and_key(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = _setup(tmp_path)
    cfg.write_text(CONFIG.replace('service_type = "1ph"', 'service_type = "2ph"'))
    assert main(["calibrate", "--config", str(cfg), "--reference-volts", "230"]) == 2
    err = capsys.readouterr().err
    assert str(cfg) in err and "site.service_type" in err
