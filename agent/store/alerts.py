"""The alert tables of the recorder store: rule state, the delivery queue and the history.

``alert_state`` holds one row per (rule, subject) — the hysteresis state of a unit rule
(``clear``, ``pending``, ``raised``, ``clearing``) or ``notified`` for a one-shot notice — so a
collector restart neither raises an alert twice nor forgets to clear it. ``alert_queue`` holds
one row per alert and delivery channel; a row leaves the queue only once its channel has
delivered it (or refused it for good), so each channel is retried on its own. ``alert_log``
keeps every alert raised (the history a report or live page may show).

Rows are written by the collector inside the transaction that commits the messages that raised
them (see :class:`agent.store.recorder.RecorderStore`'s ``after_commit`` hook), or in the
periodic tick's own transaction for time-based rules. The functions here take a
:class:`~agent.store.db.Database` already inside a transaction unless they say otherwise.
"""

from __future__ import annotations

import json
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from agent.store.db import Database

#: Schema of the alert tables (a migration of :mod:`agent.store.recorder`).
MIGRATION = """
CREATE TABLE IF NOT EXISTS alert_state (
    rule TEXT NOT NULL,
    subject TEXT NOT NULL,
    site TEXT,
    device TEXT,
    state TEXT NOT NULL,
    pending_since {double},
    raised_at {double},
    absent_since {double},
    raises {bigint} NOT NULL DEFAULT 0,
    alert_id TEXT,
    updated_at {double} NOT NULL,
    PRIMARY KEY (rule, subject)
);
CREATE TABLE IF NOT EXISTS alert_queue (
    id {autoid},
    alert_id TEXT NOT NULL,
    channel TEXT NOT NULL,
    payload TEXT NOT NULL,
    created_at {double} NOT NULL,
    attempts INTEGER NOT NULL DEFAULT 0,
    next_try {double} NOT NULL,
    claimed_until {double},
    last_error TEXT,
    rejected INTEGER NOT NULL DEFAULT 0,
    UNIQUE (alert_id, channel)
);
CREATE INDEX IF NOT EXISTS alert_queue_due ON alert_queue (channel, rejected, id);
CREATE TABLE IF NOT EXISTS alert_log (
    alert_id TEXT PRIMARY KEY,
    rule TEXT NOT NULL,
    change TEXT NOT NULL,
    site TEXT,
    device TEXT,
    subject TEXT NOT NULL,
    t_utc {double} NOT NULL,
    payload TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS alert_log_t ON alert_log (t_utc)
"""

STATE_KEYS = ("state", "pending_since", "raised_at", "absent_since", "raises", "alert_id")


@dataclass(frozen=True)
class QueuedAlert:
    """One claimed row of the delivery queue."""

    id: int
    alert_id: str
    channel: str
    attempts: int
    alert: dict[str, Any]


def _lock(db: Database) -> str:
    return " FOR UPDATE" if db.dialect == "postgresql" else ""


def load_state(db: Database, rule: str, subject: str) -> dict[str, Any] | None:
    """The stored state of (rule, subject), row-locked on PostgreSQL until the transaction
    ends (two collectors judging the same unit apply their decisions one after the other)."""
    row = db.query_one("SELECT state, pending_since, raised_at, absent_since, raises, alert_id"
                       " FROM alert_state WHERE rule = ? AND subject = ?" + _lock(db),
                       (rule, subject))
    return None if row is None else dict(zip(STATE_KEYS, row, strict=True))


def save_state(db: Database, rule: str, subject: str, site: str | None, device: str | None,
               state: Mapping[str, Any], now: float) -> None:
    values = [state.get(k) for k in STATE_KEYS]
    values[4] = int(values[4] or 0)
    db.execute("INSERT INTO alert_state (rule, subject, site, device, state, pending_since,"
               " raised_at, absent_since, raises, alert_id, updated_at)"
               " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT (rule, subject) DO UPDATE"
               " SET state = excluded.state, pending_since = excluded.pending_since,"
               " raised_at = excluded.raised_at, absent_since = excluded.absent_since,"
               " raises = excluded.raises, alert_id = excluded.alert_id,"
               " updated_at = excluded.updated_at",
               (rule, subject, site, device, *values, now))


def active_subjects(db: Database) -> list[tuple[str, str]]:
    """(rule, subject) of every unit-rule state that is not plainly clear."""
    return [(r[0], r[1]) for r in db.query(
        "SELECT rule, subject FROM alert_state WHERE state IN ('pending', 'raised', 'clearing')"
        " ORDER BY rule, subject")]


