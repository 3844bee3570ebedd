"""Exporter error handling against a scripted loopback HTTP server speaking the v2 write API.

Status codes follow the InfluxDB 2.x /api/v2/write reference: 204 written, 400 malformed line
protocol, 401 unauthorised, 413 too large, 422 unprocessable, 429/503 overloaded or down.
"""

from __future__ import annotations

import json
import urllib.parse
from collections.abc import Sequence
from pathlib import Path
from typing import Any, NamedTuple

import pytest
from _tsdb_helpers import PlainSqliteQueue, ScriptedWriteServer, SqliteExportQueue, free_port

from agent.store.export import TimeSeriesExporter

T0 = 1764600000.0  # invented


def status_row(device: str, i: int) -> dict[str, object]:
    return {"site": "s1", "device": device, "t": T0 + i, "state": "online", "uptime_s": i}


def make(queue: object, url: str, **kw: object) -> TimeSeriesExporter:
    return TimeSeriesExporter(queue, url, "tok-123", "org1", "bucket1",  # type: ignore[arg-type]
                              backoff_initial_s=0.5, backoff_max_s=4.0, jitter=0.0, **kw)  # type: ignore[arg-type]


def test_write_request_is_synchronous_with_explicit_precision() -> None:
    queue = SqliteExportQueue()
    queue.enqueue("status", status_row("d1", 0))
    with ScriptedWriteServer(lambda body: (204, "")) as server, make(queue, server.url) as exp:
        step = exp.export_once()
        # synchronous: when export_once returns the server already has the body
        assert step.completed == 1 and step.points == 1 and queue.pending() == 0
        ((path, auth, body),) = server.requests
    url = urllib.parse.urlsplit(path)
    query = urllib.parse.parse_qs(url.query)
    assert url.path == "/api/v2/write"  # InfluxDB v2 write endpoint
    assert query["precision"] == ["ms"] and query["bucket"] == ["bucket1"]
    assert query["org"] == ["org1"]
    assert auth == "Token tok-123"  # InfluxDB 2.x token scheme
    assert body.strip() == ("hc_status,device=d1,site=s1,sync=none online=1i,uptime_s=0 "
                            "1764600000000")


def test_server_error_keeps_rows_and_backs_off_bounded() -> None:
    queue = SqliteExportQueue()
    for i in range(5):
        queue.enqueue("status", status_row("d1", i))
    answers = [503] * 6 + [204]
    with ScriptedWriteServer(lambda body: (answers.pop(0), "down")) as server, \
            make(queue, server.url, batch_size=3) as exp:
        delays = []
        for _ in range(6):
            step = exp.export_once()
            assert step.error is not None and "503" in step.error
            delays.append(step.retry_in_s)
            assert queue.pending() == 5 and exp.held == 3  # nothing completed, nothing lost
        # doubling from 0.5 s, capped at 4 s (common practice: bounded exponential back-off)
        assert delays == [0.5, 1.0, 2.0, 4.0, 4.0, 4.0]
        step = exp.export_once()
        assert step.error is None and step.completed == 3 and queue.pending() == 2
        assert exp.consecutive_failures == 0
        # the held batch was retried as it was: the same 3 bodies every time
        bodies = {b for _, _, b in server.requests}
        assert len(bodies) == 1 and len(server.requests) == 7


def test_batch_written_in_chunks_completed_chunk_by_chunk() -> None:
    queue = SqliteExportQueue()
    for i in range(10):
        queue.enqueue("status", status_row("d1", i))
    answers = [204, 204, 503, 204, 204]
    with ScriptedWriteServer(lambda body: (answers.pop(0), "")) as server, \
            make(queue, server.url, max_points_per_write=3) as exp:
        step = exp.export_once()
        # chunks of 3 lines: two written and completed, the third refused → 4 rows held
        assert step.completed == 6 and step.error is not None
        assert queue.pending() == 4 and exp.held == 4
        step = exp.export_once()
        assert step.completed == 4 and queue.pending() == 0
        sizes = [len(b.splitlines()) for _, _, b in server.requests]
    assert sizes == [3, 3, 3, 3, 1]


def test_unreachable_server_keeps_rows() -> None:
    queue = SqliteExportQueue()
    queue.enqueue("status", status_row("d1", 0))
    with make(queue, f"http://127.0.0.1:{free_port()}", timeout_s=2.0) as exp:
        step = exp.export_once()
    assert step.error is not None and step.retry_in_s > 0
    assert queue.pending() == 1 and queue.rejected() == []


def test_unauthorised_is_kept_not_rejected() -> None:
    queue = SqliteExportQueue()
    queue.enqueue("status", status_row("d1", 0))
    with ScriptedWriteServer(lambda body: (401, '{"code":"unauthorized"}')) as server, \
            make(queue, server.url) as exp:
        step = exp.export_once()
    assert step.error is not None and "401" in step.error
    assert queue.pending() == 1 and queue.rejected() == []  # an operator fixes the token


