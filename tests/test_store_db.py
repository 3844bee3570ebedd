# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""The dialect layer and migrations on real SQLite files and PostgreSQL."""

from __future__ import annotations

import threading
from pathlib import Path

import pytest
from _store_helpers import pg_database, store_url  # noqa: F401  (pytest fixtures)

from agent.store.db import Database, StoreError, parse_url

MIGRATIONS = [
    (1, "CREATE TABLE t1 (id {bigint} PRIMARY KEY, note TEXT);"
        "CREATE INDEX t1_note ON t1 (note)"),
    (2, "CREATE TABLE t2 (id {autoid}, data {blob} NOT NULL, x {double})"),
]


def test_parse_url() -> None:
    assert parse_url("sqlite:///data/r.db") == ("sqlite", "data/r.db")
    assert parse_url("sqlite:////var/lib/r.db") == ("sqlite", "/var/lib/r.db")
    assert parse_url("postgresql://u@h:5432/db")[0] == "postgresql"
    for bad in ("sqlite://", "sqlite:///", "mysql://h/db", "r.db"):
        with pytest.raises(StoreError):
            parse_url(bad)


def test_sqlite_pragmas(tmp_path: Path) -> None:
    db = Database(f"sqlite:///{tmp_path / 'x.db'}")
    # SQLite documentation: journal_mode WAL, synchronous FULL = 2.
    assert db.query_one("PRAGMA journal_mode") == ("wal",)
    assert db.query_one("PRAGMA synchronous") == (2,)
    assert db.query_one("PRAGMA busy_timeout") == (30000,)
    db.close()


def test_migrations_step_by_step_and_again(store_url: str) -> None:
    db = Database(store_url)
    assert db.schema_version() == 0
    assert db.migrate(MIGRATIONS[:1]) == 1
    db.execute("INSERT INTO t1 (id, note) VALUES (?, ?)", (1, "50% of 'x'"))
    assert db.migrate(MIGRATIONS) == 2
    assert db.migrate(MIGRATIONS) == 2  # idempotent
    db.execute("INSERT INTO t2 (data, x) VALUES (?, ?)", (b"\x00\xff", 1.5))
    # A literal '%' in SQL text survives the ? -> %s translation for psycopg.
    assert db.query("SELECT note FROM t1 WHERE note LIKE '50%'") == [("50% of 'x'",)]
    assert [db.blob(b) for (b,) in db.query("SELECT data FROM t2")] == [b"\x00\xff"]
    assert db.query("SELECT version FROM schema_version ORDER BY version") == [(1,), (2,)]
    with pytest.raises(StoreError, match="newer"):
        db.migrate(MIGRATIONS[:1])
    db.close()


def test_failed_migration_leaves_nothing(store_url: str) -> None:
    db = Database(store_url)
    bad = [*MIGRATIONS, (3, "CREATE TABLE t3 (id INTEGER);CREATE TABLE t3 (id INTEGER)")]
    with pytest.raises(Exception):  # noqa: B017  (driver-specific error class)
        db.migrate(bad)
    assert db.schema_version() == 0  # one transaction: versions 1 and 2 rolled back as well
    assert db.migrate(MIGRATIONS) == 2
    db.close()


def test_rollback_on_error(store_url: str) -> None:
    db = Database(store_url)
    db.migrate(MIGRATIONS)
    with pytest.raises(RuntimeError), db.transaction():
        db.execute("INSERT INTO t1 (id, note) VALUES (?, ?)", (7, "x"))
        raise RuntimeError("boom")
    assert db.query("SELECT COUNT(*) FROM t1") == [(0,)]
    db.close()


def test_concurrent_first_migration(store_url: str) -> None:
    """Two collectors starting at once on an empty database both succeed; one applies."""
    errors: list[BaseException] = []
    start = threading.Barrier(2)

    def run() -> None:
        try:
            db = Database(store_url)
            start.wait(timeout=30)
            db.migrate(MIGRATIONS)
            db.close()
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=run) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=60)
    assert errors == []
    db = Database(store_url)
    assert db.query("SELECT version FROM schema_version ORDER BY version") == [(1,), (2,)]
    db.close()
