"""WAV and CSV replay (agent.acquisition.replay)."""

from __future__ import annotations

import struct
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest
import scipy.io.wavfile
from _acquisition_helpers import collect, stdlib_wav
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.acquisition.base import Block, SourceInfo
from agent.acquisition.replay import CsvSource, ReplayError, WavSource, write_wav


@given(channels=st.integers(1, 6), frames=st.integers(1, 3000), block=st.integers(1, 700),
       seed=st.integers(0, 1000))
@settings(max_examples=25, deadline=None)
def test_stdlib_wav_reads_back_bit_exact(
    tmp_path_factory: pytest.TempPathFactory, channels: int, frames: int, block: int, seed: int
) -> None:
    rng = np.random.default_rng(seed)
    counts = rng.integers(-32768, 32768, (frames, channels)).astype(np.int16)
    path = tmp_path_factory.mktemp("wav") / "x.wav"
    stdlib_wav(path, counts, 7680)  # independent writer: the stdlib wave module
    src = WavSource(path, 0.01, block_frames=block)
    assert src.info.channels == channels and src.info.sample_rate == 7680.0
    np.testing.assert_array_equal(collect(src), counts)
    src.close()


def test_write_wav_is_read_by_scipy(tmp_path: Path) -> None:
    counts = np.random.default_rng(1).integers(-32768, 32768, (5000, 3)).astype(np.int16)
    wav = tmp_path / "a.wav"
    stdlib_wav(wav, counts, 4000)
    out = tmp_path / "b.wav"
    assert write_wav(WavSource(wav, [0.01, 0.02, 0.03], block_frames=999), out) == 5000
    rate, data = scipy.io.wavfile.read(out)  # independent reader: scipy
    assert rate == 4000
    np.testing.assert_array_equal(data, counts)


def test_extensible_pcm_wav_is_accepted(tmp_path: Path) -> None:
    counts = np.arange(-600, 600, dtype=np.int16).reshape(-1, 4)
    # WAVE_FORMAT_EXTENSIBLE header built by hand (Microsoft WAVEFORMATEXTENSIBLE layout)
    guid = bytes.fromhex("0100000000001000800000aa00389b71")
    fmt = struct.pack("<HHIIHHHHI", 0xFFFE, 4, 8000, 8000 * 8, 8, 16, 22, 16, 0x33) + guid
    data = counts.astype("<i2").tobytes()
    body = (b"WAVE" + b"fmt " + struct.pack("<I", len(fmt)) + fmt
            + b"data" + struct.pack("<I", len(data)) + data)
    path = tmp_path / "ext.wav"
    path.write_bytes(b"RIFF" + struct.pack("<I", len(body)) + body)
    np.testing.assert_array_equal(collect(WavSource(path, 0.01)), counts)


def test_truncated_wav_is_refused_before_any_sample(tmp_path: Path) -> None:
    path = tmp_path / "t.wav"
    stdlib_wav(path, np.zeros((1000, 2), dtype=np.int16), 7680)
    raw = path.read_bytes()
    path.write_bytes(raw[: len(raw) - 401])  # cut inside the data chunk
    with pytest.raises(ReplayError, match="declares 1000 frames, file holds 899"):
        WavSource(path, 0.01)


def test_8bit_wav_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "u8.wav"
    stdlib_wav(path, np.zeros((100, 1), dtype=np.int16), 8000, width=1)
    with pytest.raises(ReplayError, match="sample width is 8 bits; only 16-bit PCM"):
        WavSource(path, 0.01)


def test_missing_and_not_a_wav(tmp_path: Path) -> None:
    with pytest.raises(ReplayError, match="file not found"):
        WavSource(tmp_path / "nope.wav", 0.01)
    junk = tmp_path / "junk.wav"
    junk.write_text("time,L1\n0,1\n")
    with pytest.raises(ReplayError, match="not a WAV file") as err:
        WavSource(junk, 0.01)
    assert "\n" not in str(err.value) and str(junk) in str(err.value)


