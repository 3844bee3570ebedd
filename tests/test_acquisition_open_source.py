"""open_source factory (agent.acquisition.open_source) from a [source] table."""

from __future__ import annotations

import os
import tty
from pathlib import Path

import numpy as np
import pytest
from _acquisition_helpers import clean_scenario, collect, stdlib_wav, write_scenario

from agent.acquisition.open_source import open_source
from agent.acquisition.replay import CsvSource, WavSource
from agent.acquisition.serial import SerialSource
from agent.acquisition.sim import SimSource
from agent.config import ConfigError, Section, load_toml


def _from_file(tmp_path: Path, body: str) -> object:
    cfg = tmp_path / "agent.toml"
    cfg.write_text(body)
    return open_source(Section(load_toml(cfg), cfg).section("source", required=True))


def test_sim_relative_to_config_folder(tmp_path: Path) -> None:
    write_scenario(tmp_path / "scen.toml", clean_scenario())
    src = _from_file(
        tmp_path, '[source]\nkind = "sim"\nscenario = "scen.toml"\nblock_samples = 500\n'
    )
    assert isinstance(src, SimSource) and src.block_samples == 500


def test_wav_and_csv(tmp_path: Path) -> None:
    counts = np.arange(-50, 50, dtype=np.int16).reshape(-1, 2)
    stdlib_wav(tmp_path / "r.wav", counts, 8000)
    src = _from_file(tmp_path, '[source]\nkind = "wav"\npath = "r.wav"\n'
                     'volts_per_count = [0.01, 0.02]\nchannels = ["A", "B"]\n')
    assert isinstance(src, WavSource) and src.info.channel_names == ("A", "B")
    np.testing.assert_array_equal(src.info.volts_per_count, [0.01, 0.02])
    np.testing.assert_array_equal(collect(src), counts)
    (tmp_path / "v.csv").write_text("1.5\n-1.5\n")
    src = _from_file(tmp_path, '[source]\nkind = "csv"\npath = "v.csv"\nsample_rate = 100\n')
    assert isinstance(src, CsvSource) and src.info.sample_rate == 100.0


def test_serial_on_a_pty(tmp_path: Path) -> None:
    pytest.importorskip("serial")
    master, slave = os.openpty()
    tty.setraw(slave)
    try:
        src = open_source({"kind": "serial", "port": os.ttyname(slave), "sample_rate": 7680,
                           "channels": ["L1", "L2"], "volts_per_count": 0.0122})
        assert isinstance(src, SerialSource) and src.info.channels == 2
        src.close()
    finally:
        os.close(master)
        os.close(slave)


@pytest.mark.parametrize(
    ("body", "key", "problem"),
    [
        ('kind = "mqtt"', "source.kind", "must be one of"),
        ('kind = "wav"\npath = "r.wav"', "source.volts_per_count", "required"),
        ('kind = "wav"\npath = "none.wav"\nvolts_per_count = 0.1', "source.path", "file not found"),
        ('kind = "csv"\npath = "v.csv"', "source.sample_rate", "required"),
        ('kind = "sim"\nscenario = "s.toml"\nspeed = 2', "source.speed", "unknown key"),
        ('kind = "serial"\nport = "/dev/halfcycle-none"\nsample_rate = 7680\n'
         'channels = ["L1"]\nvolts_per_count = 0.01', "source.port", "cannot open"),
    ],
)
def test_errors_name_the_key(tmp_path: Path, body: str, key: str, problem: str) -> None:
    with pytest.raises(ConfigError) as err:
        _from_file(tmp_path, "[source]\n" + body + "\n")
    assert err.value.key == key and problem in err.value.problem
    assert err.value.path == str(tmp_path / "agent.toml")