def test_malformed_refusal_isolates_the_bad_row() -> None:
    queue = SqliteExportQueue()
    ids = [queue.enqueue("status", status_row("bad" if i == 5 else "d1", i)) for i in range(8)]

    def respond(body: str) -> tuple[int, str]:
        return (400, '{"code":"invalid"}') if "device=bad" in body else (204, "")

    with ScriptedWriteServer(respond) as server, make(queue, server.url) as exp:
        step = exp.export_once()
        written = [line for _, _, b in server.requests if "device=bad" not in b
                   for line in b.splitlines()]
    assert step.error is None and step.completed == 7 and step.rejected == 1
    assert queue.pending() == 0
    ((rid, kind, reason),) = queue.rejected()
    assert rid == ids[5] and kind == "status" and "400" in reason
    assert len(written) == 7 and len(set(written)) == 7  # each good point written (once here)


def test_bad_payload_rejected_others_written() -> None:
    queue = SqliteExportQueue()
    queue.enqueue("status", status_row("d1", 0))
    queue.enqueue("event", {"site": "s1", "device": "d1", "kind": "sag", "start_utc": T0,
                            "level_pu": 0.5})
    with ScriptedWriteServer(lambda body: (204, "")) as server, make(queue, server.url) as exp:
        step = exp.export_once()
    assert step.completed == 1 and step.rejected == 1 and queue.pending() == 0
    ((_, kind, reason),) = queue.rejected()
    assert kind == "event" and "kind must be one of" in reason


def test_dead_letter_file_when_queue_cannot_reject(tmp_path: Path) -> None:
    queue = PlainSqliteQueue()
    with pytest.raises(ValueError, match="dead_letter_path"):
        make(queue, "http://127.0.0.1:1")
    queue.inner.enqueue("summary", {"site": "s1", "device": "d1", "t0": T0})
    dead = tmp_path / "dead.jsonl"
    with ScriptedWriteServer(lambda body: (204, "")) as server, \
            make(queue, server.url, dead_letter_path=dead) as exp:
        step = exp.export_once()
    assert step.rejected == 1 and queue.inner.pending() == 0
    (record,) = [json.loads(line) for line in dead.read_text().splitlines()]
    assert record["kind"] == "summary" and record["payload"]["device"] == "d1"
    assert "channels" in record["reason"]


def test_drain_stops_at_timeout_with_rows_kept() -> None:
    queue = SqliteExportQueue()
    queue.enqueue("status", status_row("d1", 0))
    slept: list[float] = []
    with ScriptedWriteServer(lambda body: (503, "")) as server, make(queue, server.url) as exp:
        stats = exp.drain(timeout_s=0.5, sleep=slept.append)
    assert not stats.drained and stats.failures >= 1 and queue.pending() == 1
    assert all(0 < s <= 0.5 for s in slept)  # never sleeps past the deadline


class RowWithReceipt(NamedTuple):
    id: int
    kind: str
    payload: dict[str, Any]
    created_at: float


class ObjectQueue:
    """Rows as objects with a receive time (``created_at``), as a store may return them."""

    def __init__(self, rows: list[RowWithReceipt]) -> None:
        self.rows = rows
        self.completed: list[int] = []

    def claim_exports(self, limit: int) -> list[RowWithReceipt]:
        return [r for r in self.rows if r.id not in self.completed][:limit]

    def complete_exports(self, ids: Sequence[int]) -> None:
        self.completed.extend(ids)

    def reject_exports(self, ids: Sequence[int], reason: str) -> None:
        raise AssertionError(f"nothing should be rejected: {reason}")


def test_object_rows_and_will_timed_by_receipt() -> None:
    will = {"site": "s1", "device": "d1", "t": T0 - 3600.0, "state": "offline"}
    queue = ObjectQueue([RowWithReceipt(1, "status", will, T0 + 7.0)])
    with ScriptedWriteServer(lambda body: (204, "")) as server, make(queue, server.url) as exp:
        assert exp.export_once().completed == 1
        ((_, _, body),) = server.requests
    assert queue.completed == [1]
    assert body.strip() == "hc_status,device=d1,site=s1,sync=none online=0i 1764600007000"


def test_constructor_validates() -> None:
    queue = SqliteExportQueue()
    with pytest.raises(ValueError, match="precision"):
        TimeSeriesExporter(queue, "http://127.0.0.1:1", "t", "o", "b", "m")  # type: ignore[arg-type]
    with pytest.raises(ValueError, match="batch_size"):
        TimeSeriesExporter(queue, "http://127.0.0.1:1", "t", "o", "b", batch_size=0)
    with pytest.raises(ValueError, match="max_points_per_write"):
        TimeSeriesExporter(queue, "http://127.0.0.1:1", "t", "o", "b", max_points_per_write=0)