def test_wrong_channel_name_count(tmp_path: Path) -> None:
    path = tmp_path / "w.wav"
    stdlib_wav(path, np.zeros((10, 2), dtype=np.int16), 8000)
    with pytest.raises(ReplayError, match="1 channel names given for 2 channels"):
        WavSource(path, 0.01, channel_names=["L1"])


def test_csv_with_header_scales_to_fit(tmp_path: Path) -> None:
    rng = np.random.default_rng(4)
    volts = rng.uniform(-180, 180, (10_001, 2))
    path = tmp_path / "v.csv"
    # numpy writes the file: an independent writer
    np.savetxt(path, volts, delimiter=",", header="L1,L2", comments="", fmt="%.6f")
    src = CsvSource(path, 7680.0, block_rows=777)
    assert src.info.channel_names == ("L1", "L2")
    counts = collect(src)
    peak = np.abs(np.round(volts, 6)).max()
    assert src.volts_per_count == pytest.approx(peak / 30000)  # peak at 30000 counts
    assert np.abs(counts).max() == 30000
    # quantisation error at most half a count (common practice: rounding)
    assert np.max(np.abs(counts * src.volts_per_count - volts)) <= src.volts_per_count / 2 + 1e-6


def test_csv_without_header_and_given_scale(tmp_path: Path) -> None:
    path = tmp_path / "v.csv"
    path.write_text("1.0\n-2.5\n\n3.25\n")
    src = CsvSource(path, 100.0, volts_per_count=0.25)
    assert src.info.channel_names == ("L1",)
    np.testing.assert_array_equal(collect(src)[:, 0], [4, -10, 13])


@pytest.mark.parametrize(
    ("text", "message"),
    [
        ("L1,L2\n1,2\n3,x\n", "line 3: 'x' is not a number"),
        ("L1,L2\n1,2\n3\n", "line 3: 1 columns, expected 2"),
        ("1,2\n3,4,5\n", "line 2: 3 columns, expected 2"),
        ("L1\n1\nnan\n", "line 3: 'nan' is not finite"),
        ("L1,3.0\n", "line 1: mixes numbers and names"),
        ("L1,L2\n", "no data rows"),
    ],
)
def test_csv_bad_rows_name_the_line(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "bad.csv"
    path.write_text(text)
    with pytest.raises(ReplayError, match=message):
        CsvSource(path, 100.0)


def test_csv_given_scale_that_would_clip_is_refused(tmp_path: Path) -> None:
    path = tmp_path / "v.csv"
    path.write_text("1\n2\n500\n")
    with pytest.raises(ReplayError, match=r"line 3: 500\.0 V exceeds int16 full scale"):
        CsvSource(path, 100.0, volts_per_count=0.01)


def test_csv_bad_line_found_deep_in_a_large_file(tmp_path: Path) -> None:
    lines = ["0.5"] * 20_000
    lines[15_432] = "0.5.1"
    path = tmp_path / "big.csv"
    path.write_text("\n".join(lines) + "\n")
    with pytest.raises(ReplayError, match=r"line 15433: '0\.5\.1' is not a number"):
        CsvSource(path, 100.0, block_rows=4096)


class _GappySource:
    """A source whose second block starts after a gap (as a serial source can)."""

    info = SourceInfo(8000.0, ("L1",), np.array([0.01]))

    def blocks(self) -> Iterator[Block]:
        yield Block(0, np.zeros((10, 1), dtype=np.int16))
        yield Block(20, np.zeros((10, 1), dtype=np.int16), {"sequence_gap": 1})

    def close(self) -> None:
        pass


def test_write_wav_refuses_a_gap_rather_than_hiding_it(tmp_path: Path) -> None:
    with pytest.raises(ValueError, match="gap at sample 10"):
        write_wav(_GappySource(), tmp_path / "g.wav")
