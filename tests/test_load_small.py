"""A small load in CI: 20 simulated agents with their own broker credentials through the real
Mosquitto (our broker-config) to one collector, then to two in one shared group, on
PostgreSQL: statuses, per-second summaries, 10-min aggregates and a few events, as an edge
sends them. Nothing lost, nothing stored twice, and with two collectors both take a share
(MQTT 5.0 cl. 4.8.2 shared subscriptions). The full size (200 agents, 5 minutes, capacity
per collector) is tests/bench/bench_load.py, on demand."""

from __future__ import annotations

from pathlib import Path

import pytest
from _load_helpers import Phase, pg_store, run_load
from _store_helpers import admin_dsn, pg_database

__all__ = ["pg_database"]


@pytest.mark.parametrize("collectors", [1, 2])
def test_small_load_nothing_lost_nothing_twice(tmp_path: Path, collectors: int,
                                               pg_database: str) -> None:
    phase = Phase(agents=20, ticks=12, tick_s=0.5)
    with pg_store(admin_dsn()) as url:
        result = run_load(tmp_path / "load", url, phase, collectors=collectors, publishers=2,
                          drain_timeout_s=60.0)
    # Each agent: an online status, 12 summaries, a 10-min aggregate and a heartbeat after
    # the tenth; every fourth agent one dip event (tests/_load_helpers.agent_messages).
    sent = {"summary": 20 * 12, "aggregate": 20, "status": 20 * 2, "event": 5}
    assert result.published_by_kind == sent
    assert result.published == sum(sent.values())
    assert result.lost == 0
    assert result.committed == result.published
    # Every type in its own table exactly as often as it was sent, every second once.
    assert result.stored_by_kind == sent
    assert result.duplicated == 0, result.duplicates
    assert result.records_stored == result.records_published == 20 * 12 * 60
    assert len(result.committed_by) == collectors
    assert all(n > 0 for n in result.committed_by)  # each collector took a share
    assert result.p50_ms > 0 and result.p99_ms >= result.p50_ms
