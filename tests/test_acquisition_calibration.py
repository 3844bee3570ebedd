"""Calibration records (agent.acquisition.calibration)."""

from __future__ import annotations

import json
import math
import tomllib
from pathlib import Path

import numpy as np
import pytest

from agent.acquisition.calibration import CalibrationRecord, check_shared_reading, compute_gains
from agent.config import ConfigError


def _record() -> CalibrationRecord:
    return CalibrationRecord(
        device="dev-7",
        channel_gains={"L1": 1.00125, "L2": 0.99871},
        reference_volts={"L1": 120.0, "L2": 119.2},
        reference_uncertainty_v={"L1": 0.06, "L2": 0.05},
        measured_volts={"L1": 119.85, "L2": 120.155},
        date_utc="2026-12-01T18:00:00Z",
        note='invented bench check "A"\nsecond line',
    )


def test_compute_gains_is_reference_over_measured() -> None:
    gains = compute_gains({"L1": 119.85, "L2": 120.155}, 120.0)
    # gain x measured = reference (definition)
    assert gains["L1"] * 119.85 == pytest.approx(120.0, rel=1e-12)
    assert gains["L2"] * 120.155 == pytest.approx(120.0, rel=1e-12)


@pytest.mark.parametrize(
    ("measured", "ref", "message"),
    [
        ({"L1": 0.0}, 120.0, "measured RMS must be positive"),
        ({"L1": math.nan}, 120.0, "measured RMS must be positive"),
        ({"L1": 30.0}, 120.0, "outside"),  # a 4x error is wiring or scale, not calibration
        ({"L1": 120.0}, -1.0, "reference_volts must be positive"),
        ({"L1": 120.0, "L2": 119.0}, {"L1": 120.0}, "no reference reading for channel L2"),
        ({}, 120.0, "no channels"),
    ],
)
def test_compute_gains_refuses_nonsense(
    measured: dict[str, float], ref: float | dict[str, float], message: str
) -> None:
    with pytest.raises(ValueError, match=message):
        compute_gains(measured, ref)


@pytest.mark.parametrize("suffix", [".toml", ".json"])
def test_save_load_round_trip(tmp_path: Path, suffix: str) -> None:
    rec = _record()
    path = tmp_path / f"cal{suffix}"
    rec.save(path)
    assert CalibrationRecord.load(path) == rec
    # the file is valid for an independent parser (stdlib tomllib / json)
    raw = path.read_bytes()
    doc = tomllib.loads(raw.decode()) if suffix == ".toml" else json.loads(raw)
    assert doc["channels"]["L1"]["gain"] == 1.00125 and doc["format"] == 2
    assert doc["channels"]["L2"]["reference_volts"] == 119.2
    np.testing.assert_array_equal(rec.gains_for(["L2", "L1"]), [0.99871, 1.00125])


def test_gains_for_missing_channel() -> None:
    with pytest.raises(KeyError, match="no gain for L3"):
        _record().gains_for(["L1", "L3"])


@pytest.mark.parametrize(
    ("edit", "key", "problem"),
    [
        ({"format": 3}, "format", "unsupported format 3"),
        ({"date_utc": "yesterday"}, "date_utc", "not an ISO 8601"),
        ({"date_utc": "2026-12-01T18:00:00+01:00"}, "date_utc", "must be UTC"),
        ({"reference_volts": 120.0}, "reference_volts", "unknown key"),
        ({"channels": {"L1": {"gain": 1.0, "reference_volts": 0,
                              "reference_uncertainty_v": 0.1}}},
         "channels.L1.reference_volts", "must be positive"),
        ({"channels": {"L1": {"gain": 7.0}}}, "channels.L1.gain", "outside"),
        ({"channels": {"L1": {"gain": 1.0, "offset": 2}}}, "channels.L1.offset", "unknown key"),
        ({"colour": "red"}, "colour", "unknown key"),
    ],
)
def test_load_errors_name_file_and_key(
    tmp_path: Path, edit: dict[str, object], key: str, problem: str
) -> None:
    doc = _record().to_dict() | edit
    path = tmp_path / "bad.json"
    path.write_text(json.dumps(doc))
    with pytest.raises(ConfigError) as err:
        CalibrationRecord.load(path)
    assert err.value.path == str(path) and err.value.key == key
    assert problem in err.value.problem


def test_load_missing_and_malformed(tmp_path: Path) -> None:
    with pytest.raises(ConfigError, match="file not found"):
        CalibrationRecord.load(tmp_path / "none.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("format = = 1\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        CalibrationRecord.load(bad)
    with pytest.raises(ConfigError, match=r"end in \.toml or \.json"):
        CalibrationRecord.load(tmp_path / "cal.yaml")


def test_format_1_file_still_loads_with_its_shared_reading(tmp_path: Path) -> None:
    # Records written before per-channel readings: one top-level reading for every channel.
    path = tmp_path / "old.json"
    path.write_text(json.dumps({
        "format": 1, "device": "dev-7", "date_utc": "2026-12-01T18:00:00Z",
        "reference_volts": 120.0, "reference_uncertainty_v": 0.06, "note": "",
        "channels": {"L1": {"gain": 1.001}, "L2": {"gain": 0.999}}}))
    rec = CalibrationRecord.load(path)
    assert rec.reference_volts == {"L1": 120.0, "L2": 120.0}
    assert rec.reference_uncertainty_v == {"L1": 0.06, "L2": 0.06}


def test_shared_reading_refused_when_channels_differ_by_more_than_its_uncertainty() -> None:
    # The legs of a 120/240 V service 0.9 V apart (invented): a 0.1 V reading cannot stand
    # for both; within 0.1 V it can.
    with pytest.raises(ValueError, match=r"L2 and L1 read 0\.900 V apart"):
        check_shared_reading({"L1": 120.0, "L2": 119.1}, 0.1)
    check_shared_reading({"L1": 120.0, "L2": 119.95}, 0.1)
    check_shared_reading({"L1": 120.0}, 0.0)
