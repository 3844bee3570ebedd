"""What the figures draw, read from the recorder store (read-only SQL) into plain arrays.

Shared by the static report and the live page: one reader per figure input, no second copy.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import numpy.typing as npt

from agent.events.types import Capture
from agent.measurement.rms import half_cycle_rms
from agent.measurement.zerocross import fundamental_zero_crossings
from agent.report.now import TEN_MIN_FULL_COUNT
from agent.store.recorder import RecorderStore, from_json
from agent.verdicts.limits import Band, ansi_band, en50160_band, standard_for

F64 = npt.NDArray[np.float64]


@dataclass(frozen=True)
class Series:
    """RMS values of one unit over time: ``t`` [s UTC, interval start], ``v`` (n, channels)
    [V]; ``interval_s`` the averaging interval (600 for 10-min means, 1 for per-second
    means); ``flagged`` (n,) True where an RMS event overlapped the interval."""

    t: F64
    v: F64
    interval_s: float
    flagged: npt.NDArray[np.bool_]
    channels: tuple[str, ...]

    @property
    def label(self) -> str:
        return "10-min means" if self.interval_s >= 600 else "1-s means"


def _period(sql: str, params: list[Any], column: str, start_utc: float | None,
            end_utc: float | None) -> tuple[str, list[Any]]:
    if start_utc is not None:
        sql += f" AND {column} >= ?"
        params.append(start_utc)
    if end_utc is not None:
        sql += f" AND {column} < ?"
        params.append(end_utc)
    return sql, params


def ten_min_means(store: RecorderStore, device: str, start_utc: float | None = None,
                  end_utc: float | None = None) -> Series | None:
    """Complete 10-min means (count of 10/12-cycle values at least
    :data:`agent.report.now.TEN_MIN_FULL_COUNT`); None when there are none."""
    sql, params = _period("SELECT t_utc, payload FROM aggregates WHERE device = ?"
                          " AND kind = '10min'", [device], "t_utc", start_utc, end_utc)
    t, v, flagged = [], [], []
    channels: tuple[str, ...] = ()
    for when, text in store.db.query(sql + " ORDER BY t_utc", tuple(params)):
        try:
            p = from_json(text)
        except ValueError:
            continue
        if not isinstance(p, dict) or not isinstance(p.get("rms"), list) or when is None:
            continue
        count = p.get("count")
        if not isinstance(count, int) or count < TEN_MIN_FULL_COUNT:
            continue
        t.append(float(when))
        v.append([math.nan if not isinstance(x, int | float) else float(x) for x in p["rms"]])
        flagged.append(bool(p.get("flagged")))
        channels = channels or tuple(str(c) for c in p.get("channels") or ())
    if not t:
        return None
    width = max(len(row) for row in v)
    arr = np.array([row + [math.nan] * (width - len(row)) for row in v])
    names = channels if len(channels) == width else tuple(f"ch{i + 1}" for i in range(width))
    return Series(np.array(t), arr, 600.0, np.array(flagged), names)


def second_means(store: RecorderStore, device: str, start_utc: float | None = None,
                 end_utc: float | None = None) -> Series | None:
    """Per-second means from the stored summaries (the store's packed trend, decoded chunk by
    chunk); None when there are none."""
    ts, vs, fs = [], [], []
    for a in store.trend_arrays(device, start_utc, end_utc,
                                fields=frozenset(("rms_mean", "flags"))):
        keep = a.present
        if not keep.any():
            continue  # a chunk of unreadable rows does not hide the rest
        ts.append(a.t[keep])
        vs.append(a.rms_mean[keep])
        fs.append(np.asarray(a.flags[keep]) != 0)
    if not ts:
        return None
    width = max(x.shape[1] for x in vs)
    t = np.concatenate(ts)
    v = np.concatenate([np.pad(x, ((0, 0), (0, width - x.shape[1])), constant_values=np.nan)
                        for x in vs])
    order = np.argsort(t, kind="stable")
    model = next((d.get("model") or {} for d in store.devices() if d["device"] == device), {})
    channels = tuple(str(c) for c in model.get("channel_names") or ())
    names = channels if len(channels) == width else tuple(f"ch{i + 1}" for i in range(width))
    return Series(t[order], v[order], 1.0, np.concatenate(fs)[order], names)


def profile_series(store: RecorderStore, device: str, start_utc: float | None = None,
                   end_utc: float | None = None) -> Series | None:
    """The series a unit's profile figures draw: its 10-min means, or, for a record too
    short to hold one, its per-second means (the caption says which)."""
    return (ten_min_means(store, device, start_utc, end_utc)
            or second_means(store, device, start_utc, end_utc))


def unit_model(store: RecorderStore, device: str) -> dict[str, Any]:
    for dev in store.devices():
        if dev["device"] == device:
            return dict(dev)
    raise KeyError(device)


def declared_nominal(dev: Mapping[str, Any], events: list[dict[str, Any]]) -> float | None:
    """The unit's declared nominal [V]: its site model's, else one its events carry."""
    model = dev.get("model") or {}
    for value in [model.get("nominal_v")] + [(e.get("payload") or {}).get("nominal_v")
                                             for e in events]:
        if isinstance(value, int | float) and not isinstance(value, bool) and value > 0:
            return float(value)
    return None


def bands_for(nominal_v: float, nominal_hz: float | None,
              measurement_point: str = "service") -> list[Band]:
    """The bands a unit's values are drawn against (``agent.verdicts.limits``): ANSI C84.1
    Range A and B at the measurement point for 60-Hz supplies, else EN 50160 ±10 % and
    +10 %/−15 %. Widest last."""
    point = measurement_point if measurement_point in ("service", "outlet") else "service"
    if standard_for(nominal_v, nominal_hz) == "ansi":
        return [ansi_band(nominal_v, "A", point), ansi_band(nominal_v, "B", point)]
    return [en50160_band(nominal_v), en50160_band(nominal_v, all_values=True)]


@dataclass(frozen=True)
class Trace:
    """A capture in volts with its Urms(1/2): ``t_ms`` (n,) [ms from the trigger], ``v``
    (n, channels) [V]; ``urms_t_ms`` (m,) [ms, window end] and ``urms`` (m, channels) [V]."""

    t_ms: F64
    v: F64
    urms_t_ms: F64
    urms: F64
    channels: tuple[str, ...]
    trigger: str


def capture_trace(capture: Capture, nominal_v: float, nominal_hz: float) -> Trace:
    """Volts and Urms(1/2) of a capture, computed from its samples with the measurement
    functions (:func:`agent.measurement.zerocross.fundamental_zero_crossings`,
    :func:`agent.measurement.rms.half_cycle_rms`; IEC 61000-4-30 Ed.3 clause 5.4.2). Without
    the preceding samples the first cycles have no crossings: Urms(1/2) starts where the
    crossing detector has settled."""
    v = capture.counts.astype(np.float64) * np.asarray(capture.scale, dtype=np.float64)
    v = v - v.mean(axis=0)  # DC removal over the whole capture (display only)
    rate = capture.sample_rate
    rel = (np.arange(v.shape[0]) + capture.first_index - capture.trigger_index) / rate * 1e3
    crossings, _ = fundamental_zero_crossings(v, rate, nominal_hz, math.sqrt(2.0) * nominal_v)
    if crossings.size >= 3:
        _, end, urms = half_cycle_rms(v, crossings)
        urms = urms if urms.ndim == 2 else urms[:, None]
        end_ms = (end + capture.first_index - capture.trigger_index) / rate * 1e3
    else:
        end_ms, urms = np.empty(0), np.empty((0, v.shape[1]))
    return Trace(rel, v, np.asarray(end_ms), np.asarray(urms), capture.channel_names,
                 capture.trigger)
