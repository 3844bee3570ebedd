"""Fixtures and message builders for the recorder-store tests (imported by tests/test_store_*).

PostgreSQL: the server at ``HALFCYCLE_TEST_PG_DSN`` (default
postgresql://postgres@127.0.0.1:5432/postgres). Each test run creates a fresh database
``hc_test_<random>`` and drops it afterwards; each test gets its own schema in it. When the
server cannot be reached the PostgreSQL cases are skipped with the reason (they fail instead
when ``CI`` is set, since CI starts the server).
"""

from __future__ import annotations

import hashlib
import os
import uuid
from collections.abc import Iterator
from pathlib import Path
from typing import Any
from urllib.parse import quote, urlsplit, urlunsplit

import pytest

from agent.store.recorder import RecorderStore

DEFAULT_PG_DSN = "postgresql://postgres@127.0.0.1:5432/postgres"
BACKENDS = ["sqlite", "postgresql"]


def admin_dsn() -> str:
    return os.environ.get("HALFCYCLE_TEST_PG_DSN", DEFAULT_PG_DSN)


def _with_dbname(dsn: str, dbname: str, query: str = "") -> str:
    parts = urlsplit(dsn)
    return urlunsplit((parts.scheme, parts.netloc, "/" + dbname, query, ""))


@pytest.fixture(scope="session")
def pg_database() -> Iterator[str]:
    """URL of a fresh database for this test run; dropped at the end of the session."""
    psycopg = pytest.importorskip("psycopg")
    dsn = admin_dsn()
    try:
        admin = psycopg.connect(dsn, autocommit=True, connect_timeout=5)
    except psycopg.OperationalError as exc:
        reason = f"PostgreSQL not reachable at {dsn} (set HALFCYCLE_TEST_PG_DSN): {exc}"
        if os.environ.get("CI"):  # .ci/run starts the server: there, absence is a failure
            pytest.fail(reason)
        pytest.skip(reason)
    name = f"hc_test_{uuid.uuid4().hex[:12]}"
    admin.execute(f'CREATE DATABASE "{name}"')
    try:
        yield _with_dbname(dsn, name)
    finally:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.close()


@pytest.fixture(params=BACKENDS)
def store_url(request: pytest.FixtureRequest, tmp_path: Path) -> str:
    """A store URL on a real SQLite file or in a fresh PostgreSQL schema."""
    if request.param == "sqlite":
        return f"sqlite:///{tmp_path / 'recorder.db'}"
    return schema_url(request.getfixturevalue("pg_database"))


def schema_url(base: str) -> str:
    """A URL into a fresh schema of the test database ``base`` (isolates one test)."""
    import psycopg

    schema = f"t_{uuid.uuid4().hex[:12]}"
    with psycopg.connect(base, autocommit=True) as conn:
        conn.execute(f'CREATE SCHEMA "{schema}"')
    parts = urlsplit(base)
    return urlunsplit((parts.scheme, parts.netloc, parts.path,
                       "options=" + quote(f"-csearch_path={schema}"), ""))


@pytest.fixture
def store(store_url: str, tmp_path: Path) -> Iterator[RecorderStore]:
    s = RecorderStore(store_url, tmp_path / "captures")
    try:
        yield s
    finally:
        s.close()


# --- message builders (field names as in the collector brief) ---------------------------

def msg(mtype: str, seq: int, /, *, device: str = "dev-1", site: str = "site-1",
        epoch: str = "e1", **fields: Any) -> dict[str, Any]:
    return {"v": 1, "type": mtype, "device": device, "site": site, "epoch": epoch, "seq": seq,
            **fields}


def aggregate(seq: int, t_utc: float = 1_700_000_000.0, **kw: Any) -> dict[str, Any]:
    return msg("aggregate", seq, kind="10min", t_utc=t_utc, duration_s=600.0,
               rms=[230.1, 229.8], flagged=False, **kw)


