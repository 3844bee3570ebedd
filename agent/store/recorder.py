"""The collector's recorder store: devices, aggregates, trend, events, captures, gaps,
outage windows, dead letters, idempotent receipt bookkeeping and the export queue, over SQLite
or PostgreSQL.

Every decoded device message has an envelope ``v, type, device, site, epoch, seq``; ``seq``
counts contiguously from ``first_seq`` within one ``epoch`` at the source. :meth:`commit_batch`
writes a whole batch in ONE transaction and returns, per touched ``(device, epoch)``, the
highest contiguous committed seq (``committed_upto``), counting seqs announced by ``gap``
messages as accounted for. The collector publishes that as its retained ack, so the edge may
drop those messages from its outbox: nothing is acknowledged before it is durable.

Speed: each message is encoded to JSON once, and its receipt, trend, aggregate and export rows
are written in bulk (``executemany``) at the end of the batch. A batch is first applied
without per-message savepoints; only if something in it is refused is that attempt undone and
the batch applied again with one savepoint per message (still in the same transaction).

Outage windows (rules in :mod:`agent.store.outages`) are kept one per report, from a
device's restart report (a sequenced online status with ``last_ran``, unless it says
``last_stop = "planned"``: a clean stop and start is no outage) and from each event closed
with ``ended_by = "power_loss"``; a Last Will only marks the device offline, and so does a
planned stop (the device's status then says ``reason = "planned_stop"``).

Concurrency: several collectors may share one PostgreSQL database. Each batch first locks the
``streams`` rows of the streams it touches, in sorted order (no deadlock cycles), so batches of
the same stream are applied one after another and each sees the other's committed rows. That
also serialises the capture chunks of one capture (they travel in one stream), so staging in
``capture_chunks`` completes exactly once whichever collectors received the chunks.
"""

from __future__ import annotations

import binascii
import functools
import hashlib
import json
import math
import os
import re
import time
import uuid
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from contextlib import suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

import msgpack
import numpy as np

from agent.events.types import Capture, dip_duration_of
from agent.store import alerts as _alerts
from agent.store import trend as trend_codec
from agent.store.db import Database, StoreError, describe_url, first_line
from agent.store.outages import (
    OutageWindow,
    SiteOutage,
    device_outage_windows,
    last_gasp_window,
    restart_window,
)
from agent.store.outages import site_outages as _site_outages

MESSAGE_TYPES = ("summary", "aggregate", "event", "capture", "status", "gap")
EVENT_STATES = ("open", "closed")
# The event schema says ``change: started | ended``; ``state: open | closed`` is accepted too.
_CHANGE_STATE = {"started": "open", "ended": "closed"}
DEVICE_STATES = ("online", "offline", "unknown")
# Status fields kept with the device (the latest report wins).
STATUS_KEYS = ("state", "t", "agent_version", "uptime_s", "last_ran", "outbox_depth", "clock",
               "reason", "last_stop", "thd_max_order")
ENVELOPE_KEYS = ("v", "type", "device", "site", "epoch", "seq")
CHUNK_KEYS = ("capture_id", "event_id", "index", "total", "sha256", "data")
# Presence messages (retained status, MQTT will) carry this seq, outside the sequence.
PRESENCE_SEQ = 0
# The wire's limits (schemas/*.schema.json $defs): seq stays exact in JSON; ids are topic levels.
MAX_SEQ = 2**53 - 1
ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}\Z")
SITE_MODEL_KEYS = ("nominal_v", "nominal_hz", "service_type", "channel_names",
                   "measurement_point", "feeder", "transformer", "labels")

#: The schema version that added ``outage_windows`` (older stores are backfilled).
_OUTAGE_WINDOWS_VERSION = 2

_MIGRATIONS: list[tuple[int, str]] = [
    (1, """
CREATE TABLE IF NOT EXISTS devices (
    device TEXT PRIMARY KEY,
    site TEXT NOT NULL,
    model TEXT NOT NULL DEFAULT '',
    status TEXT NOT NULL DEFAULT '',
    first_seen {double} NOT NULL,
    last_seen {double} NOT NULL,
    state TEXT NOT NULL DEFAULT 'unknown',
    state_since {double} NOT NULL
);
CREATE TABLE IF NOT EXISTS streams (
    device TEXT NOT NULL,
    epoch TEXT NOT NULL,
    committed_upto {bigint} NOT NULL,
    first_seen {double} NOT NULL,
    updated_at {double} NOT NULL,
    PRIMARY KEY (device, epoch)
);
CREATE TABLE IF NOT EXISTS received (
    device TEXT NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    type TEXT NOT NULL,
    received_at {double} NOT NULL,
    PRIMARY KEY (device, epoch, seq)
);
CREATE TABLE IF NOT EXISTS aggregates (
    device TEXT NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    site TEXT NOT NULL,
    kind TEXT,
    t_utc {double},
    duration_s {double},
    payload TEXT NOT NULL,
    received_at {double} NOT NULL,
    PRIMARY KEY (device, epoch, seq)
);
CREATE INDEX IF NOT EXISTS aggregates_device_t ON aggregates (device, t_utc);
CREATE TABLE IF NOT EXISTS trend (
    device TEXT NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    site TEXT NOT NULL,
    t_utc {double},
    payload TEXT NOT NULL,
    received_at {double} NOT NULL,
    PRIMARY KEY (device, epoch, seq)
);
CREATE INDEX IF NOT EXISTS trend_t ON trend (t_utc);
CREATE TABLE IF NOT EXISTS events (
    event_id TEXT PRIMARY KEY,
    device TEXT NOT NULL,
    site TEXT NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    kind TEXT,
    state TEXT NOT NULL,
    channels TEXT NOT NULL,
    start_utc {double},
    end_utc {double},
    duration_s {double},
    level_v {double},
    level_pu {double},
    thresholds TEXT NOT NULL,
    classification TEXT NOT NULL,
    classifier_version TEXT,
    payload TEXT NOT NULL,
    first_received {double} NOT NULL,
    updated_at {double} NOT NULL
);
CREATE INDEX IF NOT EXISTS events_device_start ON events (device, start_utc);
CREATE TABLE IF NOT EXISTS captures (
    capture_id TEXT PRIMARY KEY,
    event_id TEXT,
    device TEXT NOT NULL,
    site TEXT NOT NULL,
    sha256 TEXT NOT NULL,
    size {bigint} NOT NULL,
    file_name TEXT NOT NULL,
    meta TEXT NOT NULL,
    completed_at {double} NOT NULL
);
CREATE INDEX IF NOT EXISTS captures_event ON captures (event_id);
CREATE TABLE IF NOT EXISTS capture_chunks (
    capture_id TEXT NOT NULL,
    idx INTEGER NOT NULL,
    total INTEGER NOT NULL,
    sha256 TEXT NOT NULL,
    event_id TEXT,
    device TEXT NOT NULL,
    site TEXT NOT NULL,
    data {blob} NOT NULL,
    meta TEXT NOT NULL,
    received_at {double} NOT NULL,
    PRIMARY KEY (capture_id, idx)
);
CREATE TABLE IF NOT EXISTS gaps (
    device TEXT NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    site TEXT NOT NULL,
    lane TEXT,
    first_seq {bigint} NOT NULL,
    last_seq {bigint} NOT NULL,
    count {bigint},
    reason TEXT,
    payload TEXT NOT NULL,
    received_at {double} NOT NULL,
    PRIMARY KEY (device, epoch, seq)
);
CREATE INDEX IF NOT EXISTS gaps_range ON gaps (device, epoch, last_seq);
CREATE TABLE IF NOT EXISTS dead_letters (
    id {autoid},
    topic TEXT NOT NULL,
    raw {blob} NOT NULL,
    reason TEXT NOT NULL,
    device TEXT,
    site TEXT,
    received_at {double} NOT NULL
);
CREATE TABLE IF NOT EXISTS export_queue (
    id {autoid},
    kind TEXT NOT NULL,
    device TEXT NOT NULL,
    site TEXT NOT NULL,
    ref TEXT NOT NULL,
    payload TEXT NOT NULL,
    created_at {double} NOT NULL,
    claimed_until {double},
    claim_token TEXT
)
"""),
    # Outage windows from restart reports and last-gasp (power-loss) events, one per report:
    # a device's latest status alone would lose them (the next status overwrites it).
    # ``slack_s``: the end uncertainty of a last-gasp window (merging tolerance).
    (2, """
CREATE TABLE IF NOT EXISTS outage_windows (
    id {autoid},
    device TEXT NOT NULL,
    site TEXT NOT NULL,
    start_utc {double} NOT NULL,
    end_utc {double} NOT NULL,
    source TEXT NOT NULL CHECK (source IN ('restart', 'last_gasp')),
    ref TEXT NOT NULL,
    slack_s {double} NOT NULL DEFAULT 0,
    received_at {double} NOT NULL,
    UNIQUE (device, source, ref)
);
CREATE INDEX IF NOT EXISTS outage_windows_site ON outage_windows (site, start_utc)
"""),
]


#: The schema version that keeps per-second trend as packed msgpack rows (older stores are
#: brought forward by :meth:`RecorderStore._migrate_packed_trend`).
_PACKED_TREND_VERSION = 3
#: Per-second trend as the packed arrays received (agent.store.trend), keyed for "one unit
#: over a period" (primary key) with an index for "all units at one moment". The JSON table
#: of versions 1-2 is renamed, converted row by row and dropped within the migration.
#: On PostgreSQL the table is partitioned by time (one partition per UTC week, created on
#: demand by the commit path); dropping old partitions is the retention.
_TREND_V3_COLUMNS = """
    device TEXT NOT NULL,
    t_utc {double} NOT NULL,
    epoch TEXT NOT NULL,
    seq {bigint} NOT NULL,
    site TEXT NOT NULL,
    n INTEGER NOT NULL,
    data {blob} NOT NULL,
    received_at {double} NOT NULL"""