def enqueue(db: Database, alert: Mapping[str, Any], channels: Sequence[str], now: float) -> None:
    """Log ``alert`` and queue it once per channel (idempotent on the alert id)."""
    text = json.dumps(alert, sort_keys=True, separators=(",", ":"))
    db.execute("INSERT INTO alert_log (alert_id, rule, change, site, device, subject, t_utc,"
               " payload) VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
               (alert["alert_id"], alert["rule"], alert["change"], alert.get("site"),
                alert.get("device"), alert["subject"], alert["t_utc"], text))
    for channel in channels:
        db.execute("INSERT INTO alert_queue (alert_id, channel, payload, created_at, next_try)"
                   " VALUES (?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
                   (alert["alert_id"], channel, text, now, now))


# --- delivery side (each call is its own transaction) -------------------------------------


def claim(db: Database, channel: str, now: float, *, limit: int = 50,
          lease_s: float = 120.0) -> list[QueuedAlert]:
    """Claim the channel's oldest rows, in queue order, up to the first one not yet due.

    Order matters (a unit's ``cleared`` must not overtake its ``raised`` on a retained
    topic), so a row waiting for its retry holds back the rows after it on that channel.
    """
    def work(db: Database) -> list[tuple[Any, ...]]:
        rows = db.query("SELECT id, alert_id, attempts, payload, next_try, claimed_until"
                        " FROM alert_queue WHERE channel = ? AND rejected = 0 ORDER BY id"
                        " LIMIT ?" + _lock(db), (channel, int(limit)))
        taken = []
        for row_id, alert_id, attempts, payload, next_try, claimed in rows:
            if next_try > now or (claimed is not None and claimed > now):
                break
            taken.append((row_id, alert_id, attempts, payload))
        for row_id, *_ in taken:
            db.execute("UPDATE alert_queue SET claimed_until = ? WHERE id = ?",
                       (now + lease_s, row_id))
        return taken

    return [QueuedAlert(int(r[0]), r[1], channel, int(r[2]), json.loads(r[3]))
            for r in db.run_in_transaction(work)]


def delivered(db: Database, row_id: int) -> None:
    """The channel has the alert: the row leaves the queue."""
    db.run_in_transaction(lambda d: d.execute("DELETE FROM alert_queue WHERE id = ?", (row_id,)))


def retry_later(db: Database, row_id: int, error: str, next_try: float) -> None:
    """Delivery failed for now: count the attempt and wait until ``next_try`` [s UTC]."""
    db.run_in_transaction(lambda d: d.execute(
        "UPDATE alert_queue SET attempts = attempts + 1, next_try = ?, claimed_until = NULL,"
        " last_error = ? WHERE id = ?", (next_try, error[:500], row_id)))


def release(db: Database, row_ids: Sequence[int] | None = None) -> None:
    """Give back claimed rows not tried in this pass; all claims when ``row_ids`` is None
    (the one sender starting up: a claim of a killed process must not hold the queue)."""
    def work(d: Database) -> None:
        if row_ids is None:
            d.execute("UPDATE alert_queue SET claimed_until = NULL WHERE claimed_until IS NOT NULL")
        for row_id in row_ids or ():
            d.execute("UPDATE alert_queue SET claimed_until = NULL WHERE id = ?", (row_id,))

    if row_ids is None or row_ids:
        db.run_in_transaction(work)


def reject(db: Database, row_id: int, error: str) -> None:
    """The channel refused the alert for good (e.g. HTTP 400): kept, marked, not retried."""
    db.run_in_transaction(lambda d: d.execute(
        "UPDATE alert_queue SET attempts = attempts + 1, rejected = 1, claimed_until = NULL,"
        " last_error = ? WHERE id = ?", (error[:500], row_id)))


def backlog(db: Database) -> dict[str, int]:
    """Undelivered rows per channel (rejected ones not counted)."""
    return {str(c): int(n) for c, n in db.query(
        "SELECT channel, COUNT(*) FROM alert_queue WHERE rejected = 0 GROUP BY channel")}


def history(db: Database, since_utc: float | None = None) -> list[dict[str, Any]]:
    """Every alert raised (oldest first), as delivered."""
    rows = db.query("SELECT payload FROM alert_log WHERE t_utc >= ? ORDER BY t_utc, alert_id",
                    (since_utc if since_utc is not None else -1e18,))
    return [json.loads(r[0]) for r in rows]