def gap(seq: int, first: int, last: int, **kw: Any) -> dict[str, Any]:
    return msg("gap", seq, lane="bulk", first_seq=first, last_seq=last,
               count=last - first + 1, reason="outbox_full", **kw)


def event(seq: int, event_id: str, state: str, *, level_v: float = 150.0,
          end_utc: float | None = None, classifier_version: str = "1",
          **kw: Any) -> dict[str, Any]:
    start = 1_700_000_100.0
    return msg("event", seq, event_id=event_id, kind="dip", channels=[0], state=state,
               start_utc=start, end_utc=end_utc,
               duration_s=None if end_utc is None else end_utc - start,
               level_v=level_v, level_pu=level_v / 230.0,
               thresholds={"dip": 0.9, "swell": 1.1, "interruption": 0.05, "hysteresis": 0.02},
               classification={"ieee1159": "momentary_sag"},
               classifier_version=classifier_version, **kw)


def capture_chunks(first_seq: int, capture_id: str, event_id: str, payload: bytes,
                   n_chunks: int, **kw: Any) -> list[dict[str, Any]]:
    """Split ``payload`` into ``n_chunks`` capture messages with consecutive seqs."""
    sha = hashlib.sha256(payload).hexdigest()
    size = -(-len(payload) // n_chunks)
    return [msg("capture", first_seq + i, capture_id=capture_id, event_id=event_id, index=i,
                total=n_chunks, sha256=sha, data=payload[i * size:(i + 1) * size],
                sample_rate=7680.0, channel_names=["L1"], scale=[0.0125],
                trigger_utc=1_700_000_100.0, **kw)
            for i in range(n_chunks)]


def contiguous_upto(accounted: set[int], first_seq: int = 1) -> int:
    """Independent oracle: highest n with every seq first_seq..n accounted for."""
    n = first_seq - 1
    while n + 1 in accounted:
        n += 1
    return n


def mixed_stream(device: str = "dev-1", epoch: str = "e1", n_agg: int = 60,
                 seed: int = 7) -> list[dict[str, Any]]:
    """An invented stream with seqs 1..N: aggregates, two events (open then closed), one
    capture in 5 chunks and a gap notice covering two seqs that are never sent."""
    import random

    rng = random.Random(seed)
    out: list[dict[str, Any]] = []
    seq = 1

    def nxt() -> int:
        nonlocal seq
        seq += 1
        return seq - 1

    for i in range(n_agg):
        out.append(aggregate(nxt(), t_utc=1_700_000_000.0 + 600 * i, device=device, epoch=epoch))
        if i == 10:
            out.append(event(nxt(), f"{device}-ev-a", "open", device=device, epoch=epoch))
        if i == 20:
            out.append(event(nxt(), f"{device}-ev-a", "closed", end_utc=1_700_000_101.0,
                             device=device, epoch=epoch))
        if i == 30:
            payload = rng.randbytes(5000)
            chunks = capture_chunks(seq, f"{device}-cap", f"{device}-ev-a", payload, 5,
                                    device=device, epoch=epoch)
            out += chunks
            seq += len(chunks)
        if i == 40:
            dropped = (seq, seq + 1)
            seq += 2  # never sent
            out.append(gap(nxt(), *dropped, device=device, epoch=epoch))
    return out


def commit_in_random_batches(url: str, captures_dir: str, messages: list[dict[str, Any]],
                             seed: int, batch: int = 9) -> dict[str, int]:
    """Worker for the concurrency tests (threads or spawned processes): commit a shuffled copy
    of ``messages`` in batches from its own store connection; returns the last acks."""
    import random

    rng = random.Random(seed)
    order = list(messages)
    rng.shuffle(order)
    last: dict[str, int] = {}
    with RecorderStore(url, captures_dir) as store:
        for start in range(0, len(order), batch):
            for (device, epoch), upto in store.commit_batch(order[start:start + batch]).items():
                last[f"{device}/{epoch}"] = upto
    return last
