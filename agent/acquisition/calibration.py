"""Calibration records: per-channel gains found against a reference voltmeter.

Calibrated volts = counts × ``SourceInfo.volts_per_count`` × gain. A gain is found by
applying a steady voltage, reading it with a reference meter (``reference_volts``) and with
the monitor using gain 1 (``measured_volts``): gain = reference / measured. Each channel (each
leg of a split-phase service, each phase) has its own reading and its own uncertainty: the
legs of one service differ by more than a meter's uncertainty, so one reading applied to all
would "correct" real differences away (:func:`check_shared_reading` refuses that).

Safety: the reference reading is taken by a licensed electrician with a meter rated for the
circuit, or at a socket with a plug-in meter. Never probe a live circuit yourself.

File format 2 (ours; TOML when the name ends in ``.toml``, JSON when ``.json``)::

    format = 2
    device = "device-0"
    date_utc = "2026-12-01T18:00:00Z"      # ISO 8601, UTC
    note = "bench check, invented example"

    [channels.L1]
    gain = 1.00125
    measured_volts = 119.85                 # [V RMS] the monitor's reading at gain 1
    reference_volts = 120.0                 # [V RMS] the meter's reading for this channel
    reference_uncertainty_v = 0.06          # [V] that reading's stated uncertainty

The JSON form has the same keys, with ``channels`` an object of objects. Format 1 files (one
top-level ``reference_volts`` / ``reference_uncertainty_v`` for every channel) still load.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.config import ConfigError, Section, load_toml

__all__ = ["FORMAT_VERSION", "GAIN_LIMITS", "CalibrationRecord", "check_shared_reading",
           "compute_gains"]

FORMAT_VERSION = 2
READ_FORMATS = (1, 2)
# A gain outside this range means a wiring or scale mistake, not a calibration.
GAIN_LIMITS = (0.5, 2.0)


def compute_gains(
    measured_rms_per_channel: Mapping[str, float], reference_volts: float | Mapping[str, float]
) -> dict[str, float]:
    """Gain per channel so that measured × gain = reference.

    Parameters
    ----------
    measured_rms_per_channel : mapping of channel name to RMS read at gain 1  [V]
    reference_volts : RMS read by the reference meter  [V], one per channel (a mapping) or
        one for all (see :func:`check_shared_reading` before sharing one reading)

    Returns
    -------
    gains : mapping of channel name to gain  [1]
    """
    if not measured_rms_per_channel:
        raise ValueError("no channels measured")
    refs = _per_channel(reference_volts, measured_rms_per_channel)
    gains: dict[str, float] = {}
    for name, measured in measured_rms_per_channel.items():
        ref = refs[name]
        if not (math.isfinite(ref) and ref > 0):
            raise ValueError(f"channel {name}: reference_volts must be positive, got {ref}")
        if not (math.isfinite(measured) and measured > 0):
            raise ValueError(f"channel {name}: measured RMS must be positive, got {measured}")
        gain = ref / measured
        if not GAIN_LIMITS[0] <= gain <= GAIN_LIMITS[1]:
            raise ValueError(
                f"channel {name}: gain {gain:.4f} is outside {GAIN_LIMITS}; "
                "check the wiring, the channel order and volts_per_count"
            )
        gains[name] = gain
    return gains


def _per_channel(value: float | Mapping[str, float], names: Mapping[str, float]
                 ) -> dict[str, float]:
    if isinstance(value, Mapping):
        missing = [n for n in names if n not in value]
        if missing:
            raise ValueError(f"no reference reading for channel {', '.join(missing)}")
        return {n: float(value[n]) for n in names}
    return {n: float(value) for n in names}


def check_shared_reading(measured_rms_per_channel: Mapping[str, float],
                         uncertainty_v: float) -> None:
    """Refuse to apply one reference reading to channels that read differently.

    One reading stands for several channels only if the monitor sees them within the
    reading's stated uncertainty of each other [V]; otherwise the difference may be real
    (the legs of a split-phase service differ under load) and a shared reading would hide it.
    Raises ValueError naming the channels and the spread.
    """
    if len(measured_rms_per_channel) < 2:
        return
    hi = max(measured_rms_per_channel, key=lambda n: measured_rms_per_channel[n])
    lo = min(measured_rms_per_channel, key=lambda n: measured_rms_per_channel[n])
    spread = measured_rms_per_channel[hi] - measured_rms_per_channel[lo]
    if spread > uncertainty_v:
        raise ValueError(
            f"channels {lo} and {hi} read {spread:.3f} V apart, more than the reading's "
            f"uncertainty {uncertainty_v:.3f} V: take one reference reading per channel "
            f"(--reference-volts NAME=V for each)")


def _utc_now() -> str:
    return datetime.now(UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


@dataclass(frozen=True)
class CalibrationRecord:
    device: str
    channel_gains: dict[str, float]
    reference_volts: dict[str, float]
    """The reference reading per channel [V RMS]."""
    reference_uncertainty_v: dict[str, float]
    """Each reading's stated uncertainty [V]."""
    measured_volts: dict[str, float] = field(default_factory=dict)
    date_utc: str = field(default_factory=_utc_now)
    note: str = ""

    def gains_for(self, channel_names: Sequence[str]) -> npt.NDArray[np.float64]:
        """Gains in the order of ``channel_names``; a channel without a gain is an error."""
        missing = [n for n in channel_names if n not in self.channel_gains]
        if missing:
            raise KeyError(f"calibration for {self.device} has no gain for {', '.join(missing)}")
        return np.array([self.channel_gains[n] for n in channel_names], dtype=np.float64)

    def to_dict(self) -> dict[str, Any]:
        channels: dict[str, dict[str, float]] = {}
        for name, gain in self.channel_gains.items():
            entry = {"gain": gain}
            if name in self.measured_volts:
                entry["measured_volts"] = self.measured_volts[name]
            entry["reference_volts"] = self.reference_volts[name]
            entry["reference_uncertainty_v"] = self.reference_uncertainty_v[name]
            channels[name] = entry
        return {
            "format": FORMAT_VERSION,
            "device": self.device,
            "date_utc": self.date_utc,
            "note": self.note,
            "channels": channels,
        }

    def save(self, path: str | Path) -> None:
        p = Path(path)
        _validate(self.to_dict(), p)  # never write a file we would refuse to load
        if p.suffix == ".json":
            p.write_text(json.dumps(self.to_dict(), indent=2) + "\n", encoding="utf-8")
        elif p.suffix == ".toml":
            p.write_text(self._to_toml(), encoding="utf-8")
        else:
            raise ValueError(f"{p}: calibration files end in .toml or .json")

    def _to_toml(self) -> str:
        d = self.to_dict()
        s = json.dumps  # a JSON string with ASCII escapes is a valid TOML basic string
        lines = [
            "# halfcycle calibration record",
            f"format = {FORMAT_VERSION}",
            f"device = {s(d['device'])}",
            f"date_utc = {s(d['date_utc'])}",
            f"note = {s(d['note'])}",
        ]
        for name, entry in d["channels"].items():
            lines += ["", f"[channels.{s(name)}]"]
            lines += [f"{k} = {float(v)!r}" for k, v in entry.items()]
        return "\n".join(lines) + "\n"

    @classmethod
    def load(cls, path: str | Path) -> CalibrationRecord:
        p = Path(path)
        if p.suffix == ".json":
            try:
                doc = json.loads(p.read_text(encoding="utf-8"))
            except FileNotFoundError:
                raise ConfigError(p, "<file>", "file not found") from None
            except (json.JSONDecodeError, UnicodeDecodeError) as exc:
                raise ConfigError(p, "<file>", f"not valid JSON: {exc}") from None
            if not isinstance(doc, dict):
                raise ConfigError(p, "<file>", "expected a JSON object")
        elif p.suffix == ".toml":
            doc = load_toml(p)
        else:
            raise ConfigError(p, "<file>", "calibration files end in .toml or .json")
        return _validate(doc, p)


