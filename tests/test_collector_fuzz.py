"""Fuzzed payloads never crash the collector; each bad one lands in dead letters with a
reason (property-based, hypothesis), and a good message next to them is still committed."""

from __future__ import annotations

import math
import tempfile
import time
from pathlib import Path

import msgpack
from _fleet_helpers import COLLECTOR
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent.collect.service import Collector, Received, check_message, load_collector_settings
from agent.store.recorder import RecorderStore
from agent.wire import codec
from agent.wire.errors import WireError

TOPIC = "hc/v1/invented-street/home-1/event"


def _collector(tmp_path: Path) -> tuple[Collector, RecorderStore]:
    cfg = tmp_path / "collector.toml"
    (tmp_path / "password").write_text("x")
    cfg.write_text(
        COLLECTOR.format(
            cid="fuzz",
            url=f"sqlite:///{tmp_path / 'r.db'}",
            captures=tmp_path / "captures",
            port=1,
            extra="",
        )
    )
    s = load_collector_settings(cfg)
    return Collector(s), RecorderStore(s.store_url, s.captures_dir)


def _good(seq: int) -> bytes:
    body = codec.gap_body("bulk", 1, 1, 1, "test", t=time.time())
    return codec.encode(codec.Identity("invented-street", "home-1", "e1").stamp(body, seq))


_json_like = st.recursive(
    st.none()
    | st.booleans()
    | st.integers(-(2**63), 2**63 - 1)
    | st.floats(allow_nan=True, allow_infinity=True)
    | st.text(max_size=20)
    | st.binary(max_size=20),
    lambda inner: (
        st.lists(inner, max_size=5) | st.dictionaries(st.text(max_size=10), inner, max_size=6)
    ),
    max_leaves=20,
)

_envelope = st.fixed_dictionaries(
    {
        "v": st.sampled_from([1, 2, 0, "1"]),
        "type": st.sampled_from(["event", "summary", "x"]),
        "device": st.sampled_from(["home-1", "home-2", ""]),
        "site": st.just("invented-street"),
        "epoch": st.just("e1"),
        "seq": st.integers(-2, 10**6),
    },
    optional={"start_utc": st.floats(allow_nan=True), "level_v": st.floats()},
)

payloads = (
    st.binary(max_size=200)
    | _json_like.map(lambda x: msgpack.packb(x, use_bin_type=True))
    | _envelope.map(lambda x: msgpack.packb(x, use_bin_type=True))
)


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(batch=st.lists(payloads, min_size=1, max_size=6))
def test_fuzzed_batches_never_crash_and_are_dead_lettered(
    tmp_path: Path, batch: list[bytes]
) -> None:
    collector, store = _collector(Path(tempfile.mkdtemp(dir=tmp_path)))
    try:
        before = store.count("dead_letters")
        received_before = store.count("received")
        recs = [Received(i + 1, 1, TOPIC, p, 0, time.time()) for i, p in enumerate(batch)]
        collector.process_batch(store, recs)
        dead = store.count("dead_letters") - before
        # Nothing is dropped silently: a payload is dead-lettered unless it decodes into a
        # valid message for this topic (random bytes and shapes practically never do).
        valid = 0
        for p in batch:
            try:
                check_message(codec.decode(p), TOPIC, time.time(), 300.0)
                valid += 1
            except WireError:
                pass
        # ... except a repeat of an (epoch, seq) already seen in the batch, which the store
        # treats as a redelivery of the first.
        seen: set[tuple[object, object]] = set()
        repeats = 0
        for p in batch:
            try:
                m = msgpack.unpackb(p, raw=False)
            except Exception:
                continue
            if isinstance(m, dict) and "seq" in m:
                key = (repr(m.get("epoch")), repr(m.get("seq")))
                repeats += key in seen
                seen.add(key)
        assert len(batch) - valid - repeats <= dead <= len(batch) - valid
        # Seqs accounted for: at most one per distinct (epoch, seq) that came in.
        assert store.count("received") - received_before <= len(seen)
        for row in store.dead_letters()[before:]:
            assert row["reason"] and isinstance(row["raw"], bytes)
    finally:
        store.close()


def test_each_bad_kind_has_its_own_reason(tmp_path: Path) -> None:
    collector, store = _collector(tmp_path)
    try:
        ident = codec.Identity("invented-street", "home-1", "e1")
        nan_body = codec.gap_body("bulk", 1, 1, 1, "test", t=time.time())
        nan_body["t"] = math.nan
        other_device = codec.Identity("invented-street", "home-2", "e1").stamp(
            codec.gap_body("bulk", 1, 1, 1, "test", t=time.time()), 5
        )
        future = ident.stamp(codec.gap_body("bulk", 1, 1, 1, "x", t=time.time() + 86400 * 365), 6)
        unknown_v = dict(ident.stamp(codec.gap_body("bulk", 1, 1, 1, "x", t=time.time()), 7), v=99)
        cases = {
            "not_msgpack": b"\xc1\x00garbage",
            "non_finite": msgpack.packb(ident.stamp(nan_body, 4)),
            "identity": msgpack.packb(other_device),
            "future_timestamp": msgpack.packb(future),
            "unknown_version": msgpack.packb(unknown_v),
            "oversized": b"\x00" * (collector.settings.max_payload_bytes + 1),
        }
        gap_topic = "hc/v1/invented-street/home-1/gap"
        recs = [
            Received(i + 1, 1, gap_topic, p, 0, time.time()) for i, p in enumerate(cases.values())
        ]
        recs.append(Received(99, 1, gap_topic, _good(1), 0, time.time()))
        collector.process_batch(store, recs)
        reasons = sorted(row["reason"].split(":")[0] for row in store.dead_letters())
        assert reasons == sorted(cases), reasons
        # Every dead letter is filed under the device whose topic it came in on. One whose
        # envelope matches its topic also has its seq accounted for (a resend would fail the
        # same way); one that names another device, or is not msgpack, does not.
        assert {row["device"] for row in store.dead_letters()} == {"home-1"}
        seqs = {r[0] for r in store.db.query("SELECT seq FROM received WHERE device = 'home-1'")}
        assert seqs == {1, 4, 6, 7}  # good, non-finite, future, unknown version
        # The good message beside them is committed.
        assert store.committed_upto("home-1", "e1") == 1
        assert collector.stats.dead_letters == len(cases)
    finally:
        store.close()
