"""COMTRADE export of a waveform capture: a ``.cfg`` text file and a BINARY ``.dat`` file.

Layout per IEEE C37.111-1999 (and the 2013 revision / IEC 60255-24:2013, which adds the
time-code and time-quality lines): one analog channel per voltage channel, value = a·x + b
with x the raw int16 count, a = volts per count (calibration included) and b = 0; no digital
channels. BINARY records are little-endian (from memory): uint32 sample number (from 1),
uint32 time stamp [µs × timemult], one int16 per analog channel.

The count -32768 (0x8000) marks a missing sample in BINARY files (from memory;
tests/SOURCES.md), so a sample at the negative
ADC rail is written as -32767 (one count, i.e. ``a`` volts, higher); the cfg min/max are
±32767.

References
----------
IEEE Std C37.111-1999 / C37.111-2013, Common format for transient data exchange (COMTRADE)
for power systems, clauses on the configuration file and the binary data file.
"""

from __future__ import annotations

import datetime as dt
import re
from pathlib import Path
from typing import TYPE_CHECKING

import numpy as np

from agent.events.types import Capture

if TYPE_CHECKING:
    from agent.store.recorder import RecorderStore

REV_YEARS = (1999, 2013)
_FIELD_RE = re.compile(r"[,\r\n]")


def _field(text: str) -> str:
    """cfg fields are comma separated: commas and line breaks cannot appear inside one."""
    return _FIELD_RE.sub("_", text)


def _number(x: float) -> str:
    """Shortest text that reads back as the same float64 (so a·x is exact on import)."""
    return repr(float(x))


def comtrade_timestamp(t_utc: float) -> str:
    """``dd/mm/yyyy,hh:mm:ss.ssssss`` of UTC seconds, rounded to the microsecond."""
    micros = round(t_utc * 1_000_000)
    stamp = dt.datetime(1970, 1, 1) + dt.timedelta(microseconds=micros)
    return stamp.strftime("%d/%m/%Y,%H:%M:%S.%f")


def first_sample_utc(capture: Capture) -> float:
    """UTC time of row 0 [s]: the trigger time minus the pre-trigger samples."""
    return capture.trigger_utc - (capture.trigger_index - capture.first_index) / capture.sample_rate


def cfg_text(capture: Capture, *, station: str, rec_dev_id: str, line_hz: float,
             rev_year: int = 1999, primary: float = 1.0, secondary: float = 1.0,
             tmq_code: str = "F") -> str:
    """The ``.cfg`` content for a BINARY ``.dat`` of ``capture``.

    ``primary``/``secondary`` are the voltage-transformer ratio fields; the values are
    written as primary quantities (``P``), since ``scale`` already gives mains volts.
    ``tmq_code`` (2013 only) is the time-quality code; the default ``F`` claims nothing
    about the clock (the capture does not record its clock state; from memory: 0 = locked).
    """
    if rev_year not in REV_YEARS:
        raise ValueError(f"rev_year must be one of {REV_YEARS}, got {rev_year}")
    if not line_hz > 0:
        raise ValueError(f"line frequency must be > 0 Hz, got {line_hz}")
    counts = np.asarray(capture.counts)
    if counts.ndim != 2:
        raise ValueError(f"capture counts must be 2-D (samples, channels), got {counts.shape}")
    n, nch = counts.shape
    scale = np.asarray(capture.scale, dtype=np.float64).ravel()
    if scale.shape[0] != nch or len(capture.channel_names) != nch:
        raise ValueError("capture scale and channel_names must have one entry per channel")
    lines = [f"{_field(station)},{_field(rec_dev_id)},{rev_year}", f"{nch},{nch}A,0D"]
    for i, name in enumerate(capture.channel_names, start=1):
        lines.append(",".join([
            str(i), _field(name), _field(name), "", "V", _number(scale[i - 1]), "0", "0",
            "-32767", "32767", _number(primary), _number(secondary), "P"]))
    lines += [
        _number(line_hz),
        "1",
        f"{_number(capture.sample_rate)},{n}",
        comtrade_timestamp(first_sample_utc(capture)),
        comtrade_timestamp(capture.trigger_utc),
        "BINARY",
        "1",
    ]
    if rev_year == 2013:
        lines += ["0,0", f"{tmq_code},0"]  # times in UTC (time_code, local_code); leap second 0
    return "\r\n".join(lines) + "\r\n"


def dat_bytes(capture: Capture) -> bytes:
    """BINARY ``.dat`` records of ``capture`` (time stamps in µs from the first sample)."""
    counts = np.asarray(capture.counts, dtype=np.int16)
    n, nch = counts.shape
    record = np.dtype([("n", "<u4"), ("t", "<u4"), ("x", "<i2", (nch,))])
    out = np.empty(n, dtype=record)
    out["n"] = np.arange(1, n + 1, dtype=np.uint32)
    micros = np.rint(np.arange(n, dtype=np.float64) * (1e6 / capture.sample_rate))
    if n and micros[-1] >= 2**32:
        raise ValueError("capture longer than the 32-bit µs time stamp allows (~71 min)")
    out["t"] = micros.astype(np.uint32)
    out["x"] = np.maximum(counts, -32767)  # -32768 is the missing-value code
    return out.tobytes()


def write_comtrade(capture: Capture, directory: str | Path, *, station: str, rec_dev_id: str,
                   line_hz: float, name: str | None = None, rev_year: int = 1999,
                   primary: float = 1.0, secondary: float = 1.0) -> tuple[Path, Path]:
    """Write ``<name>.cfg`` and ``<name>.dat`` (name defaults to the capture id)."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    base = re.sub(r"[^A-Za-z0-9_.-]", "_", name or capture.capture_id)
    cfg_path, dat_path = directory / f"{base}.cfg", directory / f"{base}.dat"
    cfg_path.write_text(cfg_text(capture, station=station, rec_dev_id=rec_dev_id,
                                 line_hz=line_hz, rev_year=rev_year, primary=primary,
                                 secondary=secondary), encoding="ascii", newline="")
    dat_path.write_bytes(dat_bytes(capture))
    return cfg_path, dat_path


def export_capture(store: RecorderStore, capture_id: str, directory: str | Path, *,
                   line_hz: float | None = None, rev_year: int = 1999) -> tuple[Path, Path]:
    """Export a stored capture; station = site id, recording device = device id, line
    frequency from the device's site model (``nominal_hz``) unless given."""
    capture = store.capture(capture_id)
    info = store.capture_info(capture_id)
    if line_hz is None:
        model: dict[str, object] = next(
            (d["model"] for d in store.devices() if d["device"] == info["device"]), {})
        hz = model.get("nominal_hz")
        if not isinstance(hz, int | float):
            raise ValueError(f"line frequency of device {info['device']} is unknown: pass "
                             "line_hz (50 or 60)")
        line_hz = float(hz)
    return write_comtrade(capture, directory, station=info["site"], rec_dev_id=info["device"],
                          line_hz=line_hz, rev_year=rev_year)
