"""Bytes per device per day over MQTT at the defaults (run on demand).

    python tests/bench/bench_bandwidth.py [--heartbeat 600] [--properties 0]

Counts whole MQTT 5 packets (MQTT 5.0 cl. 3.3 PUBLISH: fixed header, remaining length,
topic, packet id, property length + properties, payload; cl. 3.4 PUBACK: 4 bytes when the
reason is Success with no properties) for the trend stream: per-second summaries (K = 60),
10-min aggregates and status heartbeats, plus the collector's ack going down. TCP/IP and TLS
framing are not counted; PINGREQ is not needed while something is published within every
keep-alive interval. Per-second values are invented, noise-like (tests/_wire_helpers.py).
The baseline is the same records as plain JSON (values rounded to the same resolution),
sent the same way. Captures are reported separately per event.
"""

from __future__ import annotations

import argparse
import json
import math
import sys
import time
from pathlib import Path
from typing import Any

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

import jsonschema
from _wire_helpers import (
    IDENT,
    T0,
    sample_capture,
    sample_event,
    sample_messages,
    synthetic_seconds,
)

from agent.measurement.types import Aggregate
from agent.resources import schemas_dir
from agent.wire.codec import (
    DEFAULT_MAX_PACKET,
    ack_message,
    aggregate_body,
    capture_bodies,
    encode,
    event_body,
    publish_packet_size,
    status_body,
    summary_arrays,
)
from agent.wire.records import DEFAULT_K, SummaryBatcher, default_rms_exponent
from agent.wire.topics import ack_topic, topic
from agent.wire.validate import default_validator

DAY = 86400
PUBACK = 4  # MQTT 5.0 cl. 3.4.2.1: remaining length 2 when Success and no properties
BUDGET = 1.5e6  # bytes per device per day (project requirement)
SITE, DEVICE = IDENT.site, IDENT.device


def packet(kind: str, payload: int, props: int) -> int:
    return publish_packet_size(len(topic(SITE, DEVICE, kind)), payload, props) + PUBACK


def json_summary(body: dict[str, Any]) -> bytes:
    """The same records as plain JSON: arrays of decimal numbers, null where missing."""
    s = summary_arrays(IDENT.stamp(body, seq=0))

    def col(a: np.ndarray, digits: int) -> list[Any]:
        return [None if math.isnan(x) else round(float(x), digits) for x in a]

    doc = {"v": 1, "type": "summary", "device": DEVICE, "site": SITE, "epoch": IDENT.epoch,
           "seq": 123456, "t0": s.t0, "period_s": s.period_s, "n": int(s.t.shape[0]),
           "channels": list(s.channels),
           "rms_min": [col(s.rms_min[:, c], 2) for c in range(len(s.channels))],
           "rms_mean": [col(s.rms_mean[:, c], 2) for c in range(len(s.channels))],
           "rms_max": [col(s.rms_max[:, c], 2) for c in range(len(s.channels))],
           "thd": [col(s.thd[:, c], 4) for c in range(len(s.channels))],
           "hz": col(s.hz, 3), "imbalance": col(s.imbalance, 4),
           "flags": [int(x) for x in s.flags]}
    return json.dumps(doc, separators=(",", ":")).encode()


def json_plain(msg: dict[str, Any]) -> bytes:
    return json.dumps(msg, separators=(",", ":"), default=str).encode()


# The clock state every summary, aggregate and capture carries (agent/publish/edge.py).
CLOCK = {"sync": "synced", "error_s": 0.0012}