_TREND_V3 = {
    "sqlite": f"""
ALTER TABLE trend RENAME TO trend_json;
DROP INDEX IF EXISTS trend_t;
CREATE TABLE trend ({_TREND_V3_COLUMNS},
    PRIMARY KEY (device, t_utc, epoch, seq)
);
CREATE INDEX trend_t ON trend (t_utc)
""",
    "postgresql": f"""
ALTER TABLE trend RENAME TO trend_json;
ALTER TABLE trend_json RENAME CONSTRAINT trend_pkey TO trend_json_pkey;
DROP INDEX IF EXISTS trend_t;
CREATE TABLE trend ({_TREND_V3_COLUMNS},
    PRIMARY KEY (device, t_utc, epoch, seq)
) PARTITION BY RANGE (t_utc);
CREATE INDEX trend_t ON trend (t_utc)
"""}
#: Rollups of the per-second trend, computed at commit time (agent.store.trend.rollup): per
#: unit, channel and 10-min interval (UTC days are folded from them when read), the counts,
#: extremes and sums a verdict over
#: a period needs. Applied once per message (the commit path deduplicates), so redelivery
#: changes nothing. Stores older than this are backfilled from their trend rows. The pu
#: counts use the unit's nominal when the seconds were committed; the row keeps the first
#: nominal it was counted against (a unit re-declared mid-interval mixes the two).
_ROLLUP_VERSION = 4
#: The schema version that added alert rule state, delivery queue and history
#: (agent/store/alerts.py).
_ALERTS_VERSION = 5
_ROLLUP_V4 = """
CREATE TABLE IF NOT EXISTS trend_rollup (
    device TEXT NOT NULL,
    span_s INTEGER NOT NULL,
    t_utc {double} NOT NULL,
    channel INTEGER NOT NULL,
    seconds {bigint} NOT NULL,
    flagged {bigint} NOT NULL,
    sum_v {double} NOT NULL,
    sum_sq_v2 {double} NOT NULL,
    min_v {double},
    max_v {double},
    low_v {double},
    peak_v {double},
    nominal_v {double},
    below_085 {bigint},
    below_090 {bigint},
    below_095 {bigint},
    above_105 {bigint},
    above_110 {bigint},
    PRIMARY KEY (device, span_s, t_utc, channel)
);
CREATE INDEX IF NOT EXISTS trend_rollup_t ON trend_rollup (span_s, t_utc)
"""
_ROLLUP_COUNTS = ("below_085", "below_090", "below_095", "above_105", "above_110")
#: The schema version that added the per-unit rollups (seconds, flagged seconds, 10-s
#: frequency means, imbalance) the fleet report reads instead of every second.
_UNIT_ROLLUP_VERSION = 6
_UNIT_ROLLUP_V6 = """
CREATE TABLE IF NOT EXISTS trend_unit (
    device TEXT NOT NULL,
    t_utc {double} NOT NULL,
    seconds {bigint} NOT NULL,
    flagged {bigint} NOT NULL,
    hz_n {bigint} NOT NULL,
    f10_n {bigint} NOT NULL,
    f10_in_50 {bigint} NOT NULL,
    f10_in_60 {bigint} NOT NULL,
    f10_out_50 {bigint} NOT NULL,
    f10_out_60 {bigint} NOT NULL,
    f10_min {double},
    f10_max {double},
    f10_first {double},
    f10_last {double},
    f10_open {bigint} NOT NULL,
    imb_n {bigint} NOT NULL,
    imb_sq {double} NOT NULL,
    PRIMARY KEY (device, t_utc)
)
"""
#: Columns of ``trend_unit`` after its key, in :class:`agent.store.trend.UnitRollupRow` order.
UNIT_COLUMNS = ("seconds", "flagged", "hz_n", "f10_n", "f10_in_50", "f10_in_60", "f10_out_50",
                "f10_out_60", "f10_min", "f10_max", "f10_first", "f10_last", "f10_open",
                "imb_n", "imb_sq")
#: Longest summary the edge sends [s] (K <= 3600 one-second records): a stored trend row
#: starting this long before an interval may still hold seconds of it.
MAX_SUMMARY_S = 3600.0
#: One PostgreSQL trend partition per UTC week [s].
TREND_PARTITION_S = 7 * 86400
# Advisory lock serialising partition creation among collectors (arbitrary key, "hcTP").
_PARTITION_LOCK_KEY = 0x6863_5450


@dataclass
class Item:
    """One received message for :meth:`RecorderStore.commit_batch`.

    ``message`` is the decoded dict; ``raw`` the bytes as received (kept if the message has
    to be dead-lettered); ``received_at`` the collector's UTC time [s] (now if None);
    ``raw_size`` is informational (not stored).
    """

    message: Mapping[str, Any]
    topic: str = ""
    raw: bytes | None = None
    raw_size: int | None = None
    received_at: float | None = None
    # Set by the collector for a message whose envelope it trusts (the topic names the same
    # device) but whose body failed validation: it is dead-lettered with this reason and its
    # sequence number still counts as received, so the device's outbox is not stalled by a
    # message that would fail again on every resend.
    reject: str | None = None


@dataclass
class CommitInfo:
    """What one committed batch touched, for the ``after_commit`` hook: the message kinds
    per device (``presence`` for presence status), each device's site, and the ids of the
    events written."""

    kinds: dict[str, set[str]]
    sites: dict[str, str]
    event_ids: list[str]


#: Called inside the batch's transaction, after its rows are written (alerts hook here so
#: what they queue commits, or rolls back, with the messages that raised them).
AfterCommit = Callable[["RecorderStore", Database, CommitInfo, float], None]


class ExportRow(NamedTuple):
    """One queued export as :mod:`agent.store.export` reads it: ``(id, kind, payload)``.
    ``kind`` is the message type (aggregate, summary, event, status, gap, capture) and
    ``payload`` the stored message (bytes as ``{"$base64": ...}``; a capture row holds the
    capture's metadata and file name, not its samples)."""

    id: int
    kind: str
    payload: dict[str, Any]


class BadMessage(ValueError):
    """A message that cannot be stored as what it claims to be (it is dead-lettered)."""


def _json_default(value: Any) -> Any:
    # Packed arrays put several bytes fields in every message: the plain bytes case first.
    if type(value) is bytes:
        return {"$base64": binascii.b2a_base64(value, newline=False).decode("ascii")}
    if isinstance(value, bytes | bytearray | memoryview):
        return {"$base64": binascii.b2a_base64(bytes(value), newline=False).decode("ascii")}
    if isinstance(value, tuple | set | frozenset):
        return list(value)
    if hasattr(value, "tolist"):  # numpy arrays and scalars
        return value.tolist()
    raise TypeError(f"cannot store {type(value).__name__} as JSON")


# One encoder for every call: json.dumps with options builds a new one each time.
_ENCODER = json.JSONEncoder(default=_json_default, sort_keys=True, separators=(",", ":"))


def to_json(value: Any) -> str:
    """JSON text for storage; bytes become ``{"$base64": ...}``; NaN kept (Python reads it)."""
    return _ENCODER.encode(value)


def from_json(text: str | None) -> Any:
    return json.loads(text) if text else None


def _opt_float(msg: Mapping[str, Any], *keys: str) -> float | None:
    for key in keys:
        value = msg.get(key)
        if value is None:
            continue
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise BadMessage(f"{key} must be a number, got {type(value).__name__}")
        return float(value)
    return None


def _opt_str(msg: Mapping[str, Any], key: str) -> str | None:
    value = msg.get(key)
    if value is None:
        return None
    if not isinstance(value, str):
        raise BadMessage(f"{key} must be a string, got {type(value).__name__}")
    if "\x00" in value:  # PostgreSQL text cannot hold NUL
        raise BadMessage(f"{key} contains a NUL character")
    return value


def _safe_text(value: str) -> str:
    """Text for a dead letter's own columns: whatever the input was, it must store."""
    return value.replace("\x00", "\\x00")


def _int(msg: Mapping[str, Any], key: str, low: int = 0, high: int = MAX_SEQ) -> int:
    value = msg.get(key)
    if isinstance(value, bool) or not isinstance(value, int):
        raise BadMessage(f"{key} must be an integer, got {value!r}")
    if not low <= value <= high:
        raise BadMessage(f"{key} {value} is outside {low}..{high}")
    return value


def envelope(msg: Mapping[str, Any]) -> tuple[str, str, str, str, int]:
    """``(type, device, site, epoch, seq)`` of a message, or :class:`BadMessage`."""
    if not isinstance(msg, Mapping):
        raise BadMessage(f"message must be a map, got {type(msg).__name__}")
    missing = [k for k in ENVELOPE_KEYS if k not in msg]
    if missing:
        raise BadMessage(f"missing envelope field(s): {', '.join(missing)}")
    kind, device, site, epoch = msg["type"], msg["device"], msg["site"], msg["epoch"]
    if kind not in MESSAGE_TYPES:
        raise BadMessage(f"unknown message type {kind!r}"[:200])
    for name, value in (("device", device), ("site", site), ("epoch", epoch)):
        if not valid_id(value):
            raise BadMessage(f"{name} {value!r} is not an id (1-64 of A-Z a-z 0-9 _ . -)"[:200])
    return kind, device, site, epoch, _int(msg, "seq")


def valid_id(value: object) -> bool:
    """Site, device and epoch ids as the wire schemas define them (one MQTT topic level)."""
    return isinstance(value, str) and bool(ID_RE.match(value))


def fsync_dir(path: Path) -> None:
    """Make a rename or file creation inside ``path`` durable (POSIX)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_file_durably(directory: Path, name: str, data: bytes) -> Path:
    """Write ``data`` as ``directory/name`` via a temporary file, fsync file and directory."""
    directory.mkdir(parents=True, exist_ok=True)
    final = directory / name
    tmp = directory / f".{name}.{os.getpid()}.{uuid.uuid4().hex}.tmp"
    with tmp.open("wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, final)
    fsync_dir(directory)
    return final


def _rollup_upsert(dialect: str) -> str:
    """Upsert of one rollup row that adds counts and sums and keeps the extremes."""
    least, greatest = ("LEAST", "GREATEST") if dialect == "postgresql" else ("MIN", "MAX")
    cols = ("device", "span_s", "t_utc", "channel", "seconds", "flagged", "sum_v", "sum_sq_v2",
            "min_v", "max_v", "low_v", "peak_v", "nominal_v", *_ROLLUP_COUNTS)
    sets = [f"{c} = r.{c} + excluded.{c}" for c in ("seconds", "flagged", "sum_v", "sum_sq_v2")]
    # SQLite's two-argument MIN/MAX give NULL if either side is: coalesce both ways first.
    sets += [f"{c} = {fn}(COALESCE(r.{c}, excluded.{c}), COALESCE(excluded.{c}, r.{c}))"
             for c, fn in (("min_v", least), ("max_v", greatest), ("low_v", least),
                           ("peak_v", greatest))]
    sets.append("nominal_v = COALESCE(r.nominal_v, excluded.nominal_v)")
    sets += [f"{c} = CASE WHEN r.{c} IS NULL AND excluded.{c} IS NULL THEN NULL"
             f" ELSE COALESCE(r.{c}, 0) + COALESCE(excluded.{c}, 0) END" for c in _ROLLUP_COUNTS]
    return (f"INSERT INTO trend_rollup AS r ({', '.join(cols)}) VALUES"
            f" ({', '.join('?' * len(cols))}) ON CONFLICT (device, span_s, t_utc, channel)"
            f" DO UPDATE SET {', '.join(sets)}")


def _period(device: str, start_utc: float | None, end_utc: float | None
            ) -> tuple[str, tuple[Any, ...]]:
    """WHERE conditions and parameters for one device's rows with ``t_utc`` in
    ``[start_utc, end_utc)`` (either end open when None)."""
    conds = "device = ?"
    params: list[Any] = [device]
    if start_utc is not None:
        conds += " AND t_utc >= ?"
        params.append(start_utc)
    if end_utc is not None:
        conds += " AND t_utc < ?"
        params.append(end_utc)
    return conds, tuple(params)


def _unpack_body(db: Database, data: Any) -> dict[str, Any] | None:
    """A stored trend row's body, None when it does not unpack to a map."""
    try:
        body = msgpack.unpackb(db.blob(data), raw=False, strict_map_key=False)
    except (ValueError, TypeError, msgpack.UnpackException):
        return None
    return body if isinstance(body, dict) else None


def _unit_upsert(dialect: str) -> str:
    """Upsert of one unit rollup row: counts and sums add, extremes keep the extreme."""
    least, greatest = ("LEAST", "GREATEST") if dialect == "postgresql" else ("MIN", "MAX")
    cols = ("device", "t_utc", *UNIT_COLUMNS)
    sets = [f"{c} = r.{c} + excluded.{c}" for c in UNIT_COLUMNS
            if c not in ("f10_min", "f10_max", "f10_first", "f10_last")]
    sets += [f"{c} = {fn}(COALESCE(r.{c}, excluded.{c}), COALESCE(excluded.{c}, r.{c}))"
             for c, fn in (("f10_min", least), ("f10_max", greatest), ("f10_first", least),
                           ("f10_last", greatest))]
    return (f"INSERT INTO trend_unit AS r ({', '.join(cols)}) VALUES"
            f" ({', '.join('?' * len(cols))}) ON CONFLICT (device, t_utc)"
            f" DO UPDATE SET {', '.join(sets)}")


