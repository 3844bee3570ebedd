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
    assert record.reference_volts == {"L1": 230.0}
    assert record.reference_uncertainty_v == {"L1": 0.05}
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


SPLIT = """
# INVENTED scenario: a 120/240 V service whose legs differ by 0.75 % under load.
[scenario]
name = "split"
seed = 5
duration_s = 4.0
sample_rate = 7680.0
[mains]
nominal_v = 120.0
nominal_hz = 60.0
[[channels]]
name = "L1"
level_pu = 1.0
[[channels]]
name = "L2"
phase_deg = 180.0
level_pu = 0.9925
[adc]
bits = 16
full_scale_v = 300.0
gain_error = 0.006
noise_lsb = 0.7
"""


def _split(tmp_path: Path) -> Path:
    (tmp_path / "split.toml").write_text(SPLIT)
    cfg = tmp_path / "edge.toml"
    cfg.write_text(CONFIG.replace('nominal_v = 230.0', 'nominal_v = 120.0')
                   .replace('nominal_hz = 50.0', 'nominal_hz = 60.0')
                   .replace('"1ph"', '"120/240"').replace('["L1"]', '["L1", "L2"]')
                   .replace('cal.toml', 'split.toml'))
    return cfg


def test_one_reading_is_not_applied_to_legs_that_differ(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    # The legs read 0.9 V apart; a reading with 0.1 V uncertainty cannot stand for both.
    cfg = _split(tmp_path)
    rc = main(["calibrate", "--config", str(cfg), "--reference-volts", "120.0",
               "--uncertainty", "0.1", "--seconds", "2"])
    assert rc == 2
    err = capsys.readouterr().err
    assert "one reference reading per channel" in err and "Traceback" not in err
    assert not (tmp_path / "calibration.toml").exists()


def test_a_reading_per_leg_keeps_the_real_difference(
    tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    cfg = _split(tmp_path)
    rc = main(["calibrate", "--config", str(cfg), "--reference-volts", "L1=120.0",
               "--reference-volts", "L2=119.1", "--uncertainty", "L1=0.06",
               "--uncertainty", "L2=0.05", "--seconds", "2"])
    assert rc == 0
    rec = CalibrationRecord.load(tmp_path / "calibration.toml")
    # Both legs see the same 0.6 % ADC error, so both gains are 1 / 1.006 (analytic): the
    # 0.75 % difference between the legs is not "corrected" away.
    assert rec.channel_gains["L1"] == pytest.approx(1 / 1.006, abs=3e-4)
    assert rec.channel_gains["L2"] == pytest.approx(1 / 1.006, abs=3e-4)
    assert rec.reference_volts == {"L1": 120.0, "L2": 119.1}
    assert rec.reference_uncertainty_v == {"L1": 0.06, "L2": 0.05}


@pytest.mark.parametrize("bad", [["L3=120"], ["L1=120"], ["120", "L1=120"], ["L1=x"]])
def test_per_channel_readings_are_checked(
    tmp_path: Path, capsys: pytest.CaptureFixture[str], bad: list[str]
) -> None:
    cfg = _split(tmp_path)
    argv = ["calibrate", "--config", str(cfg), "--seconds", "1"]
    for b in bad:
        argv += ["--reference-volts", b]
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert "--reference-volts" in err and "Traceback" not in err


def test_help_carries_the_safety_text(capsys: pytest.CaptureFixture[str]) -> None:
    with pytest.raises(SystemExit):
        main(["calibrate", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert "licensed electrician" in text and "Never probe a live circuit" in text
    assert "plug-in meter" in text