def day_of_trend(channels: int, heartbeat_s: int, props: int, ack_every: int = 1,
                 rms_exp: int = -2) -> list[tuple[str, int, int, int]]:
    """Rows (what, count/day, bytes/day msgpack, bytes/day JSON)."""
    rng = np.random.default_rng(2026)
    # 1 ch: 230 V 50 Hz; 2 ch: 120/240 V 60 Hz split phase; 3 ch: 230/400 V 50 Hz.
    v = synthetic_seconds(DAY, channels, rng, nominal=120.0 if channels == 2 else 230.0,
                          hz=60.0 if channels == 2 else 50.0)
    names = [f"L{i + 1}" for i in range(channels)]
    batcher = SummaryBatcher(names, k=DEFAULT_K, exponents={"rms": rms_exp})
    t = T0 + np.arange(DAY, dtype=float)
    bodies = batcher.add_many(t, v["rms_min"], v["rms_mean"], v["rms_max"], v["hz"], v["thd"],
                              v["imbalance"], v["flags"])
    last = batcher.flush()
    if last is not None:
        bodies.append(last)
    for b in bodies:  # as the edge sends them: with the clock state of the data
        b["clock"] = dict(CLOCK)
    seq = 10**6  # a realistic multi-byte seq
    s_mp = sum(packet("summary", len(encode(IDENT.stamp(b, seq + i))), props)
               for i, b in enumerate(bodies))
    s_js = sum(packet("summary", len(json_summary(b)), props) for b in bodies)

    n_agg = DAY // 600
    # Individual harmonics h2..h40 and Pst on every 10-min aggregate, Plt on one in 12 (the
    # 2-h marks): invented levels, odd orders 0.2-4 %, even and high orders below 0.3 %.
    orders = np.arange(2, 41)
    level = np.where(orders % 2 == 1, 0.04 / orders**0.8, 0.002 / orders**0.5)
    harmonics = tuple(tuple(level * rng.uniform(0.5, 1.5, orders.shape[0]))
                      for _ in range(channels))
    agg = aggregate_body(Aggregate(kind="10min", t_utc=T0, duration_s=600.0,
                                   rms=tuple(230.0 + rng.normal(0, 1, channels)),
                                   thd=tuple(0.03 + rng.normal(0, 0.001, channels)),
                                   flagged=False, count=3000, harmonics=harmonics,
                                   pst=tuple(rng.uniform(0.2, 0.9, channels)),
                                   lamp="230V"), names)
    a_msg = IDENT.stamp({**agg, "clock": dict(CLOCK)}, seq)
    p_msg = {**a_msg, "flicker": {**a_msg["flicker"],
                                  "plt": list(rng.uniform(0.2, 0.9, channels))}}
    n_plt = n_agg // 12
    a_mp = ((n_agg - n_plt) * packet("aggregate", len(encode(a_msg)), props)
            + n_plt * packet("aggregate", len(encode(p_msg)), props))
    a_js = ((n_agg - n_plt) * packet("aggregate", len(json_plain(a_msg)), props)
            + n_plt * packet("aggregate", len(json_plain(p_msg)), props))

    n_hb = DAY // heartbeat_s
    st = IDENT.stamp(status_body("heartbeat", agent_version="0.1.0", uptime_s=123456.789,
                                 outbox_depth=2, sync="synced", time_error_s=0.0012,
                                 last_ran=T0 - 600.5, t=T0 + 0.25), seq)
    h_mp = n_hb * packet("status", len(encode(st)), props)
    h_js = n_hb * packet("status", len(json_plain(st)), props)

    ack = ack_message(SITE, DEVICE, IDENT.epoch, seq, "collector-1", t=T0 + 1.5)
    ack_len = publish_packet_size(len(ack_topic(SITE, DEVICE)), len(encode(ack)), props) + PUBACK
    ack_js = publish_packet_size(len(ack_topic(SITE, DEVICE)), len(json_plain(ack)), props) \
        + PUBACK
    n_ack = len(bodies) // ack_every  # assumed: one ack per ack_every committed summaries
    return [
        (f"summary (K={DEFAULT_K}, 1-s records)", len(bodies), s_mp, s_js),
        ("aggregate (10-min)", n_agg, a_mp, a_js),
        (f"status heartbeat ({heartbeat_s} s)", n_hb, h_mp, h_js),
        (f"ack from collector (down, 1 per {ack_every} summaries)", n_ack, n_ack * ack_len,
         n_ack * ack_js),
    ]