def unit_row_values(r: trend_codec.UnitRollupRow) -> tuple[Any, ...]:
    """A unit rollup row as the values of :data:`UNIT_COLUMNS`."""
    return (r.seconds, r.flagged, r.hz_n, r.f10_n, *r.f10_in, *r.f10_out, r.f10_min, r.f10_max,
            r.f10_first, r.f10_last, r.f10_open, r.imb_n, r.imb_sq)


def _device_nominal(db: Database, device: str) -> float | None:
    row = db.query_one("SELECT model FROM devices WHERE device = ?", (device,))
    model = from_json(row[0]) if row else None
    v = model.get("nominal_v") if isinstance(model, dict) else None
    return float(v) if isinstance(v, int | float) and not isinstance(v, bool) and v > 0 \
        else None


def _write_rollups(db: Database, summaries: Sequence[tuple[str, Mapping[str, Any]]],
                   *, units_table: bool = True) -> None:
    """Add the seconds of newly committed summaries to their units' rollups (one decode and
    one reduction per unit and batch); ``units_table`` False for a schema before version 6."""
    by_device: dict[str, list[Mapping[str, Any]]] = {}
    for device, msg in summaries:
        by_device.setdefault(device, []).append(msg)
    rows: list[tuple[Any, ...]] = []
    units: list[tuple[Any, ...]] = []
    for device in sorted(by_device):
        chunk = trend_codec.decode_rows(by_device[device], trend_codec.ROLLUP_FIELDS)
        nominal = _device_nominal(db, device)
        for r in trend_codec.rollup(chunk, nominal):
            counts = (*(r.below or (None,) * 3), *(r.above or (None,) * 2))
            rows.append((device, r.span_s, r.t_utc, r.channel, r.seconds, r.flagged, r.sum_v,
                         r.sum_sq_v2, r.min_v, r.max_v, r.low_v, r.peak_v, r.nominal_v,
                         *counts))
        if units_table:
            units.extend((device, u.t_utc, *unit_row_values(u))
                         for u in trend_codec.unit_rollup(chunk))
    db.executemany(_rollup_upsert(db.dialect), rows)
    if units:
        db.executemany(_unit_upsert(db.dialect), units)


class _Pending:
    """Rows of a batch written in bulk (``executemany``) rather than one statement each;
    none of them is read back while the batch is applied."""

    _SQL = (("received", "INSERT INTO received (device, epoch, seq, type, received_at)"
             " VALUES (?, ?, ?, ?, ?) ON CONFLICT DO NOTHING"),
            ("aggregates", "INSERT INTO aggregates (device, epoch, seq, site, kind, t_utc,"
             " duration_s, payload, received_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)"
             " ON CONFLICT DO NOTHING"),
            ("trend", "INSERT INTO trend (device, t_utc, epoch, seq, site, n, data, received_at)"
             " VALUES (?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING"),
            ("exports", "INSERT INTO export_queue (kind, device, site, ref, payload, created_at)"
             " VALUES (?, ?, ?, ?, ?, ?)"))

    def __init__(self) -> None:
        self.received: list[tuple[Any, ...]] = []
        self.aggregates: list[tuple[Any, ...]] = []
        self.trend: list[tuple[Any, ...]] = []
        self.exports: list[tuple[Any, ...]] = []
        # Summaries of the batch for the rollups: (device, decoded message), kept whether or
        # not the trend itself is kept.
        self.summaries: list[tuple[str, Mapping[str, Any]]] = []

    def mark(self) -> tuple[int, ...]:
        return (*(len(getattr(self, name)) for name, _ in self._SQL), len(self.summaries))

    def truncate(self, mark: tuple[int, ...]) -> None:
        for (name, _), n in zip(self._SQL, mark[:-1], strict=True):
            del getattr(self, name)[n:]
        del self.summaries[mark[-1]:]

    def flush(self, db: Database) -> None:
        if self.summaries:
            _write_rollups(db, self.summaries)
            self.summaries.clear()
        for name, sql in self._SQL:
            rows = getattr(self, name)
            if rows:
                db.executemany(sql, rows)
                rows.clear()


