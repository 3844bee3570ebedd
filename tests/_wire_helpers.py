"""Sample wire messages for the wire tests and the bandwidth benchmark (values invented)."""

from __future__ import annotations

from typing import Any

import numpy as np
from scipy.signal import lfilter

from agent.events.types import Capture, Event, Thresholds
from agent.measurement.types import Aggregate
from agent.wire.codec import (
    Identity,
    ack_message,
    aggregate_body,
    capture_bodies,
    event_body,
    gap_body,
    status_body,
)
from agent.wire.records import SummaryBatcher
from agent.wire.topics import topic

IDENT = Identity(site="site-7", device="dev-0042", epoch="e20261201a")
T0 = 1_796_083_200.0  # 2026-12-01T00:00:00Z, invented scenario


def _ar1(rng: np.random.Generator, shape: tuple[int, ...], sigma: float, phi: float
         ) -> np.ndarray:
    """Mean-reverting noise x[i] = phi x[i-1] + e[i] along axis 0 (an AR(1) process)."""
    e = rng.normal(0, sigma, shape)
    out: np.ndarray = lfilter([1.0], [1.0, -phi], e, axis=0)
    return out


def synthetic_seconds(n: int, channels: int, rng: np.random.Generator, nominal: float = 230.0,
                      hz: float = 50.0) -> dict[str, np.ndarray]:
    """Noise-like per-second values (invented data; magnitudes are common practice for a
    home service): mean-reverting voltage wander (about 3 V standard deviation) plus three
    on/off loads per channel that switch every few minutes and pull the voltage down by
    0.8-2 V, Urms(1/2) spread within each second, frequency wander (about 20 mHz), THD near
    3 % and imbalance near 0.4 % drifting slowly, and a rare event flag."""
    wander = _ar1(rng, (n, channels), 0.15, 0.998)
    loads = np.zeros((n, channels))
    for _ in range(3):
        switching = rng.random((n, channels)) < 1 / 240
        on = np.cumsum(switching, axis=0) % 2
        loads -= on * rng.uniform(0.8, 2.0, channels)
    mean = nominal + wander + loads
    spread_lo = np.abs(rng.normal(0.3, 0.15, (n, channels)))
    spread_hi = np.abs(rng.normal(0.3, 0.15, (n, channels)))
    f = hz + _ar1(rng, (n,), 0.0015, 0.997) + rng.normal(0, 0.001, n)
    thd = 0.03 + _ar1(rng, (n, channels), 0.0002, 0.999)
    imb = np.abs(0.004 + _ar1(rng, (n,), 0.0001, 0.999))
    flags = np.where(rng.random(n) < 0.002, 1, 0)
    return {"rms_min": mean - spread_lo, "rms_mean": mean, "rms_max": mean + spread_hi,
            "hz": f, "thd": np.clip(thd, 0, 1), "imbalance": imb if channels > 1 else
            np.full(n, np.nan), "flags": flags}


def summary_bodies(seconds: int, channels: int, seed: int = 1, k: int = 60) -> list[dict[str, Any]]:
    rng = np.random.default_rng(seed)
    v = synthetic_seconds(seconds, channels, rng)
    batcher = SummaryBatcher([f"L{i + 1}" for i in range(channels)], k=k)
    t = T0 + np.arange(seconds, dtype=float)
    out = batcher.add_many(t, v["rms_min"], v["rms_mean"], v["rms_max"], v["hz"], v["thd"],
                           v["imbalance"], v["flags"])
    last = batcher.flush()
    return out + ([last] if last is not None else [])


def sample_event(ended: bool = True) -> Event:
    return Event(
        event_id="ev-20261201-0001", kind="dip", channels=(0, 1), start=1_234_567.5,
        start_utc=T0 + 3600.25, nominal_v=120.0, thresholds=Thresholds(), level_v=84.31,
        end=1_240_000.0 if ended else None, end_utc=T0 + 3600.25 + 0.7073 if ended else None,
        per_channel_level_v=(84.31, 101.2), partial_outage=False,
        sag_energy_s=0.3125 if ended else None, ended_by="recovery" if ended else None,
        time_error_s=0.002, sync_state="synced", enclosing_start_utc=T0 + 3600.0,
        classification={"ieee1159": "momentary sag", "itic": "no-interruption",
                        "semi_f47": "pass", "classifier_version": "cls-1.0",
                        "severity": 0.62, "cells": ["70-80", "0.5-1s"]},
    )


def sample_capture(samples: int = 4608, channels: int = 2, seed: int = 3) -> Capture:
    rng = np.random.default_rng(seed)
    n = np.arange(samples)
    wave = 0.9 * 32767 * np.sin(2 * np.pi * 50 * n / 7680.0)[:, None] \
        + rng.normal(0, 40, (samples, channels))
    counts = np.clip(np.rint(wave), -32768, 32767).astype(np.int16)
    counts[0, 0], counts[1, 0] = -32768, 32767  # extremes must survive bit-exact
    return Capture(
        capture_id="cap-ev-20261201-0001-start", event_id="ev-20261201-0001", trigger="start",
        first_index=1_234_567 - samples // 3, trigger_index=1_234_567, trigger_utc=T0 + 3600.25,
        sample_rate=7680.0, channel_names=tuple(f"L{i + 1}" for i in range(channels)),
        scale=np.array([0.0123, 0.0124][:channels]), counts=counts, pre_cycles=10,
        post_cycles=20, meta={"calibration": "cal-2026-11", "gain": {"L1": 1.002, "L2": 0.998}},
    )


def sample_bodies() -> dict[str, dict[str, Any]]:
    """One valid body of each device message type (plus a complete ack message)."""
    cap = capture_bodies(sample_capture(samples=200), topic=topic("site-7", "dev-0042", "capture"))
    return {
        "summary": summary_bodies(60, 2)[0],
        "aggregate": aggregate_body(Aggregate(kind="10min", t_utc=T0, duration_s=600.0,
                                              rms=(230.12, float("nan")), thd=(0.031, 0.029),
                                              flagged=True, count=3000), ["L1", "L2"]),
        "event": event_body(sample_event(), "ended", channel_names=["L1", "L2"]),
        "capture": cap[0],
        "status": status_body("heartbeat", agent_version="0.1.0", uptime_s=86400.5,
                              outbox_depth=3, sync="synced", time_error_s=0.001,
                              last_ran=T0 - 600, t=T0 + 60,
                              outbox_lanes={"events": 1, "trend": 2}),
        "gap": gap_body("trend", 100, 160, 61, "outbox_full", t=T0 + 120),
    }


def sample_messages() -> dict[str, dict[str, Any]]:
    msgs = {k: IDENT.stamp(b, seq=i + 1) for i, (k, b) in enumerate(sample_bodies().items())}
    msgs["ack"] = ack_message("site-7", "dev-0042", "e20261201a", 160, "collector-1", t=T0 + 130)
    return msgs


def json_paths(node: Any, prefix: tuple[Any, ...] = ()) -> list[tuple[Any, ...]]:
    """Every key/index path inside a decoded message (for mutation tests)."""
    out = [prefix] if prefix else []
    if isinstance(node, dict):
        for k, v in node.items():
            out += json_paths(v, (*prefix, k))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            out += json_paths(v, (*prefix, i))
    return out
