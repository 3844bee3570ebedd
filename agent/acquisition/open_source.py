"""Build a source from the ``[source]`` table of a configuration file.

Keys by ``kind`` (relative paths are taken from the configuration file's folder):

- ``sim``: ``scenario`` (path to a scenario TOML), ``block_samples`` (optional int).
- ``wav``: ``path``, ``volts_per_count`` (float, or a list with one per channel),
  ``channels`` (optional list of names), ``block_samples``.
- ``csv``: ``path``, ``sample_rate`` [S/s], ``volts_per_count`` (optional; chosen to fit
  the file's peak when absent), ``channels`` (optional), ``block_samples``.
- ``serial``: ``port``, ``baud`` (default 921600), ``sample_rate`` [S/s], ``channels``,
  ``volts_per_count`` (float or list), ``adc_bits`` (default 16), ``idle_timeout_s``
  (optional: stop with an error when the port is silent this long).
"""

from __future__ import annotations

from collections.abc import Mapping
from pathlib import Path
from typing import Any

from agent.acquisition.base import Source
from agent.config import ConfigError, Section

__all__ = ["SOURCE_KINDS", "open_source"]

SOURCE_KINDS = ("sim", "wav", "csv", "serial")


def _path(sec: Section, name: str) -> Path:
    p = Path(sec.get(name, str, required=True))
    if not p.is_absolute() and sec.path is not None:
        p = Path(sec.path).parent / p
    return p


def _vpc(sec: Section, required: bool) -> float | list[float] | None:
    if not sec.has("volts_per_count"):
        if required:
            raise sec.error("volts_per_count", "required key is missing")
        return None
    value = sec.data["volts_per_count"]
    values = value if isinstance(value, list) else [value]
    if not values or not all(
        isinstance(v, int | float) and not isinstance(v, bool) and v > 0 for v in values
    ):
        raise sec.error(
            "volts_per_count", f"expected a positive number or a list of them, got {value!r}"
        )
    return [float(v) for v in values] if isinstance(value, list) else float(value)


def _names(sec: Section) -> list[str] | None:
    if not sec.has("channels"):
        return None
    names = sec.get("channels", list, required=True)
    if not names or not all(isinstance(n, str) and n for n in names):
        raise sec.error("channels", "must be a non-empty list of channel names")
    return names


def open_source(config: Section | Mapping[str, Any], path: str | Path | None = None) -> Source:
    """Open the source a ``[source]`` table describes.

    ``config`` is a :class:`Section` (its file path is used for errors and relative paths)
    or a plain mapping (then ``path`` names the file it came from, if any).
    """
    sec = config if isinstance(config, Section) else Section(config, path, "source")
    kind = sec.choice("kind", SOURCE_KINDS)
    common = {"kind", "block_samples"}
    block = sec.optional("block_samples", int)
    if block is not None and block < 1:
        raise sec.error("block_samples", f"must be >= 1, got {block}")

    if kind == "sim":
        from agent.acquisition.sim import SimSource, load_scenario

        sec.reject_unknown(common | {"scenario"})
        return SimSource(load_scenario(_path(sec, "scenario")), block_samples=block)

    if kind == "wav":
        from agent.acquisition.replay import ReplayError, WavSource

        sec.reject_unknown(common | {"path", "volts_per_count", "channels"})
        vpc = _vpc(sec, required=True)
        assert vpc is not None
        try:
            return WavSource(
                _path(sec, "path"), vpc, channel_names=_names(sec), block_frames=block or 4096
            )
        except (ReplayError, ValueError) as exc:
            raise sec.error("path", str(exc)) from None

    if kind == "csv":
        from agent.acquisition.replay import CsvSource, ReplayError

        sec.reject_unknown(common | {"path", "sample_rate", "volts_per_count", "channels"})
        rate = sec.get("sample_rate", float, required=True)
        if rate <= 0:
            raise sec.error("sample_rate", f"must be positive, got {rate}")
        vpc = _vpc(sec, required=False)
        if isinstance(vpc, list):
            raise sec.error("volts_per_count", "a CSV source uses one scale for all channels")
        try:
            return CsvSource(
                _path(sec, "path"), rate, volts_per_count=vpc, channel_names=_names(sec),
                block_rows=block or 4096,
            )
        except (ReplayError, ValueError) as exc:
            raise sec.error("path", str(exc)) from None

    from agent.acquisition.serial import SerialSource, SerialSourceError

    sec.reject_unknown(
        common | {"port", "baud", "sample_rate", "channels", "volts_per_count", "adc_bits",
                  "idle_timeout_s"}
    )
    names = _names(sec)
    if names is None:
        raise sec.error("channels", "required key is missing")
    rate = sec.get("sample_rate", float, required=True)
    if rate <= 0:
        raise sec.error("sample_rate", f"must be positive, got {rate}")
    baud = sec.get("baud", int, 921600)
    if baud <= 0:
        raise sec.error("baud", f"must be positive, got {baud}")
    bits = sec.get("adc_bits", int, 16)
    if not 8 <= bits <= 16:
        raise sec.error("adc_bits", f"must be 8..16, got {bits}")
    vpc = _vpc(sec, required=True)
    assert vpc is not None
    try:
        return SerialSource(
            sec.get("port", str, required=True), baud, sample_rate=rate, channel_names=names,
            volts_per_count=vpc, adc_bits=bits,
            idle_timeout_s=sec.optional("idle_timeout_s", float),
        )
    except (SerialSourceError, ValueError) as exc:
        raise ConfigError(sec.path, sec.key("port"), str(exc)) from None