class RecorderStore:
    """The recorder store over one database connection (one per thread or process).

    ``url``: ``sqlite:///path.db`` or ``postgresql://...``. ``captures_dir``: where
    reassembled captures are kept as ``<sha256>.bin`` (shared storage when several collectors
    share a PostgreSQL database). ``keep_trend``: store per-second ``summary`` messages in
    ``trend`` (they are exported either way). ``first_seq``: the first seq of every epoch at
    the source (``committed_upto`` starts at ``first_seq - 1``).
    """

    def __init__(self, url: str, captures_dir: str | Path, *, keep_trend: bool = True,
                 first_seq: int = 1, busy_timeout_s: float = 30.0, migrate: bool = True,
                 export: bool = True, must_exist: bool = False) -> None:
        self.db = Database(url, busy_timeout_s=busy_timeout_s, must_exist=must_exist)
        self.captures_dir = Path(captures_dir)
        self.keep_trend = keep_trend
        # False when no exporter is configured: nothing would ever drain the queue.
        self.export = export
        self.first_seq = first_seq
        self._lock_suffix = " FOR UPDATE" if self.db.dialect == "postgresql" else ""
        self._pending = _Pending()
        self.after_commit: AfterCommit | None = None
        self._weeks: set[int] = set()  # trend partitions known to exist (PostgreSQL)
        if migrate:
            try:
                self.migrate()
            except BaseException:
                self.db.close()
                raise

    # --- lifecycle ------------------------------------------------------------------------

    def migrate(self) -> int:
        """Bring the schema up to date; safe to run again and from several collectors."""
        before = self.db.schema_version()
        after = self.db.migrate(self._migrations())
        if before < _OUTAGE_WINDOWS_VERSION <= after and before > 0:
            self.db.run_in_transaction(self._backfill_outage_windows)
        return after

    def _backfill_outage_windows(self, db: Database) -> None:
        """Windows from what a store older than the outage_windows table still holds: every
        stored power-loss event, and each device's latest status if it is a restart report
        (earlier restart reports were overwritten). Idempotent (upserts on the unique key);
        a report that cannot give a window stays as it is, in its own table."""
        now = time.time()
        for device, site, state, payload in db.query(
                "SELECT device, site, state, payload FROM events WHERE state = 'closed'"):
            msg = from_json(payload)
            if isinstance(msg, dict) and msg.get("ended_by") == "power_loss":
                with suppress(BadMessage):
                    event_id = str(msg.get("event_id"))
                    self._record_last_gasp(db, device, site, event_id, state, msg, now)
        for device, site, status in db.query("SELECT device, site, status FROM devices"):
            report = from_json(status)
            if isinstance(report, dict) and report.get("last_ran") is not None:
                with suppress(BadMessage):
                    self._record_restart(db, device, site, "latest-status",
                                         report.get("last_ran"), {**report, "device": device,
                                                                  "site": site}, now)

    def _migrations(self) -> list[tuple[int, str | Callable[[Database], None]]]:
        return [*_MIGRATIONS, (_PACKED_TREND_VERSION, self._migrate_packed_trend),
                (_ROLLUP_VERSION, self._migrate_rollups), (_ALERTS_VERSION, _alerts.MIGRATION),
                (_UNIT_ROLLUP_VERSION, self._migrate_unit_rollups)]

    def _migrate_packed_trend(self, db: Database) -> None:
        """Version 3: the JSON trend table becomes ``trend_json``, the packed table takes its
        place, every JSON row is converted (same identity, time and received time; the
        message decoded from its stored JSON, bytes restored) and the old table dropped, all
        in the migration's one transaction."""
        for statement in _TREND_V3[db.dialect].split(";"):
            if statement.strip():
                db.execute(statement)
        from agent.store.export import from_stored_json

        weeks: set[int] = set()
        last: tuple[Any, ...] = ("", "", -1)
        while True:  # keyset pages: a large store is converted without holding it in memory
            rows = db.query("SELECT device, epoch, seq, site, t_utc, payload, received_at"
                            " FROM trend_json WHERE (device, epoch, seq) > (?, ?, ?)"
                            " ORDER BY device, epoch, seq LIMIT 2000", last)
            if not rows:
                break
            out = []
            for device, epoch, seq, site, t_utc, payload, received_at in rows:
                msg = from_stored_json(from_json(payload)) or {}
                t = t_utc if t_utc is not None else _opt_float(msg, "t0", "t_utc", "t")
                if t is None:  # never stored by the collector (the schema requires t0)
                    t = float(received_at)
                n = msg.get("n") if isinstance(msg, dict) else None
                for week in {math.floor(float(t) / TREND_PARTITION_S)} - weeks:
                    self._create_partition(db, week)
                    weeks.add(week)
                out.append((device, float(t), epoch, int(seq), site,
                            n if isinstance(n, int) and not isinstance(n, bool) else 0,
                            trend_codec.pack_row(msg if isinstance(msg, dict) else {}),
                            received_at))
            db.executemany(_Pending._SQL[2][1], out)
            last = tuple(rows[-1][:3])
        db.execute("DROP TABLE trend_json")

    def _migrate_rollups(self, db: Database) -> None:
        """Version 4: the rollup table, filled from the trend rows already stored."""
        for statement in _ROLLUP_V4.split(";"):
            if statement.strip():
                db.execute(statement)
        for (device,) in db.query("SELECT DISTINCT device FROM trend ORDER BY device"):
            for bodies in self._trend_bodies(db, device, None, None, 1440):
                _write_rollups(db, [(device, b) for b in bodies if b is not None],
                               units_table=False)

    def _migrate_unit_rollups(self, db: Database) -> None:
        """Version 6: the per-unit rollup table, filled from the trend rows already stored
        (read page by page; the trend rows themselves are not touched)."""
        db.execute(_UNIT_ROLLUP_V6)
        upsert = _unit_upsert(db.dialect)
        for (device,) in db.query("SELECT DISTINCT device FROM trend ORDER BY device"):
            for bodies in self._trend_bodies(db, device, None, None, 1440):
                chunk = trend_codec.decode_rows([b for b in bodies if b is not None],
                                                trend_codec.ROLLUP_FIELDS)
                rows = [(device, u.t_utc, *unit_row_values(u))
                        for u in trend_codec.unit_rollup(chunk)]
                if rows:
                    db.executemany(upsert, rows)

    def has_unit_rollups(self) -> bool:
        """The store keeps the 10-min rollups the fleet report reads (schema 6 or later; an
        older store not yet migrated by a collector is read second by second). Read only: a
        reader's connection may not write."""
        row = self.db.query_one("SELECT MAX(version) FROM schema_version")
        return row is not None and row[0] is not None and int(row[0]) >= _UNIT_ROLLUP_VERSION

    @staticmethod
    def latest_schema_version() -> int:
        return _UNIT_ROLLUP_VERSION

    @classmethod
    def open_existing(cls, url: str, captures_dir: str | Path) -> RecorderStore:
        """Open a store that must already exist, for readers (report, capture): creates and
        migrates nothing; StoreError (one line) when it cannot be opened or is not a
        recorder store."""
        store = cls(url, captures_dir, migrate=False, must_exist=True)
        try:
            row = store.db.query_one("SELECT MAX(version) FROM schema_version")
            version = int(row[0]) if row and row[0] is not None else 0
        except Exception as exc:  # any driver error here means "not a recorder store"
            store.close()
            raise StoreError(f"store {describe_url(url)}: not a halfcycle recorder store "
                             f"({first_line(exc)})") from None
        if version < 1:
            store.close()
            raise StoreError(f"store {describe_url(url)}: not a halfcycle recorder store "
                             "(no schema)")
        return store

    def close(self) -> None:
        self.db.close()

    def __enter__(self) -> RecorderStore:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # --- the batch commit -----------------------------------------------------------------

    def commit_batch(self, items: Iterable[Item | Mapping[str, Any]]) -> dict[tuple[str, str], int]:
        """Store a batch in one transaction; return ``committed_upto`` per touched stream.

        Redelivered messages (same device, epoch, seq) change nothing. A message whose
        envelope is valid but whose body cannot be stored is dead-lettered (with its raw
        bytes) and still counts as received, so it is acknowledged, not lost; a message
        without a usable envelope is dead-lettered and touches no stream.
        """
        batch = [it if isinstance(it, Item) else Item(message=it) for it in items]
        now = time.time()
        if self.db.dialect == "postgresql" and self.keep_trend:
            self._prepare_partitions(batch)
        return self.db.run_in_transaction(lambda db: self._commit(db, batch, now))

    # --- trend partitions (PostgreSQL) ----------------------------------------------------

    def _prepare_partitions(self, batch: Sequence[Item]) -> None:
        """Create the weekly trend partitions a batch needs in their own short transaction
        before the batch's (creating one locks the parent table until commit)."""
        weeks = set()
        for item in batch:
            msg = item.message
            if isinstance(msg, Mapping) and msg.get("type") == "summary":
                t = msg.get("t0", msg.get("t_utc", msg.get("t")))
                if isinstance(t, int | float) and not isinstance(t, bool) and math.isfinite(t):
                    weeks.add(math.floor(t / TREND_PARTITION_S))
        for week in sorted(weeks - self._weeks):
            self.db.run_in_transaction(functools.partial(self._create_partition, week=week))
            self._weeks.add(week)

    def _ensure_partition(self, db: Database, t_utc: float) -> None:
        """The partition for ``t_utc`` inside the batch's transaction (normally made before
        by :meth:`_prepare_partitions`; not cached here, the transaction may roll back)."""
        if db.dialect != "postgresql" or not math.isfinite(t_utc):
            return
        week = math.floor(t_utc / TREND_PARTITION_S)
        if week not in self._weeks:
            self._create_partition(db, week)

    @staticmethod
    def _partition_name(week: int) -> str:
        return f"trend_w{week}" if week >= 0 else f"trend_wm{-week}"

    def _create_partition(self, db: Database, week: int) -> None:
        if db.dialect != "postgresql":
            return
        # Concurrent CREATE ... IF NOT EXISTS can still collide: serialise on a lock.
        db.execute("SELECT pg_advisory_xact_lock(?)", (_PARTITION_LOCK_KEY,))
        start, end = week * TREND_PARTITION_S, (week + 1) * TREND_PARTITION_S
        db.execute(f"CREATE TABLE IF NOT EXISTS {self._partition_name(week)} PARTITION OF trend"
                   f" FOR VALUES FROM ({start}) TO ({end})")

    def _commit(self, db: Database, batch: list[Item], now: float) -> dict[tuple[str, str], int]:
        parsed: list[tuple[Item, tuple[str, str, str, str, int], float]] = []
        presence: list[tuple[Item, str, str, float]] = []
        for item in batch:
            at = item.received_at if item.received_at is not None else now
            try:
                env = envelope(item.message)
                if env[4] < self.first_seq:
                    if env[0] != "status" or env[4] != PRESENCE_SEQ:
                        raise BadMessage(f"seq {env[4]} is below the first seq {self.first_seq}"
                                         " and only presence status may use it")
                    presence.append((item, env[1], env[2], at))
                else:
                    parsed.append((item, env, at))
            except BadMessage as exc:
                self._dead_letter_item(db, item, str(exc), at)

        # Lock every touched stream first, in sorted order (see module docstring).
        upto: dict[tuple[str, str], int] = {}
        already: dict[tuple[str, str], set[int]] = {}
        for device, epoch in sorted({(env[1], env[3]) for _, env, _ in parsed}):
            db.execute("INSERT INTO streams (device, epoch, committed_upto, first_seen, updated_at)"
                       " VALUES (?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
                       (device, epoch, self.first_seq - 1, now, now))
            row = db.query_one("SELECT committed_upto FROM streams WHERE device = ? AND epoch = ?"
                               + self._lock_suffix, (device, epoch))
            assert row is not None
            upto[(device, epoch)] = int(row[0])
            # Seqs above committed_upto received earlier (beyond a hole). The stream lock keeps
            # other writers from adding any, so this set decides what is new in this batch.
            already[(device, epoch)] = {int(r[0]) for r in db.query(
                "SELECT seq FROM received WHERE device = ? AND epoch = ? AND seq > ?",
                (device, epoch, upto[(device, epoch)]))}

        seen: dict[str, tuple[str, float]] = {}
        for _, (_, device, site, _, _), at in parsed:
            if device not in seen or at > seen[device][1]:
                seen[device] = (site, at)
        for device in sorted(seen):
            self._touch_device(db, device, *seen[device])

        self._pending = _Pending()
        # Presence is outside the sequence: applied every time, never deduplicated or acked.
        for item, device, site, at in presence:
            self._touch_device(db, device, site, at)
            self._apply_status(db, device, site, item.message, at)
            self._enqueue(db, "status", device, site, f"{device}/presence", item.message, at)
        self._pending.flush(db)

        # First the whole batch without a savepoint per message (the common case: nothing is
        # refused). If anything is, undo it all and apply the batch again with one savepoint
        # per message, so the refused message is dead-lettered alone. Both within this one
        # transaction.
        refused: tuple[type[Exception], ...] = (BadMessage, TypeError, ValueError,
                                                OverflowError, *db.data_errors)
        db.execute("SAVEPOINT batch")
        try:
            self._apply_all(db, parsed, upto, already, refused, per_message=False)
        except refused:
            db.execute("ROLLBACK TO SAVEPOINT batch")
            self._apply_all(db, parsed, upto, already, refused, per_message=True)
        db.execute("RELEASE SAVEPOINT batch")

        for key in upto:
            new = self._advance(db, key[0], key[1], upto[key])
            if new != upto[key]:
                db.execute("UPDATE streams SET committed_upto = ?, updated_at = ?"
                           " WHERE device = ? AND epoch = ?", (new, now, key[0], key[1]))
                upto[key] = new
        if self.after_commit is not None:
            self.after_commit(self, db, self._commit_info(parsed, presence), now)
        return upto

    @staticmethod
    def _commit_info(parsed: Sequence[tuple[Item, tuple[str, str, str, str, int], float]],
                     presence: Sequence[tuple[Item, str, str, float]]) -> CommitInfo:
        info = CommitInfo({}, {}, [])
        for item, (kind, device, site, _, _), _ in parsed:
            info.kinds.setdefault(device, set()).add(kind)
            info.sites[device] = site
            if kind == "event" and isinstance(item.message.get("event_id"), str):
                info.event_ids.append(item.message["event_id"])
        for _, device, site, _ in presence:
            info.kinds.setdefault(device, set()).add("presence")
            info.sites[device] = site
        return info

    def _apply_all(self, db: Database, parsed: Sequence[tuple[Item, tuple[str, str, str, str, int],
                                                              float]],
                   upto: Mapping[tuple[str, str], int],
                   already: Mapping[tuple[str, str], set[int]],
                   refused: tuple[type[Exception], ...], *, per_message: bool) -> None:
        """Apply the new messages of a batch. ``per_message=False``: rows are written in bulk
        at the end and any refusal propagates; True: a savepoint per message, and a message
        that is refused is rolled back and dead-lettered (its seq still counts as received)."""
        pending = self._pending = _Pending()
        accepted = {key: set(seqs) for key, seqs in already.items()}
        for item, env, at in parsed:
            kind, device, site, epoch, seq = env
            stream = (device, epoch)
            if seq <= upto[stream] or seq in accepted[stream]:
                # Already committed or announced as dropped (a gap range never covers a message
                # still to be sent), or received before: a redelivery, even after
                # prune_received().
                continue
            accepted[stream].add(seq)
            received = (device, epoch, seq, kind, at)
            if not per_message:
                pending.received.append(received)
                if item.reject is not None:
                    self._dead_letter_item(db, item, item.reject[:1000], at, device, site)
                else:
                    self._apply(db, kind, device, site, epoch, seq, item.message, at)
                continue
            db.execute("SAVEPOINT item")
            mark = pending.mark()
            try:
                pending.received.append(received)
                if item.reject is not None:
                    self._dead_letter_item(db, item, item.reject[:1000], at, device, site)
                else:
                    self._apply(db, kind, device, site, epoch, seq, item.message, at)
                pending.flush(db)
            except refused as exc:
                db.execute("ROLLBACK TO SAVEPOINT item")
                pending.truncate(mark)
                pending.received.append(received)
                pending.flush(db)
                self._dead_letter_item(db, item, f"{kind}: {exc}"[:1000], at, device, site)
            db.execute("RELEASE SAVEPOINT item")
        pending.flush(db)

    _NEW_DEVICE = ("INSERT INTO devices (device, site, model, first_seen, last_seen, state,"
                   " state_since) VALUES (?, ?, '', ?, ?, 'unknown', ?)")

    def _ensure_device(self, db: Database, device: str, site: str, t: float) -> None:
        db.execute(self._NEW_DEVICE + " ON CONFLICT DO NOTHING", (device, site, t, t, t))

    def _touch_device(self, db: Database, device: str, site: str, at: float) -> None:
        """Create the device or note that it was heard from (site may have changed)."""
        db.execute(self._NEW_DEVICE + " ON CONFLICT (device) DO UPDATE SET site = excluded.site,"
                   " last_seen = CASE WHEN excluded.last_seen > devices.last_seen"
                   " THEN excluded.last_seen ELSE devices.last_seen END",
                   (device, site, at, at, at))

    def _advance(self, db: Database, device: str, epoch: str, upto: int) -> int:
        """Highest contiguous seq from ``upto`` over received seqs and announced gaps."""
        gaps = db.query("SELECT first_seq, last_seq FROM gaps WHERE device = ? AND epoch = ?"
                        " AND last_seq > ? ORDER BY first_seq", (device, epoch, upto))
        while True:
            moved = False
            for first, last in gaps:
                if first <= upto + 1 <= last:
                    upto, moved = int(last), True
            rows = db.query("SELECT seq FROM received WHERE device = ? AND epoch = ? AND seq > ?"
                            " ORDER BY seq LIMIT 1000", (device, epoch, upto))
            for (seq,) in rows:
                if seq != upto + 1:
                    break
                upto, moved = int(seq), True
            if not moved:
                return upto

    def _apply(self, db: Database, kind: str, device: str, site: str, epoch: str, seq: int,
               msg: Mapping[str, Any], at: float) -> None:
        ref = f"{device}/{epoch}/{seq}"
        pending = self._pending
        if kind == "aggregate":
            text = to_json(msg)
            pending.aggregates.append(
                (device, epoch, seq, site, _opt_str(msg, "kind"), _opt_float(msg, "t", "t_utc"),
                 _opt_float(msg, "duration_s"), text, at))
            self._enqueue(db, kind, device, site, ref, msg, at, text)
        elif kind == "summary":
            t_utc = _opt_float(msg, "t0", "t_utc", "t")
            if t_utc is None:
                raise BadMessage("summary without t0")
            if self.keep_trend:
                n = msg.get("n")
                pending.trend.append((device, t_utc, epoch, seq, site,
                                      n if isinstance(n, int) and not isinstance(n, bool) else 0,
                                      trend_codec.pack_row(msg), at))
                self._ensure_partition(db, t_utc)
            pending.summaries.append((device, msg))
            self._enqueue(db, kind, device, site, ref, msg, at)
        elif kind == "gap":
            first, last = _int(msg, "first_seq"), _int(msg, "last_seq")
            if first > last:
                raise BadMessage(f"first_seq {first} > last_seq {last}")
            count = None if msg.get("count") is None else _int(msg, "count")
            text = to_json(msg)
            # Written at once: committed_upto reads the gaps of the batch.
            db.execute("INSERT INTO gaps (device, epoch, seq, site, lane, first_seq, last_seq,"
                       " count, reason, payload, received_at)"
                       " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?) ON CONFLICT DO NOTHING",
                       (device, epoch, seq, site, _opt_str(msg, "lane"), first, last, count,
                        _opt_str(msg, "reason"), text, at))
            self._enqueue(db, kind, device, site, ref, msg, at, text)
        elif kind == "status":
            self._apply_status(db, device, site, msg, at)
            self._record_restart(db, device, site, epoch, seq, msg, at)
            self._enqueue(db, kind, device, site, ref, msg, at)
        elif kind == "event":
            stored = self._apply_event(db, device, site, epoch, seq, msg, at)
            if stored is not None:
                self._enqueue(db, kind, device, site, str(msg["event_id"]), msg, at, stored)
        elif kind == "capture":
            self._apply_chunk(db, device, site, msg, at)

    # --- events ---------------------------------------------------------------------------

    def _apply_event(self, db: Database, device: str, site: str, epoch: str, seq: int,
                     msg: Mapping[str, Any], at: float) -> str | None:
        """Insert or monotonically update an event; the stored JSON when the row changed,
        else None. A closed event ended by a power loss records its last-gasp outage window.

        Order: closed beats open; within the same state, a higher seq of the same epoch
        is newer. A closed event is never reopened; an older version never overwrites.
        """
        event_id = _opt_str(msg, "event_id")
        if not event_id:
            raise BadMessage("event_id missing")
        state = _CHANGE_STATE.get(msg["change"]) if "change" in msg else msg.get("state")
        if state not in EVENT_STATES:
            raise BadMessage("change must be started or ended (or state open or closed), got "
                             f"{msg.get('change', msg.get('state'))!r}")
        channels = msg.get("channels", [])
        thresholds = msg.get("thresholds") or {}
        classification = msg.get("classification") or {}
        if not isinstance(channels, list | tuple):
            raise BadMessage("channels must be a list")
        if not isinstance(thresholds, Mapping) or not isinstance(classification, Mapping):
            raise BadMessage("thresholds and classification must be maps")
        start = _opt_float(msg, "start_utc")
        end = _opt_float(msg, "end_utc")
        duration = _opt_float(msg, "duration_s", "duration")
        if duration is None and start is not None and end is not None:
            duration = end - start
        cv = _opt_str(msg, "classifier_version")
        text = to_json(msg)
        values = (device, site, epoch, seq, _opt_str(msg, "kind"), state, to_json(channels),
                  start, end, duration, _opt_float(msg, "level_v"), _opt_float(msg, "level_pu"),
                  to_json(thresholds), to_json(classification),
                  cv, text)
        row = db.query_one("SELECT device, epoch, seq, state FROM events WHERE event_id = ?"
                           + self._lock_suffix, (event_id,))
        if row is None:
            cur = db.execute(
                "INSERT INTO events (device, site, epoch, seq, kind, state, channels, start_utc,"
                " end_utc, duration_s, level_v, level_pu, thresholds, classification,"
                " classifier_version, payload, event_id, first_received, updated_at)"
                " VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
                " ON CONFLICT DO NOTHING", (*values, event_id, at, at))
            if cur.rowcount == 1:
                self._record_last_gasp(db, device, site, event_id, state, msg, at)
                return text
            row = db.query_one("SELECT device, epoch, seq, state FROM events WHERE event_id = ?"
                               + self._lock_suffix, (event_id,))
            assert row is not None
        old_device, old_epoch, old_seq, old_state = row
        if old_device != device:
            raise BadMessage(f"event_id {event_id} already belongs to device {old_device}")
        rank, old_rank = EVENT_STATES.index(state), EVENT_STATES.index(old_state)
        newer = rank > old_rank or (rank == old_rank and epoch == old_epoch and seq > old_seq)
        if not newer:
            return None
        db.execute(
            "UPDATE events SET device = ?, site = ?, epoch = ?, seq = ?, kind = ?, state = ?,"
            " channels = ?, start_utc = ?, end_utc = ?, duration_s = ?, level_v = ?,"
            " level_pu = ?, thresholds = ?, classification = ?, classifier_version = ?,"
            " payload = ?, updated_at = ? WHERE event_id = ?", (*values, at, event_id))
        self._record_last_gasp(db, device, site, event_id, state, msg, at)
        return text

    # --- outage windows -------------------------------------------------------------------

    _UPSERT_WINDOW = ("INSERT INTO outage_windows (device, site, start_utc, end_utc, source, ref,"
                      " slack_s, received_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?)"
                      " ON CONFLICT (device, source, ref) DO UPDATE SET site = excluded.site,"
                      " start_utc = excluded.start_utc, end_utc = excluded.end_utc,"
                      " slack_s = excluded.slack_s, received_at = excluded.received_at")

    def _record_last_gasp(self, db: Database, device: str, site: str, event_id: str,
                          state: str, msg: Mapping[str, Any], at: float) -> None:
        """Keep the outage window of the stored (newest) version of a closed event: the
        event start to its inferred end when it was ended by a power loss, none otherwise."""
        if state != "closed":
            return
        try:
            window = last_gasp_window(msg)
        except ValueError as exc:
            raise BadMessage(f"power-loss event {event_id}: {exc}") from exc
        if window is None:
            # A newer version no longer says power loss: its earlier window goes.
            db.execute("DELETE FROM outage_windows WHERE device = ? AND source = 'last_gasp'"
                       " AND ref = ?", (device, event_id))
            return
        slack = _opt_float(msg, "end_uncertainty_s") or 0.0
        db.execute(self._UPSERT_WINDOW, (device, site, window.start_utc, window.end_utc,
                                         "last_gasp", event_id, slack, at))

    def _record_restart(self, db: Database, device: str, site: str, epoch: str, seq: object,
                        msg: Mapping[str, Any], at: float) -> None:
        """The outage window of a restart report (a device's own online status with
        ``last_ran``): from when the agent last ran to its restart (``t - uptime_s``).

        Only sequenced status messages count: a Last Will or retained presence message
        (seq 0) marks the device offline or online and never makes a window.
        """
        try:
            window = restart_window(msg)
        except ValueError as exc:
            raise BadMessage(f"restart report: {exc}") from exc
        if window is not None:
            db.execute(self._UPSERT_WINDOW, (device, site, window.start_utc, window.end_utc,
                                             "restart", f"{epoch}/{seq}", 0.0, at))

    # --- captures -------------------------------------------------------------------------

    def _apply_chunk(self, db: Database, device: str, site: str, msg: Mapping[str, Any],
                     at: float) -> None:
        capture_id = _opt_str(msg, "capture_id")
        if not capture_id:
            raise BadMessage("capture_id missing")
        index, total = _int(msg, "index"), _int(msg, "total")
        if not 0 <= index < total:
            raise BadMessage(f"chunk index {index} outside 0..{total - 1}")
        sha = _opt_str(msg, "sha256")
        if sha is None or len(sha) != 64 or any(c not in "0123456789abcdef" for c in sha.lower()):
            raise BadMessage("sha256 must be 64 hex digits")
        sha = sha.lower()
        data = msg.get("data")
        if not isinstance(data, bytes | bytearray | memoryview):
            raise BadMessage("chunk data must be bytes")
        if db.query_one("SELECT 1 FROM captures WHERE capture_id = ?", (capture_id,)):
            return  # already complete: a late duplicate chunk of a stored capture
        event_id = _opt_str(msg, "event_id")
        # Fields every chunk repeats (trigger, size, meta): they must agree across chunks.
        fields = to_json({k: v for k, v in msg.items()
                          if k not in ENVELOPE_KEYS and k not in CHUNK_KEYS})
        other = db.query_one("SELECT total, sha256, meta, event_id FROM capture_chunks"
                             " WHERE capture_id = ? LIMIT 1", (capture_id,))
        if other is not None and (int(other[0]), other[1], other[2], other[3]) != (
                total, sha, fields, event_id):
            raise BadMessage(f"chunk {index} disagrees with the staged chunks of {capture_id} "
                             "on total, sha256, event_id or metadata")
        db.execute("INSERT INTO capture_chunks (capture_id, idx, total, sha256, event_id, device,"
                   " site, data, meta, received_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?)"
                   " ON CONFLICT DO NOTHING",
                   (capture_id, index, total, sha, event_id, device, site, bytes(data),
                    fields, at))
        row = db.query_one("SELECT COUNT(*) FROM capture_chunks WHERE capture_id = ?",
                           (capture_id,))
        if row is not None and int(row[0]) == total:
            self._complete_capture(db, capture_id, at)

    def _complete_capture(self, db: Database, capture_id: str, at: float) -> None:
        rows = db.query("SELECT idx, total, sha256, event_id, device, site, data, meta"
                        " FROM capture_chunks WHERE capture_id = ? ORDER BY idx", (capture_id,))
        payload = b"".join(db.blob(r[6]) for r in rows)
        _, total, sha, event_id, device, site = rows[0][:6]
        meta: dict[str, Any] = from_json(rows[0][7]) or {}
        actual = hashlib.sha256(payload).hexdigest()
        size = meta.get("size")
        db.execute("DELETE FROM capture_chunks WHERE capture_id = ?", (capture_id,))
        problem = None
        if actual != sha:
            problem = f"sha256 of {total} chunks is {actual}, announced {sha}"
        elif isinstance(size, int) and size != len(payload):
            problem = f"{len(payload)} bytes reassembled, announced size {size}"
        if problem is not None:
            # Keep the assembled bytes: the reason says what went wrong, nothing is dropped.
            self._insert_dead_letter(db, f"capture/{capture_id}", payload,
                                     f"capture {capture_id}: {problem}", device, site, at)
            return
        name = f"{sha}.bin"
        path = self.captures_dir / name
        if not (path.exists() and hashlib.sha256(path.read_bytes()).hexdigest() == sha):
            write_file_durably(self.captures_dir, name, payload)
        # The file is durable before the row (and so the ack) commits.
        db.execute("INSERT INTO captures (capture_id, event_id, device, site, sha256, size,"
                   " file_name, meta, completed_at) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)"
                   " ON CONFLICT DO NOTHING",
                   (capture_id, event_id, device, site, sha, len(payload), name, to_json(meta), at))
        export = {"site": site, "device": device, "capture_id": capture_id,
                  "event_id": event_id, "sha256": sha, "size": len(payload), "file_name": name,
                  **meta}
        self._enqueue(db, "capture", device, site, capture_id, export, at)

    # --- devices --------------------------------------------------------------------------

    def _apply_status(self, db: Database, device: str, site: str, msg: Mapping[str, Any],
                      at: float) -> None:
        source = msg.get("site_model") if isinstance(msg.get("site_model"), Mapping) else msg
        assert isinstance(source, Mapping)
        fields = {k: source[k] for k in SITE_MODEL_KEYS if k in source}
        if "channel_names" not in fields and isinstance(source.get("channels"), list):
            fields["channel_names"] = source["channels"]
        if fields:
            self._merge_model(db, device, fields)
        report = {k: msg[k] for k in STATUS_KEYS if k in msg}
        if report:
            db.execute("UPDATE devices SET status = ? WHERE device = ?", (to_json(report), device))
        # A heartbeat proves the device is up. The collector's receive time orders presence
        # changes: a will message carries the time its connection was made, not when it fired.
        state = {"heartbeat": "online"}.get(str(msg.get("state")), msg.get("state"))
        if state in ("online", "offline"):
            self._set_state(db, device, site, str(state), at)

    def update_device_model(self, device: str, site: str, fields: Mapping[str, Any]) -> None:
        """Merge site-model fields (``nominal_v``, ``nominal_hz``, ``service_type``,
        ``channel_names``, ...; see :class:`agent.site.Site`) into the device's record."""
        unknown = set(fields) - set(SITE_MODEL_KEYS)
        if unknown:
            raise ValueError(f"unknown site model field(s): {', '.join(sorted(unknown))}")

        def work(db: Database) -> None:
            now = time.time()
            self._ensure_device(db, device, site, now)
            self._merge_model(db, device, dict(fields))

        self.db.run_in_transaction(work)

    def _merge_model(self, db: Database, device: str, fields: dict[str, Any]) -> None:
        row = db.query_one("SELECT model FROM devices WHERE device = ?" + self._lock_suffix,
                           (device,))
        model = (from_json(row[0]) if row else None) or {}
        model.update(fields)
        db.execute("UPDATE devices SET model = ? WHERE device = ?", (to_json(model), device))

    def set_device_status(self, device: str, site: str, state: str, t: float) -> None:
        """Record a presence change (e.g. from a retained presence or last-will message).

        ``t`` [s UTC] is when the state began; an older report than the stored one is ignored,
        so out-of-order presence messages cannot flip the state back.
        """
        if state not in DEVICE_STATES:
            raise ValueError(f"device state must be one of {DEVICE_STATES}, got {state!r}")
        self.db.run_in_transaction(lambda db: self._set_state(db, device, site, state, t))

    def mark_silent_offline(self, now: float, silence_s: float) -> list[str]:
        """Mark devices not heard from for ``silence_s`` [s] as offline (since they were last
        heard), e.g. when a will message was lost; returns their ids."""
        def work(db: Database) -> list[str]:
            rows = db.query("SELECT device, site, last_seen FROM devices WHERE state <> 'offline'"
                            " AND last_seen < ? ORDER BY device", (now - silence_s,))
            for device, site, last_seen in rows:
                self._set_state(db, device, site, "offline", float(last_seen))
            return [r[0] for r in rows]

        return self.db.run_in_transaction(work)

    def _set_state(self, db: Database, device: str, site: str, state: str, t: float) -> None:
        self._ensure_device(db, device, site, t)
        # "unknown" is no report: the first presence wins even if the row was created by a
        # data message received a moment after it (in the same batch).
        db.execute("UPDATE devices SET state = ?, state_since = ? WHERE device = ?"
                   " AND state <> ? AND (state = 'unknown' OR state_since <= ?)",
                   (state, t, device, state, t))

    # --- dead letters ---------------------------------------------------------------------

    def dead_letter(self, topic: str, raw: bytes, reason: str, *, device: str | None = None,
                    site: str | None = None, received_at: float | None = None) -> int:
        """Store an undecodable or invalid message with its raw bytes; returns its id."""
        at = received_at if received_at is not None else time.time()
        return self.db.run_in_transaction(
            lambda db: self._insert_dead_letter(db, topic, raw, reason, device, site, at))

    def _dead_letter_item(self, db: Database, item: Item, reason: str, at: float,
                          device: str | None = None, site: str | None = None) -> None:
        raw = item.raw
        if raw is None:  # no bytes as received: keep the decoded message as JSON (or repr)
            try:
                raw = to_json(dict(item.message) if isinstance(item.message, Mapping)
                              else item.message).encode()
            except (TypeError, ValueError):
                raw = repr(item.message).encode()
        if device is None and isinstance(item.message, Mapping):
            d, s = item.message.get("device"), item.message.get("site")
            device = d if valid_id(d) else None
            site = s if valid_id(s) else None
        self._insert_dead_letter(db, item.topic, raw, reason, device, site, at)

    def _insert_dead_letter(self, db: Database, topic: str, raw: bytes, reason: str,
                            device: str | None, site: str | None, at: float) -> int:
        row = db.query_one("INSERT INTO dead_letters (topic, raw, reason, device, site,"
                           " received_at) VALUES (?, ?, ?, ?, ?, ?) RETURNING id",
                           (_safe_text(topic), bytes(raw), _safe_text(reason), device, site, at))
        assert row is not None
        return int(row[0])

    # --- export queue ---------------------------------------------------------------------

    def _enqueue(self, db: Database, kind: str, device: str, site: str, ref: str,
                 payload: Mapping[str, Any], at: float, text: str | None = None) -> None:
        """Queue one export row (written with the batch's other rows, in order): ``kind`` =
        message type, ``payload`` = the message (for a capture: its metadata, not the
        samples). Bytes are stored as ``{"$base64": ...}``. ``text``: ``to_json(payload)``
        when the caller has it already."""
        if not self.export:
            return
        if text is None or "data" in payload:
            text = to_json({k: v for k, v in payload.items() if k != "data"})
        self._pending.exports.append((kind, device, site, ref, text, at))

    def claim_exports(self, limit: int = 500, *, lease_s: float = 60.0) -> list[ExportRow]:
        """Claim up to ``limit`` unclaimed (or lease-expired) export rows, lowest id first.

        Rows stay in the queue until :meth:`complete_exports`; a claim that is neither
        completed nor released becomes claimable again after ``lease_s`` [s].
        """
        now = time.time()
        token = uuid.uuid4().hex
        skip = " FOR UPDATE SKIP LOCKED" if self.db.dialect == "postgresql" else ""

        def claim(db: Database) -> list[tuple[Any, ...]]:
            return db.query(
                "UPDATE export_queue SET claimed_until = ?, claim_token = ? WHERE id IN ("
                "SELECT id FROM export_queue WHERE claimed_until IS NULL OR claimed_until < ?"
                " ORDER BY id LIMIT ?" + skip + ")"
                " RETURNING id, kind, payload",
                (now + lease_s, token, now, int(limit)))

        rows = sorted(self.db.run_in_transaction(claim), key=lambda r: int(r[0]))
        return [ExportRow(int(r[0]), r[1], from_json(r[2])) for r in rows]

    def complete_exports(self, ids: Sequence[int]) -> None:
        """Remove exported rows (ids no longer queued are ignored)."""
        self._by_ids("DELETE FROM export_queue WHERE id IN ({ids})", ids)

    def reject_exports(self, ids: Sequence[int], reason: str) -> None:
        """Move rows that can never be exported to the dead letters (payload JSON as the raw
        bytes, ``export/<kind>`` as the topic) and off the queue, in one transaction."""
        wanted = sorted({int(i) for i in ids})

        def work(db: Database) -> None:
            for row_id in wanted:
                row = db.query_one("SELECT kind, device, site, payload, created_at FROM"
                                   " export_queue WHERE id = ?" + self._lock_suffix, (row_id,))
                if row is None:
                    continue
                self._insert_dead_letter(db, f"export/{row[0]}", str(row[3]).encode(),
                                         f"export row {row_id}: {reason}", row[1], row[2],
                                         time.time())
                db.execute("DELETE FROM export_queue WHERE id = ?", (row_id,))

        self.db.run_in_transaction(work)

    def release_exports(self, ids: Sequence[int]) -> None:
        """Give claimed rows back (export failed) so the next claim retries them."""
        self._by_ids("UPDATE export_queue SET claimed_until = NULL, claim_token = NULL"
                            " WHERE id IN ({ids})", ids)

    def _by_ids(self, template: str, ids: Sequence[int]) -> int:
        ids = [int(i) for i in ids]
        if not ids:
            return 0

        def work(db: Database) -> int:
            n = 0
            for start in range(0, len(ids), 500):
                part = ids[start:start + 500]
                sql = template.replace("{ids}", ", ".join("?" * len(part)))
                n += db.execute(sql, part).rowcount
            return n

        return self.db.run_in_transaction(work)

    def export_backlog(self) -> int:
        row = self.db.query_one("SELECT COUNT(*) FROM export_queue")
        return int(row[0]) if row else 0

    # --- retention ------------------------------------------------------------------------

    def prune_received(self, before_utc: float) -> int:
        """Forget idempotency rows received before ``before_utc`` [s UTC] whose seq is at or
        below their stream's ``committed_upto`` (redeliveries of those are still recognised
        by seq <= committed_upto); returns the number of rows removed."""
        return self.db.run_in_transaction(lambda db: db.execute(
            "DELETE FROM received WHERE received_at < ? AND seq <= (SELECT s.committed_upto"
            " FROM streams s WHERE s.device = received.device AND s.epoch = received.epoch)",
            (before_utc,)).rowcount)

    def prune_trend(self, before_utc: float) -> int:
        """Delete per-second trend rows older than ``before_utc`` [s UTC]; returns the count.

        Only trend rows are pruned: they have been queued for export when they arrived, and
        the 10-min aggregates and rollups keep the long-term record.
        """
        return self.drop_trend_before(before_utc)

    def drop_trend_before(self, before_utc: float) -> int:
        """Retention of the per-second trend: remove every row whose first second is before
        ``before_utc`` [s UTC]; returns the number of rows removed.

        PostgreSQL: whole weekly partitions that end at or before ``before_utc`` are dropped
        (no row-by-row delete, no bloat); rows of the partition that holds ``before_utc``
        are deleted. SQLite: one DELETE over the time index.
        """
        def work(db: Database) -> int:
            removed = 0
            if db.dialect == "postgresql":
                parts = db.query(
                    "SELECT c.relname, pg_get_expr(c.relpartbound, c.oid) FROM pg_inherits i"
                    " JOIN pg_class c ON c.oid = i.inhrelid WHERE i.inhparent ="
                    " to_regclass('trend') ORDER BY c.relname")
                for name, bound in parts:
                    m = re.search(r"TO \('?(-?[0-9.e+]+)'?\)", str(bound))
                    if m is None or float(m.group(1)) > before_utc:
                        continue
                    row = db.query_one(f"SELECT COUNT(*) FROM {name}")
                    db.execute(f"DROP TABLE {name}")
                    removed += int(row[0]) if row else 0
                    week = math.floor((float(m.group(1)) - 1) / TREND_PARTITION_S)
                    self._weeks.discard(week)
            removed += db.execute("DELETE FROM trend WHERE t_utc < ?", (before_utc,)).rowcount
            return removed

        return self.db.run_in_transaction(work)

    def prune_dead_letters(self, before_utc: float) -> int:
        """Delete dead letters received before ``before_utc`` [s UTC]; returns the count."""
        return self.db.run_in_transaction(lambda db: db.execute(
            "DELETE FROM dead_letters WHERE received_at < ?", (before_utc,)).rowcount)

    def prune_captures(self, before_utc: float) -> int:
        """Delete captures completed before ``before_utc`` [s UTC] and their files (a file
        shared by an identical capture that is kept stays); returns the rows removed.

        Rows go first, in one transaction; files after the commit, so a crash in between
        leaves a stray file, never a row without its file.
        """
        def work(db: Database) -> list[str]:
            names = [r[0] for r in db.query(
                "SELECT file_name FROM captures WHERE completed_at < ?", (before_utc,))]
            db.execute("DELETE FROM captures WHERE completed_at < ?", (before_utc,))
            return names

        names = self.db.run_in_transaction(work)
        for name in set(names):
            if self.db.query_one("SELECT 1 FROM captures WHERE file_name = ?", (name,)) is None:
                with suppress(FileNotFoundError):
                    (self.captures_dir / name).unlink()
        return len(names)

    def prune_export_queue(self, before_utc: float) -> int:
        """Delete export rows queued before ``before_utc`` [s UTC]. Only for a store that no
        exporter drains (the collector calls it when ``[export]`` is not configured)."""
        return self.db.run_in_transaction(lambda db: db.execute(
            "DELETE FROM export_queue WHERE created_at < ?", (before_utc,)).rowcount)

    def probe(self) -> None:
        """Prove the store can take a write transaction now (reconnecting a lost PostgreSQL
        connection first); raises the driver's error or StoreError when it cannot."""
        self.db.run_in_transaction(lambda db: db.query_one("SELECT 1"), attempts=1)

    # --- queries --------------------------------------------------------------------------

    def committed_upto(self, device: str, epoch: str) -> int | None:
        row = self.db.query_one("SELECT committed_upto FROM streams WHERE device = ? AND epoch = ?",
                                (device, epoch))
        return int(row[0]) if row else None

    def streams(self) -> dict[tuple[str, str], int]:
        return {(d, e): int(c) for d, e, c in
                self.db.query("SELECT device, epoch, committed_upto FROM streams")}

    def device_site(self, device: str) -> str | None:
        """The site a device's messages have been stored under, or None if never seen."""
        row = self.db.query_one("SELECT site FROM devices WHERE device = ?", (device,))
        return str(row[0]) if row else None

    def devices(self) -> list[dict[str, Any]]:
        rows = self.db.query("SELECT device, site, model, status, first_seen, last_seen, state,"
                             " state_since FROM devices ORDER BY device")
        return [{"device": r[0], "site": r[1], "model": from_json(r[2]) or {},
                 "status": from_json(r[3]) or {}, "first_seen": r[4], "last_seen": r[5],
                 "state": r[6], "state_since": r[7]} for r in rows]

    def events(self, device: str | None = None, *, site: str | None = None,
               start_from: float | None = None, start_before: float | None = None
               ) -> list[dict[str, Any]]:
        """Stored events, oldest start first, each with the ids of its complete captures;
        optionally of one device or site and with ``start_from <= start_utc < start_before``
        [s UTC]."""
        conds: list[str] = []
        params: list[Any] = []
        for cond, value in (("device = ?", device), ("site = ?", site),
                            ("start_utc >= ?", start_from), ("start_utc < ?", start_before)):
            if value is not None:
                conds.append(cond)
                params.append(value)
        where = ("WHERE " + " AND ".join(conds)) if conds else ""
        rows = self.db.query(
            "SELECT event_id, device, site, epoch, seq, kind, state, channels, start_utc,"
            " end_utc, duration_s, level_v, level_pu, thresholds, classification,"
            " classifier_version, payload, first_received, updated_at FROM events "
            + where + " ORDER BY start_utc, event_id", tuple(params))
        caps: dict[str, list[str]] = {}
        for cid, eid in self.db.query("SELECT capture_id, event_id FROM captures"
                                      " ORDER BY capture_id"):
            caps.setdefault(eid, []).append(cid)
        keys = ("event_id", "device", "site", "epoch", "seq", "kind", "state", "channels",
                "start_utc", "end_utc", "duration_s", "level_v", "level_pu", "thresholds",
                "classification", "classifier_version", "payload", "first_received",
                "updated_at")
        out = []
        for r in rows:
            ev = dict(zip(keys, r, strict=True))
            for k in ("channels", "thresholds", "classification", "payload"):
                ev[k] = from_json(ev[k])
            ev["captures"] = caps.get(ev["event_id"], [])
            # Time below the dip threshold (event v2 sends it; derived for v1 messages).
            payload = ev["payload"] if isinstance(ev["payload"], dict) else {}
            ev["dip_duration_s"] = (payload["dip_duration_s"] if "dip_duration_s" in payload
                                    else dip_duration_of(str(ev["kind"]), ev["duration_s"],
                                                         payload.get("enclosing_duration_s")))
            out.append(ev)
        return out

    def captures(self, event_id: str | None = None) -> list[dict[str, Any]]:
        """Complete captures (of one event, or all); ``fields`` holds what every chunk message
        repeats besides the chunk itself (for halfcycle captures: ``trigger``, ``size`` and
        the codec ``meta``); ``path`` is the payload file ``<captures_dir>/<sha256>.bin``."""
        if event_id is None:
            return self._capture_rows("", ())
        return self._capture_rows("WHERE event_id = ?", (event_id,))

    def captures_by_time(self, event_id: str | None = None) -> list[dict[str, Any]]:
        """:meth:`captures` in trigger-time order, each with ``trigger_utc`` [s UTC] (from the
        codec meta; the completion time when a capture carries none) and ``event_kind``
        (dip, swell, interruption; None when the event message is not stored)."""
        kinds = dict(self.db.query("SELECT event_id, kind FROM events"))
        out = []
        for row in self.captures(event_id):
            fields = row["fields"]
            meta = fields.get("meta") if isinstance(fields.get("meta"), dict) else {}
            t = meta.get("trigger_utc", fields.get("trigger_utc", row["completed_at"]))
            out.append({**row, "trigger_utc": float(t) if isinstance(t, int | float)
                        else float(row["completed_at"]),
                        "event_kind": kinds.get(row["event_id"])})
        out.sort(key=lambda r: (r["trigger_utc"], r["capture_id"]))
        return out

    def capture_info(self, capture_id: str) -> dict[str, Any]:
        """One complete capture as in :meth:`captures`; StoreError if not stored."""
        found = self._capture_rows("WHERE capture_id = ?", (capture_id,))
        if not found:
            raise StoreError(f"capture {capture_id} is not stored (or not complete)")
        return found[0]

    def _capture_rows(self, where: str, params: tuple[Any, ...]) -> list[dict[str, Any]]:
        rows = self.db.query("SELECT capture_id, event_id, device, site, sha256, size,"
                             " file_name, meta, completed_at FROM captures " + where
                             + " ORDER BY capture_id", params)
        return [{"capture_id": r[0], "event_id": r[1], "device": r[2], "site": r[3],
                 "sha256": r[4], "size": int(r[5]), "path": self.captures_dir / r[6],
                 "fields": from_json(r[7]) or {}, "completed_at": r[8]} for r in rows]

    def capture_payload(self, capture_id: str) -> tuple[bytes, dict[str, Any]]:
        """The reassembled bytes of a complete capture (checked against its sha256) and the
        ``fields`` of its chunk messages (see :meth:`captures`)."""
        cap = self.capture_info(capture_id)
        try:
            data = Path(cap["path"]).read_bytes()
        except FileNotFoundError:
            raise StoreError(f"capture {capture_id}: its file {cap['path'].name} is not in "
                             f"{self.captures_dir} (is that the collector's captures "
                             "folder?)") from None
        if hashlib.sha256(data).hexdigest() != cap["sha256"]:
            raise StoreError(f"capture file {cap['path']} does not match its sha256")
        return data, cap["fields"]

    def capture(self, capture_id: str) -> Capture:
        """A stored capture decoded with the wire codec (counts, scale, times, channels)."""
        from agent.wire.codec import CaptureAssembler
        from agent.wire.errors import WireError

        cap = self.capture_info(capture_id)
        data, fields = self.capture_payload(capture_id)
        # The whole payload as one chunk: the codec's own decoder checks size and digest.
        whole = {**fields, "type": "capture", "capture_id": capture_id,
                 "event_id": cap["event_id"], "index": 0, "total": 1, "sha256": cap["sha256"],
                 "data": data}
        try:
            decoded = CaptureAssembler().add(whole)
        except (WireError, KeyError, TypeError, ValueError) as exc:
            raise StoreError(f"capture {capture_id} cannot be decoded: {exc}") from exc
        assert decoded is not None
        return decoded

    def pending_chunks(self) -> dict[str, tuple[int, int]]:
        """Staged incomplete captures: capture_id → (chunks present, total)."""
        return {cid: (int(n), int(t)) for cid, n, t in self.db.query(
            "SELECT capture_id, COUNT(*), MAX(total) FROM capture_chunks GROUP BY capture_id")}

    def gaps(self, device: str | None = None) -> list[dict[str, Any]]:
        where, params = ("WHERE device = ?", (device,)) if device else ("", ())
        rows = self.db.query("SELECT device, epoch, seq, site, lane, first_seq, last_seq, count,"
                             " reason, received_at FROM gaps " + where
                             + " ORDER BY device, epoch, first_seq", params)
        keys = ("device", "epoch", "seq", "site", "lane", "first_seq", "last_seq", "count",
                "reason", "received_at")
        return [dict(zip(keys, r, strict=True)) for r in rows]

    def dead_letters(self) -> list[dict[str, Any]]:
        rows = self.db.query("SELECT id, topic, raw, reason, device, site, received_at"
                             " FROM dead_letters ORDER BY id")
        return [{"id": int(r[0]), "topic": r[1], "raw": self.db.blob(r[2]), "reason": r[3],
                 "device": r[4], "site": r[5], "received_at": r[6]} for r in rows]

    def aggregates(self, device: str | None = None) -> list[dict[str, Any]]:
        return self._rows("aggregates", device)

    def trend(self, device: str | None = None) -> list[dict[str, Any]]:
        """Stored summaries (``payload``: the message as received, bytes as bytes), ordered by
        device and time; for reading many seconds use :meth:`trend_arrays`."""
        where, params = ("WHERE device = ?", (device,)) if device else ("", ())
        rows = self.db.query("SELECT device, epoch, seq, site, t_utc, data FROM trend "
                             + where + " ORDER BY device, t_utc, epoch, seq", params)
        return [{"device": r[0], "epoch": r[1], "seq": int(r[2]), "site": r[3], "t_utc": r[4],
                 "payload": trend_codec.unpack_row(self.db.blob(r[5]), r[0], r[3], r[1],
                                                   int(r[2]))} for r in rows]

    def _trend_bodies(self, db: Database, device: str, start_utc: float | None,
                      end_utc: float | None, page: int, *, overlapping: bool = False
                      ) -> Iterator[list[dict[str, Any] | None]]:
        """Stored summary bodies of one device in time order, ``page`` rows at a time (keyset
        paging on the primary key; None for a row that does not unpack). ``overlapping``:
        also the rows that start before ``start_utc`` but may hold seconds after it."""
        last: tuple[Any, ...] | None = None
        while True:
            sql = "SELECT t_utc, epoch, seq, data FROM trend WHERE device = ?"
            params: list[Any] = [device]
            if start_utc is not None and overlapping:
                # n seconds of at least 1 s each: a row reaching past the start has
                # t_utc + n > start (the index bounds the scan to one summary's length).
                sql += " AND t_utc >= ? AND t_utc + n > ?"
                params.extend((start_utc - MAX_SUMMARY_S, start_utc))
            elif start_utc is not None:
                sql += " AND t_utc >= ?"
                params.append(start_utc)
            if end_utc is not None:
                sql += " AND t_utc < ?"
                params.append(end_utc)
            if last is not None:
                sql += " AND (t_utc, epoch, seq) > (?, ?, ?)"
                params.extend(last)
            rows = db.query(sql + " ORDER BY t_utc, epoch, seq LIMIT ?", (*params, page))
            if not rows:
                return
            yield [_unpack_body(db, data) for _, _, _, data in rows]
            if len(rows) < page:
                return
            last = tuple(rows[-1][:3])

    def trend_arrays(self, device: str, start_utc: float | None = None,
                     end_utc: float | None = None, *, page: int = 1440,
                     fields: frozenset[str] = trend_codec.ALL_FIELDS
                     ) -> Iterator[trend_codec.TrendChunk]:
        """The per-second trend of one device as numpy arrays, chunk by chunk (``page``
        summaries each, a day of 60-s summaries by default), in time order; summaries whose
        first second lies in ``[start_utc, end_utc)`` [s UTC]. Rows that do not decode are
        counted in each chunk's ``errors``. Values equal
        :func:`agent.wire.codec.summary_arrays` of each stored message; ``fields`` (see
        :data:`agent.store.trend.VOLTAGE_FIELDS`) leaves the others NaN, undecoded."""
        for bodies in self._trend_bodies(self.db, device, start_utc, end_utc, page):
            yield trend_codec.decode_rows(bodies, fields)

    def trend_seconds(self, device: str, start_utc: float | None = None,
                      end_utc: float | None = None, *, page: int = 1440
                      ) -> Iterator[trend_codec.TrendChunk]:
        """Like :meth:`trend_arrays`, but by the seconds themselves: every stored second of
        one device in ``[start_utc, end_utc)`` [s UTC] (a summary that starts before the
        start contributes its later seconds), chunk by chunk in time order."""
        for bodies in self._trend_bodies(self.db, device, start_utc, end_utc, page,
                                         overlapping=True):
            chunk = trend_codec.decode_rows(bodies)
            keep = np.ones(chunk.size, bool)
            if start_utc is not None:
                keep &= chunk.t >= start_utc
            if end_utc is not None:
                keep &= chunk.t < end_utc
            yield chunk if keep.all() else trend_codec.select(chunk, keep)

    def trend_in_ranges(self, device: str, ranges: Sequence[tuple[float, float]], *,
                        fields: frozenset[str] = trend_codec.ALL_FIELDS, rows_per_chunk: int = 1440
                        ) -> Iterator[trend_codec.TrendChunk]:
        """The stored seconds of one device inside any of ``ranges`` (``[a, b)`` [s UTC],
        sorted, not overlapping), in time order: one indexed query per range, the rows of
        several ranges decoded together (about ``rows_per_chunk`` summaries a chunk)."""
        bodies: list[dict[str, Any] | None] = []
        bounds: list[tuple[float, float]] = []

        def flush() -> trend_codec.TrendChunk:
            chunk = trend_codec.decode_rows(bodies, fields)
            starts = np.array([a for a, _ in bounds])
            ends = np.array([b for _, b in bounds])
            k = np.searchsorted(starts, chunk.t, side="right") - 1
            keep = (k >= 0) & (chunk.t < ends[np.maximum(k, 0)])
            bodies.clear()
            bounds.clear()
            return chunk if keep.all() else trend_codec.select(chunk, keep)

        seen: set[tuple[Any, ...]] = set()  # a long summary may reach into two ranges
        for a, b in ranges:
            rows = self.db.query(
                "SELECT t_utc, epoch, seq, data FROM trend WHERE device = ? AND t_utc >= ?"
                " AND t_utc + n > ? AND t_utc < ? ORDER BY t_utc, epoch, seq",
                (device, a - MAX_SUMMARY_S, a, b))
            for t_utc, epoch, seq, data in rows:
                if t_utc < a:
                    if (t_utc, epoch, seq) in seen:
                        continue
                    seen.add((t_utc, epoch, seq))
                elif t_utc + MAX_SUMMARY_S > b:
                    seen.add((t_utc, epoch, seq))
                bodies.append(_unpack_body(self.db, data))
            bounds.append((a, b))
            if len(bodies) >= rows_per_chunk:
                yield flush()
        if bodies:
            yield flush()

    def interval_rollups(self, device: str, start_utc: float | None = None,
                         end_utc: float | None = None
                         ) -> tuple[dict[str, np.ndarray], dict[str, np.ndarray]]:
        """One device's 10-min rollups with interval start in ``[start_utc, end_utc)`` as
        column arrays (NULL as NaN), ordered by time: per channel (``t_utc``, ``channel``,
        ``seconds``, ``flagged``, ``sum_v``, ``sum_sq_v2``, ``min_v``, ``max_v``, ``low_v``,
        ``peak_v``) and per unit (``t_utc`` and :data:`UNIT_COLUMNS`)."""
        conds, params = _period(device, start_utc, end_utc)
        ccols = ("t_utc", "channel", "seconds", "flagged", "sum_v", "sum_sq_v2", "min_v",
                 "max_v", "low_v", "peak_v")
        ucols = ("t_utc", *UNIT_COLUMNS)
        out = []
        for cols, sql in ((ccols, f"SELECT {', '.join(ccols)} FROM trend_rollup WHERE "
                           f"span_s = {trend_codec.SPANS[0]} AND {conds} ORDER BY t_utc, channel"),
                          (ucols, f"SELECT {', '.join(ucols)} FROM trend_unit WHERE {conds}"
                           " ORDER BY t_utc")):
            rows = self.db.query(sql, params)
            table = np.array(rows, dtype=np.float64) if rows else np.empty((0, len(cols)))
            out.append({c: table[:, i] for i, c in enumerate(cols)})
        return out[0], out[1]

    def ten_min_aggregates(self, device: str, start_utc: float | None = None,
                           end_utc: float | None = None) -> list[Any]:
        """Stored aggregate messages of one device whose ``t`` lies in ``[start_utc,
        end_utc)``, in time order (None for a row that does not parse)."""
        conds, params = _period(device, start_utc, end_utc)
        out: list[Any] = []
        for (text,) in self.db.query(f"SELECT payload FROM aggregates WHERE {conds}"
                                     " ORDER BY t_utc, epoch, seq", params):
            try:
                out.append(from_json(text))
            except ValueError:
                out.append(None)
        return out

    def rollups(self, device: str | None = None, *, span_s: int = 600,
                start_utc: float | None = None, end_utc: float | None = None
                ) -> list[dict[str, Any]]:
        """Trend rollups (:class:`agent.store.trend.RollupRow` fields; ``below``/``above``
        keyed by pu threshold) of one device or all, intervals of ``span_s`` (600, or a
        multiple such as 86400 folded from the 10-min rows) starting in ``[start_utc,
        end_utc)``, ordered by device, time and channel."""
        base = trend_codec.SPANS[0]
        if span_s != base:
            if span_s <= 0 or span_s % base:
                raise ValueError(f"span_s must be a multiple of {base}, got {span_s}")
            lo = None if start_utc is None else math.ceil(start_utc / span_s) * span_s
            hi = None if end_utc is None else math.ceil(end_utc / span_s) * span_s
            return trend_codec.fold(self.rollups(device, span_s=base, start_utc=lo,
                                                 end_utc=hi), span_s)
        conds: list[str] = ["span_s = ?"]
        params: list[Any] = [span_s]
        for cond, value in (("device = ?", device), ("t_utc >= ?", start_utc),
                            ("t_utc < ?", end_utc)):
            if value is not None:
                conds.append(cond)
                params.append(value)
        cols = ("device", "t_utc", "channel", "seconds", "flagged", "sum_v", "sum_sq_v2",
                "min_v", "max_v", "low_v", "peak_v", "nominal_v", *_ROLLUP_COUNTS)
        rows = self.db.query(f"SELECT {', '.join(cols)} FROM trend_rollup WHERE "
                             + " AND ".join(conds) + " ORDER BY device, t_utc, channel",
                             tuple(params))
        out = []
        for r in rows:
            d = dict(zip(cols, r, strict=True))
            counts = [d.pop(c) for c in _ROLLUP_COUNTS]
            d["span_s"] = span_s
            d["below"] = None if counts[0] is None else dict(
                zip(trend_codec.LOW_PU, map(int, counts[:3]), strict=True))
            d["above"] = None if counts[3] is None else dict(
                zip(trend_codec.HIGH_PU, map(int, counts[3:]), strict=True))
            out.append(d)
        return out

    def _rows(self, table: str, device: str | None) -> list[dict[str, Any]]:
        where, params = ("WHERE device = ?", (device,)) if device else ("", ())
        rows = self.db.query(f"SELECT device, epoch, seq, site, t_utc, payload FROM {table} "
                             + where + " ORDER BY device, t_utc, epoch, seq", params)
        return [{"device": r[0], "epoch": r[1], "seq": int(r[2]), "site": r[3], "t_utc": r[4],
                 "payload": from_json(r[5])} for r in rows]

    def outage_windows(self, site: str | None = None, *, merged: bool = True,
                       start_from: float | None = None, end_before: float | None = None
                       ) -> list[OutageWindow]:
        """Device outage windows from the stored restart reports and last-gasp events, of
        one site or all, sorted by (start, device).

        ``merged`` (default): the windows of one device that overlap or touch are one window
        (:func:`agent.store.outages.device_outage_windows`, sources ``restart_report`` and
        ``last_gasp``); False: one window per stored report. ``start_from``/``end_before``
        [s UTC]: only windows overlapping ``[start_from, end_before)``.
        """
        conds: list[str] = []
        params: list[Any] = []
        for cond, value in (("site = ?", site), ("end_utc >= ?", start_from),
                            ("start_utc < ?", end_before)):
            if value is not None:
                conds.append(cond)
                params.append(value)
        where = ("WHERE " + " AND ".join(conds)) if conds else ""
        rows = self.db.query("SELECT device, site, start_utc, end_utc, source, slack_s FROM"
                             " outage_windows " + where + " ORDER BY start_utc, device, id",
                             tuple(params))
        if not merged:
            return [OutageWindow(r[0], r[1], float(r[2]), float(r[3]),
                                 ("restart_report" if r[4] == "restart" else "last_gasp",))
                    for r in rows]
        # The stored windows as the reports they came from, so the merge rule is the pure one.
        restarts = [{"device": r[0], "site": r[1], "state": "online", "last_ran": r[2],
                     "t": r[3]} for r in rows if r[4] == "restart"]
        gasps = [{"device": r[0], "site": r[1], "ended_by": "power_loss", "start_utc": r[2],
                  "end_utc": r[3], "end_uncertainty_s": r[5]} for r in rows
                 if r[4] == "last_gasp"]
        return device_outage_windows(restarts, gasps)

    def site_outages(self, fraction: float = 0.5, *, site: str | None = None,
                     start_from: float | None = None, end_before: float | None = None
                     ) -> list[SiteOutage]:
        """Site-level outages: periods when more than ``fraction`` of a site's devices were
        out at once (:func:`agent.store.outages.site_outages` over :meth:`outage_windows`;
        a site's devices are those the store knows at that site, plus any with a window
        there)."""
        windows = self.outage_windows(site, start_from=start_from, end_before=end_before)
        members: dict[str, set[str]] = {}
        for device, dev_site in self.db.query("SELECT device, site FROM devices"):
            members.setdefault(dev_site, set()).add(device)
        for w in windows:
            members.setdefault(w.site, set()).add(w.device)
        return _site_outages(windows, members, fraction)

    def count(self, table: str) -> int:
        """Row count of one store table (for tests and reports)."""
        if table not in _TABLES:
            raise ValueError(f"unknown table {table!r}")
        row = self.db.query_one(f"SELECT COUNT(*) FROM {table}")
        return int(row[0]) if row else 0


_TABLES = ("devices", "streams", "received", "aggregates", "trend", "trend_rollup", "trend_unit",
           "events", "captures", "capture_chunks", "gaps", "dead_letters", "export_queue",
           "outage_windows", "alert_state", "alert_queue", "alert_log", "schema_version")

__all__ = ["BadMessage", "CommitInfo", "ExportRow", "Item", "RecorderStore", "StoreError",
           "envelope", "from_json", "to_json", "write_file_durably"]