def capture_rows(max_packet: int, props: int) -> list[tuple[str, int, int, int]]:
    rows = []
    for hz, channels in ((50.0, 1), (50.0, 2), (60.0, 2)):
        samples = round(30 * 7680.0 / hz)  # 10 pre + 20 post cycles (agent/pipeline.py)
        cap = sample_capture(samples=samples, channels=channels)
        bodies = capture_bodies(cap, topic=topic(SITE, DEVICE, "capture"), max_packet=max_packet)
        sizes = [packet("capture", len(encode(IDENT.stamp(b, 10**6 + i))), props)
                 for i, b in enumerate(bodies)]
        assert max(s - PUBACK for s in sizes) <= max_packet
        raw = samples * channels * 2
        rows.append((f"capture {channels} ch {hz:g} Hz, {samples} samples ({raw} B raw)",
                     len(bodies), sum(sizes), 0))
    ev = event_body(sample_event(), "ended", channel_names=["L1", "L2"])
    ev_bytes = packet("event", len(encode(IDENT.stamp(ev, 10**6))), props)
    rows.append(("event message (started + ended)", 2, 2 * ev_bytes, 0))
    return rows


def validator_speed() -> tuple[float, float]:
    """Messages per second: our validator vs jsonschema on the same messages."""
    msgs = list(sample_messages().values())
    schemas = {k: json.loads((schemas_dir() / f"{k}.schema.json").read_text())
               for k in default_validator().kinds}
    js = {k: jsonschema.Draft202012Validator(s) for k, s in schemas.items()}
    ours = default_validator()
    reps = 200

    def rate(fn: Any) -> float:
        t0 = time.perf_counter()
        for _ in range(reps):
            for m in msgs:
                fn(m)
        return reps * len(msgs) / (time.perf_counter() - t0)

    return rate(ours.validate), rate(lambda m: js[m["type"]].validate(m))


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--heartbeat", type=int, default=600, help="heartbeat interval [s]")
    ap.add_argument("--properties", type=int, default=0,
                    help="MQTT 5 property bytes per PUBLISH (0: none)")
    ap.add_argument("--max-packet", type=int, default=DEFAULT_MAX_PACKET)
    ap.add_argument("--ack-every", type=int, default=1, help="summaries per collector ack")
    ap.add_argument("--rms-exp", type=int, default=None,
                    help="RMS unit exponent (default: the edge's, -2 = 10 mV up to 2 channels, "
                    "-1 = 0.1 V for 3)")
    ap.add_argument("--channels", type=int, nargs="+", default=[1, 2, 3])
    args = ap.parse_args()
    ok = True
    for channels in args.channels:
        for hb in sorted({args.heartbeat, 60}, reverse=True):
            rms_exp = default_rms_exponent(channels) if args.rms_exp is None else args.rms_exp
            rows = day_of_trend(channels, hb, args.properties, args.ack_every, rms_exp)
            up = sum(r[2] for r in rows[:3])
            total = sum(r[2] for r in rows)
            total_js = sum(r[3] for r in rows)
            print(f"\n## {channels} channel(s), heartbeat {hb} s, {args.properties} B properties, "
                  f"RMS unit 1e{rms_exp} V")
            print("| stream | packets/day | msgpack B/day | JSON B/day | JSON/msgpack |")
            print("|---|---|---|---|---|")
            for what, n, mp, js in rows:
                print(f"| {what} | {n} | {mp:,} | {js:,} | {js / mp:.2f} |")
            verdict = "within" if total <= BUDGET else "OVER"
            print(f"| **total (up {up:,} + down)** | | **{total:,}** | {total_js:,} | "
                  f"{total_js / total:.2f} |")
            print(f"{verdict} the {BUDGET / 1e6:.1f} MB/day budget "
                  f"({100 * total / BUDGET:.0f} %)")
            if hb == args.heartbeat and total > BUDGET:
                ok = False  # the budget is stated for the 1- and 2-channel defaults
    for max_packet in (args.max_packet, 4096):
        print(f"\n## per event (captures at start and end each), max packet {max_packet} B")
        print("| item | packets | bytes incl. MQTT |")
        print("|---|---|---|")
        for what, n, size, _ in capture_rows(max_packet, args.properties):
            print(f"| {what} | {n} | {size:,} |")
    ours_rate, js_rate = validator_speed()
    print(f"\nvalidation: ours {ours_rate:,.0f} msg/s, jsonschema {js_rate:,.0f} msg/s "
          f"(ratio {ours_rate / js_rate:.1f}x, same run, same messages)")
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
