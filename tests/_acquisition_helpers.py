"""Helpers for the acquisition and clock tests (no fixtures; import what you need)."""

from __future__ import annotations

import json
import math
import wave
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.acquisition.base import Source


def toml_value(value: Any) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int | float):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    raise TypeError(f"cannot write {value!r} as TOML")


def write_scenario(path: Path, doc: Mapping[str, Any]) -> Path:
    """Write a scenario dict as TOML: tables for dicts, arrays of tables for lists of dicts."""
    lines: list[str] = []
    for name, body in doc.items():
        if isinstance(body, list):
            for item in body:
                lines.append(f"[[{name}]]")
                lines += [f"{k} = {toml_value(v)}" for k, v in item.items()]
        else:
            lines.append(f"[{name}]")
            lines += [f"{k} = {toml_value(v)}" for k, v in body.items()]
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    return path


def clean_scenario(**over: Any) -> dict[str, Any]:
    """A noise-free, ideal-ADC, single-channel scenario to build tests on."""
    doc: dict[str, Any] = {
        "scenario": {"seed": 1, "duration_s": 1.0, "sample_rate": 7680.0, "block_samples": 1000},
        "mains": {"nominal_v": 120.0, "nominal_hz": 60.0},
        "channels": [{"name": "L1", "phase_deg": 0.0}],
        "adc": {"bits": 16, "full_scale_v": 400.0},
    }
    for key, value in over.items():
        doc[key] = value
    return doc


def collect(source: Source) -> npt.NDArray[np.int16]:
    """All samples of a finite source, checking that blocks are contiguous."""
    parts = []
    expected = 0
    for block in source.blocks():
        assert block.start_index == expected
        assert block.counts.dtype == np.int16
        parts.append(block.counts)
        expected = block.end_index
    return np.concatenate(parts)


def stdlib_wav(path: Path, counts: npt.NDArray[np.int16], rate: int, width: int = 2) -> None:
    """Write a WAV with the standard library's own writer (the independent side)."""
    with wave.open(str(path), "wb") as w:
        w.setnchannels(counts.shape[1])
        w.setsampwidth(width)
        w.setframerate(rate)
        if width == 2:
            w.writeframes(counts.astype("<i2").tobytes())
        else:
            w.writeframes((counts.astype(np.int32) // 256 + 128).astype(np.uint8).tobytes())


class FakeClock:
    """An injected system clock: wall time and NTP state set by the test."""

    def __init__(self, t0: float = 1_780_000_000.0) -> None:
        self.t = t0
        self.synced = False
        self.est_error_s: float | None = None

    def now(self) -> float:
        return self.t

    def sync_status(self) -> tuple[bool, float | None]:
        return self.synced, self.est_error_s


def rms(x: npt.NDArray[np.float64]) -> float:
    return math.sqrt(float(np.mean(np.square(x))))
