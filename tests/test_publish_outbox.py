"""The durable outbox without a broker: identity, acknowledgement, size bound, quarantine."""

from __future__ import annotations

import sqlite3
import threading
from pathlib import Path

import msgpack
import pytest
from _mqtt_helpers import SITE, body_factory
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent.publish.outbox import Lane, Outbox, OutboxError, OutboxLimits
from agent.wire import codec

BULK = f"hc/v1/{SITE}/dev-a/summary"
EVENT = f"hc/v1/{SITE}/dev-a/event"


def _open(tmp_path: Path, name: str = "o.db", **kw: object) -> Outbox:
    return Outbox(tmp_path / name, "dev-a", SITE, **kw)  # type: ignore[arg-type]


def test_seq_contiguous_across_lanes_and_reopen(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ids = [ob.put(EVENT if i % 3 == 0 else BULK, b"x", Lane(0 if i % 3 == 0 else 1))
           for i in range(10)]
    ob.close()
    ob = _open(tmp_path)
    ids += ob.put_many([(BULK, b"y", Lane.BULK)] * 5)
    # one counter per epoch across lanes: 1, 2, ... with no hole (module contract)
    assert [m.seq for m in ids] == list(range(1, 16))
    assert {m.epoch for m in ids} == {ob.epoch}


def test_new_file_new_epoch(tmp_path: Path) -> None:
    a, b = _open(tmp_path, "a.db"), _open(tmp_path, "b.db")
    assert a.epoch != b.epoch  # 64 random bits each: equal with probability 2**-64


def test_payload_factory_sees_its_identity(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    mid = ob.put(BULK, body_factory("summary"))
    row = ob.due(1)[0]
    body = msgpack.unpackb(row.payload)
    assert (body["seq"], body["epoch"], body["device"]) == (mid.seq, ob.epoch, "dev-a")


def test_wrong_device_refused(tmp_path: Path) -> None:
    _open(tmp_path).close()
    with pytest.raises(OutboxError):
        Outbox(tmp_path / "o.db", "dev-b", SITE)


def test_priority_lane_sent_first(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ob.put_many([(BULK, b"b", Lane.BULK)] * 3 + [(EVENT, b"e", Lane.PRIORITY)] * 2)
    assert [r.seq for r in ob.due(5)] == [4, 5, 1, 2, 3]


def test_rows_leave_only_on_ack_of_own_epoch(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ob.put_many([(BULK, b"x", Lane.BULK)] * 6)
    ob.mark_published([1, 2, 3, 4, 5, 6])
    assert ob.pending_count() == 6  # published is not delivered
    assert ob.acknowledge("0123456789abcdef", 6) == 0  # another epoch (older card)
    assert ob.acknowledge(ob.epoch, 4) == 4
    assert ob.pending_count() == 2
    assert ob.acknowledge(ob.epoch, 3) == 0  # an older retained ack changes nothing
    assert ob.acknowledge(ob.epoch, 99) == 2  # beyond what was issued: capped
    assert ob.stats().acked_seq == 6


def test_resend_after_ack_timeout_with_backoff(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ob.put(BULK, b"x")
    ob.mark_published([1], now=1000.0, ack_timeout_s=10.0)
    assert ob.due(5, now=1009.0) == []
    assert [r.seq for r in ob.due(5, now=1010.0)] == [1]
    ob.mark_published([1], now=1010.0, ack_timeout_s=10.0)  # attempt 2 waits twice as long
    assert ob.due(5, now=1029.0) == []
    assert [r.seq for r in ob.due(5, now=1030.0)] == [1]
    assert ob.due(5, now=1030.0, include_overdue=False) == []
    ob.mark_published([1], now=1030.0, ack_timeout_s=10.0, ack_timeout_max_s=25.0)
    assert [r.seq for r in ob.due(5, now=1055.0)] == [1]  # capped at the maximum
    assert ob.requeue_unacknowledged() == 1
    assert [r.attempts for r in ob.due(5, now=1030.0, include_overdue=False)] == [3]


def test_bound_drops_bulk_first_and_announces(tmp_path: Path) -> None:
    ob = _open(tmp_path, limits=OutboxLimits(max_rows=40, max_bytes=10**7, low_water=0.5))
    put: dict[int, Lane] = {}
    for i in range(100):
        lane = Lane.PRIORITY if i % 10 == 0 else Lane.BULK
        put[ob.put(EVENT if lane == Lane.PRIORITY else BULK, body_factory("x"), lane).seq] = lane
    st = ob.stats()
    assert st.rows <= 40
    db = sqlite3.connect(tmp_path / "o.db")
    kept = dict(db.execute("SELECT seq, lane FROM outbox WHERE kind = 'data'").fetchall())
    events = [s for s, lane in put.items() if lane == Lane.PRIORITY]
    # no event dropped while bulk remained (module contract)
    assert len(events) == 10 and all(s in kept for s in events)
    notices = [codec.decode(p) for (p,) in db.execute(
        "SELECT payload FROM outbox WHERE kind = 'gap' ORDER BY seq")]
    assert notices, "drops must be announced"
    covered: set[int] = set()
    for n in notices:  # validated against schemas/gap.schema.json by codec.decode
        assert n["reason"] == "outbox_full" and n["lane"] == "bulk"
        covered.update(range(n["first_seq"], n["last_seq"] + 1))
        assert n["count"] <= n["last_seq"] - n["first_seq"] + 1  # gap schema
    # every data seq is either still in the outbox or covered by a notice, and no notice
    # covers a row that is still to be sent (gap schema: those "will never arrive")
    assert set(put) <= set(kept) | covered
    assert not covered & set(kept)
    assert st.dropped_rows == 100 - len(kept)
    assert sum(n["count"] for n in notices) == st.dropped_rows


def test_bound_drops_events_only_when_no_bulk_left(tmp_path: Path) -> None:
    ob = _open(tmp_path, limits=OutboxLimits(max_rows=20, max_bytes=10**7))
    ob.put_many([(EVENT, b"e", Lane.PRIORITY)] * 30)
    notices = [codec.unpack(r.payload) for r in ob.due(50) if r.kind == "gap"]
    assert notices and {n["lane"] for n in notices} == {"priority"}
    assert ob.stats().rows <= 20


def test_byte_bound(tmp_path: Path) -> None:
    ob = _open(tmp_path, limits=OutboxLimits(max_rows=10**6, max_bytes=20_000))
    for _ in range(50):
        ob.put(BULK, b"z" * 1000)
    assert ob.stats().bytes <= 20_000 and ob.stats().dropped_rows > 0


def test_quarantine_announces_and_keeps_row(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ob.put_many([(BULK, b"x", Lane.BULK)] * 3)
    assert ob.quarantine(2, "broker refused: Not authorized (0x87)")
    assert ob.quarantined() == [(2, BULK, "broker refused: Not authorized (0x87)")]
    due = ob.due(10)
    assert 2 not in [r.seq for r in due]  # never retried
    gap = codec.decode(next(r.payload for r in due if r.kind == "gap"))
    assert (gap["first_seq"], gap["last_seq"], gap["count"], gap["reason"]) == (2, 2, 1,
                                                                                 "refused")
    ob.acknowledge(ob.epoch, 4)
    assert ob.pending_count() == 0 and len(ob.quarantined()) == 1


def test_heartbeat_survives_reopen(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    assert ob.previous_run is None
    ob.heartbeat(now=1234.5)
    ob.close()
    assert _open(tmp_path).previous_run == 1234.5



def test_planned_stop_is_remembered_until_the_next_run_heartbeats(tmp_path: Path) -> None:
    # Issue 7 item 5: a clean stop marks itself; the next start reads "planned". Any run
    # after it (its heartbeat) turns the mark stale, so a later crash reads "unplanned".
    ob = _open(tmp_path)
    assert ob.previous_stop is None  # first start ever
    ob.heartbeat(now=100.0)
    ob.mark_planned_stop(now=200.0)
    ob.close()
    again = _open(tmp_path)
    assert (again.previous_run, again.previous_stop) == (200.0, "planned")
    again.heartbeat(now=300.0)  # the next run started (and then died without a clean stop)
    again.close()
    third = _open(tmp_path)
    assert (third.previous_run, third.previous_stop) == (300.0, "unplanned")
    third.close()

def test_two_writers_share_one_counter(tmp_path: Path) -> None:
    # SQLite WAL + BEGIN IMMEDIATE: two connections never hand out the same seq
    a, b = _open(tmp_path), _open(tmp_path)
    seqs: list[int] = []
    lock = threading.Lock()

    def write(ob: Outbox) -> None:
        for _ in range(50):
            s = ob.put(BULK, b"x").seq
            with lock:
                seqs.append(s)

    threads = [threading.Thread(target=write, args=(o,)) for o in (a, b)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(60)
    assert sorted(seqs) == list(range(1, 101))
    assert a.integrity_check() == "ok"  # SQLite PRAGMA integrity_check


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=st.lists(st.tuples(st.sampled_from(["bulk", "event", "deliver", "quarantine"]),
                              st.integers(1, 8)), min_size=1, max_size=60))
def test_gap_accounting_invariants(tmp_path_factory: pytest.TempPathFactory,
                                   ops: list[tuple[str, int]]) -> None:
    """Whatever happens, the collector can account for every seq (gap schema semantics):
    each seq is still in the outbox, or was delivered, or lies in a notice's range, and no
    notice range covers a row that is still to be sent."""
    ob = Outbox(tmp_path_factory.mktemp("h") / "o.db", "dev-a", SITE,
                limits=OutboxLimits(max_rows=12, max_bytes=10**7, low_water=0.6))
    delivered: set[int] = set()
    accounted: set[int] = set()
    for op, n in ops:
        if op in ("bulk", "event"):
            lane = Lane.BULK if op == "bulk" else Lane.PRIORITY
            ob.put_many([(BULK if op == "bulk" else EVENT, b"p", lane)] * n)
        elif op == "deliver":  # a collector receives the next n due rows, in order
            for row in ob.due(n, include_overdue=False):
                delivered.add(row.seq)
                accounted.add(row.seq)
                if row.kind == "gap":
                    g = codec.decode(row.payload)
                    accounted.update(range(g["first_seq"], g["last_seq"] + 1))
            top = 0
            while top + 1 in accounted:
                top += 1
            ob.acknowledge(ob.epoch, top)
        else:
            rows = ob.due(1, include_overdue=False)
            if rows and rows[0].kind == "data":
                ob.quarantine(rows[0].seq, "test", "refused")
        db = ob._db  # white-box check of the stored state
        present = {s: (k, q) for s, k, q in db.execute(
            "SELECT seq, kind, quarantined FROM outbox")}
        covered: set[int] = set()
        for (p,) in db.execute("SELECT payload FROM outbox WHERE kind = 'gap'"):
            g = codec.decode(p)
            rng = set(range(g["first_seq"], g["last_seq"] + 1))
            assert not {s for s in rng if s in present and present[s][1] is None}
            covered |= rng
        issued = ob.stats().next_seq - 1
        acked = ob.stats().acked_seq
        for s in range(1, issued + 1):
            assert s in present or s <= acked or s in covered or s in delivered, s


def test_foreign_file_is_a_clear_error_and_left_alone(tmp_path: Path) -> None:
    path = tmp_path / "o.db"
    path.write_bytes(b"this is not an SQLite database" * 100)
    with pytest.raises(OutboxError, match="cannot use as an outbox"):
        Outbox(path, "dev-a", SITE)
    assert path.read_bytes().startswith(b"this is not")  # nothing overwritten


def test_failed_payload_rolls_back_the_whole_batch(tmp_path: Path) -> None:
    ob = _open(tmp_path)
    ob.put(BULK, b"first")

    def broken(mid: object) -> bytes:
        raise ValueError("encoder failed")

    with pytest.raises(ValueError):
        ob.put_many([(BULK, b"ok", Lane.BULK), (BULK, broken, Lane.BULK)])
    with pytest.raises(OutboxError):
        ob.put(BULK, lambda mid: "not bytes")  # type: ignore[arg-type,return-value]
    # nothing half-written, and no sequence number burnt: the next message is seq 2
    assert ob.pending_count() == 1 and ob.put(BULK, b"second").seq == 2
