# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""Two collectors committing overlapping batches of the same streams at once."""

from __future__ import annotations

import multiprocessing
import threading
from pathlib import Path
from typing import Any

import pytest
from _store_helpers import (  # noqa: F401  (pytest fixtures are used by name)
    commit_in_random_batches,
    mixed_stream,
    pg_database,
    store_url,
)

from agent.store.recorder import RecorderStore


def _expected(messages: list[dict[str, Any]]) -> dict[str, int]:
    return {
        "aggregates": sum(m["type"] == "aggregate" for m in messages),
        "gaps": sum(m["type"] == "gap" for m in messages),
        "received": len(messages),
        "last_seq": max(m["seq"] for m in messages),
    }


def _check(url: str, captures: Path, streams: dict[tuple[str, str], list[dict[str, Any]]],
           acks: list[dict[str, int]]) -> None:
    every = [m for ms in streams.values() for m in ms]
    exp = _expected(every)
    with RecorderStore(url, captures) as s:
        # No duplicates: one row per distinct (device, epoch, seq) whatever the interleaving.
        assert s.count("received") == exp["received"]
        assert s.count("aggregates") == exp["aggregates"]
        assert s.count("gaps") == exp["gaps"]
        dup = s.db.query("SELECT device, epoch, seq, COUNT(*) FROM received"
                         " GROUP BY device, epoch, seq HAVING COUNT(*) > 1")
        assert dup == []
        events = s.events()
        assert len(events) == len(streams) and all(e["state"] == "closed" for e in events)
        caps = s.captures()
        assert len(caps) == len(streams) and s.count("capture_chunks") == 0
        for cap in caps:
            assert Path(cap["path"]).stat().st_size == cap["size"] == 5000
        assert s.dead_letters() == []
        kinds = [r.kind for r in s.claim_exports(10_000)]
        assert kinds.count("aggregate") == exp["aggregates"]
        assert kinds.count("capture") == len(streams) and kinds.count("gap") == exp["gaps"]
        for (device, epoch), ms in streams.items():
            last = max(m["seq"] for m in ms)
            assert s.committed_upto(device, epoch) == last
            # The later of the two collectors' last batches saw everything committed.
            assert max(a[f"{device}/{epoch}"] for a in acks) == last


@pytest.mark.parametrize("workers", [2])
def test_two_threads_overlapping_batches(store_url: str, tmp_path: Path, workers: int) -> None:
    streams = {("dev-1", "e1"): mixed_stream("dev-1", "e1", seed=1),
               ("dev-2", "e7"): mixed_stream("dev-2", "e7", seed=2)}
    every = [m for ms in streams.values() for m in ms]
    RecorderStore(store_url, tmp_path / "caps").close()  # migrate once up front
    acks: list[dict[str, int]] = []
    errors: list[BaseException] = []
    start = threading.Barrier(workers)

    def run(seed: int) -> None:
        try:
            start.wait(timeout=30)
            acks.append(commit_in_random_batches(store_url, str(tmp_path / "caps"), every, seed))
        except BaseException as exc:  # reported below; a thread must not die silently
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(seed,)) for seed in range(workers)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert not any(t.is_alive() for t in threads)
    assert errors == []
    _check(store_url, tmp_path / "caps", streams, acks)


def test_two_processes_on_postgresql(pg_database: str, tmp_path: Path) -> None:
    """Separate processes (separate interpreters and connections) on one PostgreSQL db."""
    import psycopg

    with psycopg.connect(pg_database, autocommit=True) as conn:
        conn.execute("CREATE SCHEMA proc_test")
    url = pg_database + "?options=-csearch_path%3Dproc_test"
    streams = {("dev-3", "e1"): mixed_stream("dev-3", "e1", seed=3)}
    every = streams[("dev-3", "e1")]
    RecorderStore(url, tmp_path / "caps").close()
    ctx = multiprocessing.get_context("spawn")
    with ctx.Pool(2) as pool:
        results = [pool.apply_async(commit_in_random_batches,
                                    (url, str(tmp_path / "caps"), every, seed, 5))
                   for seed in (11, 12)]
        acks = [r.get(timeout=120) for r in results]
    _check(url, tmp_path / "caps", streams, acks)


def test_shared_subscription_split(store_url: str, tmp_path: Path) -> None:
    """Each message reaches exactly one of two collectors (an MQTT shared subscription):
    chunks of one capture and neighbouring seqs land on different collectors at once."""
    from _store_helpers import capture_chunks

    messages: list[dict[str, Any]] = []
    seq = 1
    for k in range(16):
        chunks = capture_chunks(seq, f"cap-{k}", f"ev-{k}", bytes([k]) * 4000, 4)
        messages += chunks
        seq += len(chunks)
    # Round-robin: chunk i of every capture goes to collector i % 2.
    parts = [messages[0::2], messages[1::2]]
    RecorderStore(store_url, tmp_path / "caps").close()
    errors: list[BaseException] = []
    acks: list[dict[str, int]] = []
    start = threading.Barrier(2)

    def run(part: list[dict[str, Any]]) -> None:
        try:
            start.wait(timeout=30)
            last: dict[str, int] = {}
            with RecorderStore(store_url, tmp_path / "caps") as s:
                for m in part:  # one message per batch: the most interleaving
                    for (d, e), upto in s.commit_batch([m]).items():
                        last[f"{d}/{e}"] = upto
            acks.append(last)
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(p,)) for p in parts]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=120)
    assert errors == [] and not any(t.is_alive() for t in threads)
    with RecorderStore(store_url, tmp_path / "caps") as s:
        # Every capture completes exactly once although no collector saw all its chunks.
        assert s.count("captures") == 16 and s.count("capture_chunks") == 0
        assert s.committed_upto("dev-1", "e1") == seq - 1
        assert max(a["dev-1/e1"] for a in acks) == seq - 1


def test_two_exporters_claim_disjoint_rows(store_url: str, tmp_path: Path) -> None:
    """Claims never hand one row to two exporters; together they see every row once."""
    from _store_helpers import aggregate

    with RecorderStore(store_url, tmp_path / "caps") as s:
        s.commit_batch([aggregate(q) for q in range(1, 201)])
    claimed: list[list[int]] = [[], []]
    errors: list[BaseException] = []
    start = threading.Barrier(2)

    def run(k: int) -> None:
        try:
            with RecorderStore(store_url, tmp_path / "caps") as s:
                start.wait(timeout=30)
                for _ in range(100):  # bounded: 200 rows, 7 per claim
                    rows = s.claim_exports(7)
                    if not rows:
                        break
                    claimed[k] += [r.id for r in rows]
                    s.complete_exports([r.id for r in rows])
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=run, args=(k,)) for k in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert errors == []
    assert not set(claimed[0]) & set(claimed[1])
    assert len(claimed[0]) + len(claimed[1]) == 200
    # Each exporter's claims come in increasing id order (the queue is ordered by id).
    assert all(c == sorted(c) for c in claimed)
