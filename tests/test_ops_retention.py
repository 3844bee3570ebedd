"""Retention (issue 9) on a real SQLite file and in PostgreSQL: ``[retention]`` ages per table,
the prune the collector schedules, and the export queue left alone while an exporter needs
it. Ages are moved by the pruner's clock, not by waiting."""

from __future__ import annotations

import time
from pathlib import Path

import pytest
from _mqtt_helpers import Broker
from _store_helpers import capture_chunks, event, msg, pg_database, store_url
from test_ops_collector import broker, captured_logs, events, publish_gaps, write_config

from agent.config import ConfigError, Section
from agent.ops.retention import DAY_S, Pruner, RetentionSettings
from agent.store.recorder import RecorderStore

__all__ = ["broker", "pg_database", "store_url"]


def _fill(store: RecorderStore) -> None:
    store.commit_batch([msg("summary", q, t_utc=time.time() - 10 + q) for q in range(1, 6)]
                       + [event(6, "ev-1", "open")]
                       + capture_chunks(7, "cap-1", "ev-1", b"W" * 400, 2))
    store.dead_letter("hc/v1/site-1/dev-1/summary", b"\xc1", "not_msgpack: test",
                      device="dev-1", received_at=time.time())


def _counts(store: RecorderStore) -> dict[str, int]:
    return {t: store.count(t) for t in ("trend", "received", "dead_letters", "captures",
                                        "export_queue", "events")}


def test_nothing_young_is_pruned(store_url: str, tmp_path: Path) -> None:
    with RecorderStore(store_url, tmp_path / "caps") as store:
        _fill(store)
        before = _counts(store)
        removed = Pruner(RetentionSettings(), exporting=False).prune(store)
        assert set(removed) == {"trend", "received", "dead_letters", "captures",
                                "export_queue"}
        after = _counts(store)
        # Everything here is seconds old: younger than every retention age.
        assert {k: v for k, v in after.items() if k != "export_queue"} == \
            {k: v for k, v in before.items() if k != "export_queue"}


@pytest.mark.parametrize("exporting", [False, True])
def test_old_rows_and_files_go_but_the_export_queue_stays_for_an_exporter(
        store_url: str, tmp_path: Path, exporting: bool) -> None:
    with RecorderStore(store_url, tmp_path / "caps") as store:
        _fill(store)
        before = _counts(store)
        assert before["export_queue"] > 0 and before["captures"] == 1
        files = list((tmp_path / "caps").glob("*.bin"))
        assert len(files) == 1
        later = time.time() + 400 * DAY_S  # past every default age
        pruner = Pruner(RetentionSettings(), exporting=exporting, clock=lambda: later)
        removed = pruner.prune(store)
        after = _counts(store)
        assert after["trend"] == after["dead_letters"] == after["captures"] == 0
        assert after["received"] == 0  # every seq is at or below committed_upto
        assert not files[0].exists()
        assert after["events"] == before["events"]  # events are kept
        # The export queue: kept while an exporter drains it, pruned when none is configured.
        assert after["export_queue"] == (before["export_queue"] if exporting else 0)
        assert ("export_queue" in removed) is (not exporting)
        assert store.committed_upto("dev-1", "e1") == 8  # bookkeeping still answers


def test_received_rows_above_the_committed_seq_are_kept(store_url: str, tmp_path: Path
                                                        ) -> None:
    with RecorderStore(store_url, tmp_path / "caps") as store:
        store.commit_batch([msg("summary", q, t_utc=float(q)) for q in (1, 2, 5, 6)])
        assert store.committed_upto("dev-1", "e1") == 2
        later = time.time() + 400 * DAY_S
        Pruner(RetentionSettings(), exporting=True, clock=lambda: later).prune(store)
        # 5 and 6 still tell a redelivery apart from a first delivery.
        assert store.count("received") == 2


def test_settings_and_the_older_trend_key() -> None:
    with pytest.raises(ConfigError, match=r"retention\.captures_days: unknown key"):
        RetentionSettings.from_section(Section({"captures_days": 1}, "c.toml", "retention"))
    with pytest.raises(ConfigError, match=r"retention\.trend_days: must be >= 0"):
        RetentionSettings.from_section(Section({"trend_days": -1}, "c.toml", "retention"))
    r = RetentionSettings.from_section(Section({}, "c.toml", "retention"), trend_days=30.0)
    assert r.trend_days == 30.0 and r.capture_days == 365.0
    r = RetentionSettings.from_section(Section({"trend_days": 7}, "c.toml", "retention"),
                                       trend_days=30.0)
    assert r.trend_days == 7.0


def test_the_collector_schedules_the_prune(broker: Broker, tmp_path: Path) -> None:
    from _fleet_helpers import CollectorThread

    cfg = write_config(tmp_path, broker.port, broker.collector_password,
                       extra="[retention]\ninterval_s = 1\ndead_letter_days = 0\n")
    with captured_logs() as out, CollectorThread(cfg) as col:
        publish_gaps(broker, "unit-1", range(1, 4))
        assert col.ready.is_set()
        deadline = time.monotonic() + 20
        while time.monotonic() < deadline and sum(
                e["event"] == "retention_pruned" for e in events(out)) < 2:
            publish_gaps(broker, "unit-1", range(100, 101))  # the prune runs after a commit
            time.sleep(0.6)
    pruned = [e for e in events(out) if e["event"] == "retention_pruned"]
    assert len(pruned) >= 2  # once per interval
    assert "dead_letters" not in pruned[0]  # 0 days: kept forever
    assert {"trend", "received", "captures", "export_queue"} <= set(pruned[0])