def _validate(doc: Mapping[str, Any], path: Path | None) -> CalibrationRecord:
    sec = Section(doc, path)
    fmt = sec.get("format", int, required=True)
    if fmt not in READ_FORMATS:
        raise sec.error("format", f"unsupported format {fmt} (this version reads "
                                  f"{', '.join(map(str, READ_FORMATS))})")
    top = {"format", "device", "date_utc", "note", "channels"}
    if fmt == 1:
        top |= {"reference_volts", "reference_uncertainty_v"}
    sec.reject_unknown(top)
    date = sec.get("date_utc", str, required=True)
    try:
        parsed = datetime.fromisoformat(date)
    except ValueError:
        raise sec.error("date_utc", f"{date!r} is not an ISO 8601 time") from None
    if parsed.utcoffset() != UTC.utcoffset(None):
        raise sec.error("date_utc", f"{date!r} must be UTC (end in Z or +00:00)")
    shared: tuple[float, float] | None = None
    if fmt == 1:
        shared = (_reference(sec), _uncertainty(sec))
    chans = sec.section("channels", required=True)
    if not chans.data:
        raise sec.error("channels", "no channels")
    gains: dict[str, float] = {}
    measured: dict[str, float] = {}
    refs: dict[str, float] = {}
    uncs: dict[str, float] = {}
    for name in chans.data:
        ch = chans.section(name)
        keys = {"gain", "measured_volts"}
        if fmt == 2:
            keys |= {"reference_volts", "reference_uncertainty_v"}
        ch.reject_unknown(keys)
        gain = ch.get("gain", float, required=True)
        if not (math.isfinite(gain) and GAIN_LIMITS[0] <= gain <= GAIN_LIMITS[1]):
            raise ch.error("gain", f"{gain} is outside {GAIN_LIMITS}")
        gains[str(name)] = gain
        m = ch.optional("measured_volts", float)
        if m is not None:
            if not (math.isfinite(m) and m > 0):
                raise ch.error("measured_volts", f"must be positive, got {m}")
            measured[str(name)] = m
        refs[str(name)], uncs[str(name)] = shared or (_reference(ch), _uncertainty(ch))
    return CalibrationRecord(
        device=sec.get("device", str, required=True),
        channel_gains=gains,
        reference_volts=refs,
        reference_uncertainty_v=uncs,
        measured_volts=measured,
        date_utc=date,
        note=sec.get("note", str, ""),
    )


def _reference(sec: Section) -> float:
    ref = sec.get("reference_volts", float, required=True)
    if not (math.isfinite(ref) and ref > 0):
        raise sec.error("reference_volts", f"must be positive, got {ref}")
    return float(ref)


def _uncertainty(sec: Section) -> float:
    unc = sec.get("reference_uncertainty_v", float, required=True)
    if not (math.isfinite(unc) and unc >= 0):
        raise sec.error("reference_uncertainty_v", f"must be >= 0, got {unc}")
    return float(unc)
