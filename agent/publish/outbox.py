"""Durable outbox: every message is committed to SQLite before it is published.

A message is identified by ``(device, epoch, seq)``. The epoch is a random id created together
with the outbox file, so a new SD card (a new file) starts a new epoch and its data can never be
mistaken for duplicates of older data. ``seq`` is one counter per epoch shared by both lanes:
monotonic and contiguous, so the collector can tell a missing message from a late one.

A row leaves the outbox only when the collector's retained commit acknowledgement for this
epoch covers it (``ack.seq >= row.seq``). A broker PUBACK only says the broker took the message;
it is not durability (the broker may lose it, or a collector may die with it in its session).

Two lanes: :attr:`Lane.PRIORITY` (events, status, gap notices) is sent first and dropped last;
:attr:`Lane.BULK` (summaries, aggregates, captures) is dropped first, oldest first, when the
outbox exceeds its bound. Every dropped range is recorded in the ``gaps`` table and announced
with a gap notice (itself a priority-lane outbox message) so the store can tell "dropped at the
edge" from "lost". A message the broker refuses is quarantined with the reason and announced
the same way, so the collector's contiguous acknowledgement can move past it.

Gap notice semantics: every sequence number in ``[first_seq, last_seq]`` that the collector does
not already hold was dropped (or refused) at the edge and will never be sent; ``count`` is the
number of rows the edge dropped in that range. A range never spans a row that is still to be
sent, so a collector may count the whole range as accounted for.

SQLite settings: WAL journal (readers do not block the writer, a crash never corrupts the file),
``synchronous=FULL`` (each commit is fsynced before ``put`` returns). NORMAL would be faster but
after a power cut the last commits can be rolled back *after* their messages were published;
the restarted agent would then reuse those sequence numbers for different data, and the
collector would discard the new data as duplicates -- silent loss. Callers batch with
:meth:`Outbox.put_many` to amortise the fsync.

An :class:`Outbox` may be shared by threads (its calls are serialised by a lock), and several
objects -- in one process or several -- may open the same file: the sequence counter is advanced
inside a ``BEGIN IMMEDIATE`` transaction and the busy timeout waits for the other writer.
"""

from __future__ import annotations

import bisect
import secrets
import sqlite3
import threading
import time
from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from enum import IntEnum
from functools import wraps
from pathlib import Path
from typing import ParamSpec, TypeVar

import structlog

from agent.publish import topics
from agent.wire import codec

log = structlog.get_logger("halfcycle.outbox")

_P = ParamSpec("_P")
_R = TypeVar("_R")


def _locked(method: Callable[_P, _R]) -> Callable[_P, _R]:
    """Serialise a method on the instance lock (one SQLite connection, several threads)."""

    @wraps(method)
    def wrapper(*args: _P.args, **kwargs: _P.kwargs) -> _R:
        with args[0]._lock:  # type: ignore[attr-defined]
            return method(*args, **kwargs)

    return wrapper


SCHEMA_VERSION = 1


class Lane(IntEnum):
    """Outbox lane; a lower number is sent first and dropped last."""

    PRIORITY = 0  # events, status, gap notices
    BULK = 1  # summaries, aggregates, captures


LANE_NAMES = {Lane.PRIORITY: "priority", Lane.BULK: "bulk"}  # as written in gap notices
LANE_BY_NAME = {name: lane for lane, name in LANE_NAMES.items()}
REASON_OUTBOX_FULL = "outbox_full"


def _any_between(sorted_seqs: list[int], lo: int, hi: int) -> bool:
    """True when some element of ``sorted_seqs`` lies strictly between ``lo`` and ``hi``."""
    i = bisect.bisect_right(sorted_seqs, lo)
    return i < len(sorted_seqs) and sorted_seqs[i] < hi


@dataclass
class _Run:
    """A range of sequence numbers one new gap notice will cover."""

    first: int
    last: int
    count: int
    lane: int
    has_new_drop: bool = False
    ranges_of: set[int] = field(default_factory=set)  # superseded notices (their range)
    seqs_of: set[int] = field(default_factory=set)  # superseded notices (their own seq)


class OutboxError(RuntimeError):
    """The outbox file cannot be used (wrong device, newer schema, bad argument)."""


@dataclass(frozen=True)
class MessageId:
    """Identity of one message; the collector de-duplicates on it."""

    device: str
    epoch: str
    seq: int


PayloadFactory = Callable[[MessageId], bytes]
Payload = bytes | PayloadFactory


@dataclass(frozen=True)
class OutboxRow:
    """One message waiting for the collector's acknowledgement."""

    seq: int
    lane: Lane
    topic: str
    payload: bytes
    kind: str  # "data" or "gap"
    attempts: int
    published_at: float | None


@dataclass(frozen=True)
class OutboxLimits:
    """Size bound of the outbox.

    When either bound is exceeded, rows are dropped until both are below ``low_water`` times
    the bound; the hysteresis keeps gap notices few (one pass drops a block, not one row).
    ``max_rows`` counts data rows only: gap notices (never dropped) must not push events out;
    ``max_bytes`` counts everything.
    """

    max_rows: int = 200_000
    max_bytes: int = 256 * 1024 * 1024
    low_water: float = 0.9

    def __post_init__(self) -> None:
        if self.max_rows < 10 or self.max_bytes < 1024:
            raise OutboxError("outbox limits too small: max_rows >= 10 and max_bytes >= 1024")
        if not 0.1 <= self.low_water < 1.0:
            raise OutboxError("outbox low_water must be in [0.1, 1.0)")


@dataclass(frozen=True)
class OutboxStats:
    rows: int  # data rows (gap notices not included)
    bytes: int
    unsent: int
    awaiting_ack: int
    quarantined: int
    next_seq: int
    acked_seq: int
    dropped_rows: int  # rows dropped at the edge because of the size bound, ever
    gap_notices: int  # gap notices issued, ever (drops and quarantines)


@dataclass(frozen=True)
class GapRecord:
    """One gap notice issued (a later "outbox full" notice may supersede an earlier one)."""

    lane: Lane
    first_seq: int
    last_seq: int
    count: int
    reason: str
    notice_seq: int
    at: float


_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS outbox (
    seq INTEGER PRIMARY KEY,
    lane INTEGER NOT NULL,
    kind TEXT NOT NULL,
    topic TEXT NOT NULL,
    payload BLOB NOT NULL,
    size INTEGER NOT NULL,
    created_at REAL NOT NULL,
    published_at REAL,
    ack_due_at REAL,
    attempts INTEGER NOT NULL DEFAULT 0,
    quarantined TEXT
);
CREATE INDEX IF NOT EXISTS outbox_unsent ON outbox(lane, seq)
    WHERE published_at IS NULL AND quarantined IS NULL;
CREATE INDEX IF NOT EXISTS outbox_sent ON outbox(ack_due_at)
    WHERE published_at IS NOT NULL AND quarantined IS NULL;
CREATE INDEX IF NOT EXISTS outbox_lane ON outbox(lane, kind, seq);
CREATE TABLE IF NOT EXISTS totals (
    id INTEGER PRIMARY KEY CHECK (id = 1), rows INTEGER NOT NULL, bytes INTEGER NOT NULL);
INSERT OR IGNORE INTO totals VALUES (1, 0, 0);
CREATE TRIGGER IF NOT EXISTS outbox_ins AFTER INSERT ON outbox BEGIN
    UPDATE totals SET rows = rows + (NEW.kind = 'data'), bytes = bytes + NEW.size
    WHERE id = 1; END;
CREATE TRIGGER IF NOT EXISTS outbox_del AFTER DELETE ON outbox BEGIN
    UPDATE totals SET rows = rows - (OLD.kind = 'data'), bytes = bytes - OLD.size
    WHERE id = 1; END;
CREATE TABLE IF NOT EXISTS gaps (
    id INTEGER PRIMARY KEY, lane INTEGER NOT NULL, first_seq INTEGER NOT NULL,
    last_seq INTEGER NOT NULL, count INTEGER NOT NULL, reason TEXT NOT NULL,
    notice_seq INTEGER NOT NULL, at REAL NOT NULL);
CREATE TABLE IF NOT EXISTS agent_state (key TEXT PRIMARY KEY, value TEXT NOT NULL);
"""


class Outbox:
    """Durable two-lane outbox of one device (see the module docstring).

    Parameters
    ----------
    path : str or Path
        SQLite file; created (with a new epoch) when missing.
    device, site : str
        Ids of this device; ``device`` is stored in the file and checked on every open.
    limits : OutboxLimits
        Size bound.
    busy_timeout_s : float
        How long a writer waits for another connection's transaction [s].
    clock : callable
        Wall-clock time [s since the Unix epoch]; replaceable in tests.
    """

    def __init__(
        self,
        path: str | Path,
        device: str,
        site: str,
        *,
        limits: OutboxLimits | None = None,
        busy_timeout_s: float = 10.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        if not topics.valid_id(device) or not topics.valid_id(site):
            raise OutboxError(f"invalid device {device!r} or site {site!r} id")
        self.path = Path(path)
        self.device = device
        self.site = site
        self.limits = limits or OutboxLimits()
        self._clock = clock
        self._lock = threading.RLock()
        try:
            self._db = sqlite3.connect(
                str(self.path), timeout=busy_timeout_s, isolation_level=None,
                check_same_thread=False,  # access is serialised by self._lock
            )
            self._db.execute(f"PRAGMA busy_timeout = {int(busy_timeout_s * 1000)}")
            mode = self._db.execute("PRAGMA journal_mode = WAL").fetchone()[0]
            if str(mode).lower() != "wal":
                raise OutboxError(f"{self.path}: cannot switch SQLite to WAL (got {mode})")
            self._db.execute("PRAGMA synchronous = FULL")
            self.epoch, self.previous_run, self.previous_stop = self._init_schema()
        except sqlite3.Error as exc:
            # A damaged or foreign file is left untouched for inspection: never recreated
            # silently (that would hide the loss of whatever it held).
            raise OutboxError(f"{self.path}: cannot use as an outbox: {exc}") from None
        self._gap_topic = topics.topic(site, device, topics.GAP_KIND)
        self._identity = codec.Identity(site=site, device=device, epoch=self.epoch)

    # ----------------------------------------------------------------- setup
    def _init_schema(self) -> tuple[str, float | None, str | None]:
        # executescript commits any open transaction, so the DDL carries its own.
        self._db.executescript("BEGIN IMMEDIATE;" + _SCHEMA + "COMMIT;")
        with self._write():
            meta = dict(self._db.execute("SELECT key, value FROM meta").fetchall())
            if not meta:
                epoch = secrets.token_hex(8)  # 64 random bits: a new file never reuses one
                now = self._clock()
                self._db.executemany(
                    "INSERT INTO meta VALUES (?, ?)",
                    [("schema", str(SCHEMA_VERSION)), ("device", self.device),
                     ("epoch", epoch), ("next_seq", "1"), ("acked_seq", "0"),
                     ("created_at", repr(now))],
                )
                log.info("outbox_created", path=str(self.path), device=self.device, epoch=epoch)
                meta = {"device": self.device, "epoch": epoch, "schema": str(SCHEMA_VERSION)}
            if int(meta["schema"]) > SCHEMA_VERSION:
                raise OutboxError(f"{self.path}: outbox schema {meta['schema']} is newer "
                                  f"than this program ({SCHEMA_VERSION})")
            if meta["device"] != self.device:
                raise OutboxError(f"{self.path}: outbox belongs to device {meta['device']!r}, "
                                  f"not {self.device!r}")
            state = dict(self._db.execute(
                "SELECT key, value FROM agent_state WHERE key IN ('last_run', 'planned_stop')"
            ).fetchall())
        last_run = float(state["last_run"]) if "last_run" in state else None
        # The last run stopped cleanly only if nothing ran after its planned-stop mark (every
        # run writes last_run on start, which breaks the equality).
        if last_run is None:
            stop = None
        elif state.get("planned_stop") == state["last_run"]:
            stop = "planned"
        else:
            stop = "unplanned"
        return meta["epoch"], last_run, stop

    class _Tx:
        def __init__(self, db: sqlite3.Connection) -> None:
            self.db = db

        def __enter__(self) -> sqlite3.Connection:
            self.db.execute("BEGIN IMMEDIATE")
            return self.db

        def __exit__(self, exc_type: object, exc: object, tb: object) -> None:
            if exc_type is None:
                self.db.execute("COMMIT")
            else:
                self.db.execute("ROLLBACK")

    def _write(self) -> Outbox._Tx:
        return Outbox._Tx(self._db)

    @_locked
    def close(self) -> None:
        self._db.close()

    def __enter__(self) -> Outbox:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # ------------------------------------------------------------- producing
    def put(self, topic: str, payload: Payload, lane: Lane = Lane.BULK) -> MessageId:
        """Commit one message; returns its identity once it is durable.

        ``payload`` is the encoded message, or a callable that receives the
        :class:`MessageId` and returns the encoded message (so the payload can carry its own
        sequence number).
        """
        return self.put_many([(topic, payload, lane)])[0]

    @_locked
    def put_many(self, items: Iterable[tuple[str, Payload, Lane]]) -> list[MessageId]:
        """Commit several messages in one transaction (one fsync)."""
        items = list(items)
        now = self._clock()
        ids: list[MessageId] = []
        with self._write() as db:
            seq = self._next_seq(db)
            for topic, payload, lane in items:
                lane = Lane(lane)
                mid = MessageId(self.device, self.epoch, seq)
                data = payload(mid) if callable(payload) else payload
                if not isinstance(data, bytes | bytearray | memoryview):
                    raise OutboxError(f"payload for {topic!r} is {type(data).__name__}, "
                                      "not bytes")
                data = bytes(data)
                db.execute(
                    "INSERT INTO outbox (seq, lane, kind, topic, payload, size, created_at)"
                    " VALUES (?, ?, 'data', ?, ?, ?, ?)",
                    (seq, int(lane), topic, data, len(data) + len(topic), now),
                )
                ids.append(mid)
                seq += 1
            self._set_meta(db, "next_seq", seq)
            self._enforce_bound(db, now)
        return ids

    def _next_seq(self, db: sqlite3.Connection) -> int:
        return int(db.execute("SELECT value FROM meta WHERE key = 'next_seq'").fetchone()[0])

    @staticmethod
    def _set_meta(db: sqlite3.Connection, key: str, value: object) -> None:
        db.execute("UPDATE meta SET value = ? WHERE key = ?", (str(value), key))

    # ------------------------------------------------------------ size bound
    def _enforce_bound(self, db: sqlite3.Connection, now: float) -> None:
        rows, size = db.execute("SELECT rows, bytes FROM totals WHERE id = 1").fetchone()
        lim = self.limits
        if rows <= lim.max_rows and size <= lim.max_bytes:
            return
        target_rows = int(lim.max_rows * lim.low_water)
        target_bytes = int(lim.max_bytes * lim.low_water)
        # Drop order: quarantined rows (already announced), then bulk, then priority data.
        # Gap notices are never dropped: they are the record of what was dropped.
        classes = (
            ("quarantined IS NOT NULL AND kind = 'data'", None),
            ("quarantined IS NULL AND kind = 'data' AND lane = 1", Lane.BULK),
            ("quarantined IS NULL AND kind = 'data' AND lane = 0", Lane.PRIORITY),
        )
        dropped: dict[int, Lane] = {}
        for where, lane in classes:
            if rows <= target_rows and size <= target_bytes:
                break
            cur = db.execute(f"SELECT seq, size FROM outbox WHERE {where} ORDER BY seq")
            chosen: list[int] = []
            for seq, row_size in cur:
                if rows <= target_rows and size <= target_bytes:
                    break
                chosen.append(seq)
                rows -= 1
                size -= row_size
            cur.close()
            db.executemany("DELETE FROM outbox WHERE seq = ?", [(s,) for s in chosen])
            if lane is not None:
                dropped.update(dict.fromkeys(chosen, lane))
            elif chosen:
                log.warning("outbox_dropped_quarantined", count=len(chosen))
        if dropped:
            self._announce_drops(db, dropped, now)
        if rows > lim.max_rows or size > lim.max_bytes:
            log.error("outbox_over_bound_with_gap_notices_only", rows=rows, bytes=size)

    def _announce_drops(self, db: sqlite3.Connection, dropped: dict[int, Lane],
                        now: float) -> None:
        # Earlier "outbox full" notices still in the outbox may be superseded: merged into the
        # new notices and deleted, so notices stay few instead of fragmenting around each
        # other. A superseded notice's range and its own seq must then both lie inside new
        # notice ranges; candidates that do not fit stay (and split ranges like any row still
        # to be sent). Found by a fixed point: the candidate set only shrinks.
        notices: dict[int, tuple[int, int, int, Lane]] = {}
        for seq, payload in db.execute(
                "SELECT seq, payload FROM outbox WHERE kind = 'gap' AND quarantined IS NULL"):
            body = codec.unpack(bytes(payload))
            if body.get("reason") == REASON_OUTBOX_FULL:
                notices[seq] = (int(body["first_seq"]), int(body["last_seq"]),
                                int(body["count"]), LANE_BY_NAME[body["lane"]])
        lo = min([*dropped, *(n[0] for n in notices.values())])
        hi = max([*dropped, *notices])
        present = [s for (s,) in db.execute(
            "SELECT seq FROM outbox WHERE quarantined IS NULL AND seq BETWEEN ? AND ?"
            " ORDER BY seq", (lo, hi))]
        candidates = set(notices)
        while True:
            runs = self._merge_runs(dropped, notices, candidates, present)
            misfits: set[int] = set()
            for run in runs:
                if not run.has_new_drop:  # nothing new here: its notices stand as they are
                    misfits |= run.ranges_of | run.seqs_of
            for n in candidates:
                run_of_range = next(r for r in runs if n in r.ranges_of)
                run_of_seq = next(r for r in runs if n in r.seqs_of)
                if not (run_of_range.has_new_drop and run_of_seq.has_new_drop):
                    misfits.add(n)
            if not misfits:
                break
            candidates -= misfits
        # Fixed point reached: every run holds a new drop, every candidate fits.
        db.executemany("DELETE FROM outbox WHERE seq = ?", [(m,) for m in candidates])
        for run in runs:
            self._add_gap_notice(db, Lane(run.lane), run.first, run.last, run.count,
                                 REASON_OUTBOX_FULL, now)
        total = db.execute("SELECT value FROM meta WHERE key = 'dropped_rows'").fetchone()
        db.execute("INSERT OR REPLACE INTO meta VALUES ('dropped_rows', ?)",
                   (str((int(total[0]) if total else 0) + len(dropped)),))
        log.warning("outbox_dropped", rows=len(dropped), notices=len(runs),
                    superseded=len(candidates))

    @staticmethod
    def _merge_runs(dropped: dict[int, Lane], notices: dict[int, tuple[int, int, int, Lane]],
                    candidates: set[int], present: list[int]) -> list[_Run]:
        """Merge dropped rows and candidate notices into ranges that no row still to be sent
        (anything present but a candidate) splits."""
        blockers = [s for s in present if s not in candidates]
        # (first, last, count, lane, notice whose range this is, notice whose seq this is)
        pieces: list[tuple[int, int, int, int, int | None, int | None]] = [
            (s, s, 1, int(lane), None, None) for s, lane in dropped.items()]
        for n in candidates:
            first, last, count, lane = notices[n]
            pieces.append((first, last, count, int(lane), n, None))
            pieces.append((n, n, 0, int(Lane.BULK), None, n))  # BULK: claims no priority drop
        pieces.sort()
        runs: list[_Run] = []
        for first, last, count, lane_no, range_of, seq_of in pieces:
            if runs and not _any_between(blockers, runs[-1].last, first):
                run = runs[-1]
                run.last = max(run.last, last)
                run.count += count
                run.lane = min(run.lane, lane_no)
            else:
                run = _Run(first, last, count, lane_no)
                runs.append(run)
            if range_of is not None:
                run.ranges_of.add(range_of)
            elif seq_of is not None:
                run.seqs_of.add(seq_of)
            else:
                run.has_new_drop = True
        return runs

    def _add_gap_notice(self, db: sqlite3.Connection, lane: Lane, first_seq: int,
                        last_seq: int, count: int, reason: str, now: float) -> int:
        seq = self._next_seq(db)
        body = codec.gap_body(LANE_NAMES[lane], first_seq, last_seq, count, reason, t=now)
        data = codec.encode(self._identity.stamp(body, seq))
        db.execute(
            "INSERT INTO outbox (seq, lane, kind, topic, payload, size, created_at)"
            " VALUES (?, 0, 'gap', ?, ?, ?, ?)",
            (seq, self._gap_topic, data, len(data) + len(self._gap_topic), now),
        )
        db.execute(
            "INSERT INTO gaps (lane, first_seq, last_seq, count, reason, notice_seq, at)"
            " VALUES (?, ?, ?, ?, ?, ?, ?)",
            (int(lane), first_seq, last_seq, count, reason, seq, now),
        )
        self._set_meta(db, "next_seq", seq + 1)
        return seq

    # ------------------------------------------------------------- publishing
    @_locked
    def due(self, limit: int, *, now: float | None = None, skip: Sequence[int] = (),
            include_overdue: bool = True) -> list[OutboxRow]:
        """Rows to publish now: never-published rows first (priority lane first, then by
        seq), then rows whose acknowledgement is overdue (oldest deadline first)."""
        if limit <= 0:
            return []
        now = self._clock() if now is None else now
        skip_set = set(skip)
        cols = "seq, lane, topic, payload, kind, attempts, published_at"
        fresh = self._db.execute(
            f"SELECT {cols} FROM outbox WHERE published_at IS NULL AND quarantined IS NULL"
            " ORDER BY lane, seq LIMIT ?", (limit + len(skip_set),)).fetchall()
        out = [r for r in fresh if r[0] not in skip_set][:limit]
        if include_overdue and len(out) < limit:
            # an index range on ack_due_at: cheap however many rows await their ack
            overdue = self._db.execute(
                f"SELECT {cols} FROM outbox WHERE published_at IS NOT NULL"
                " AND quarantined IS NULL AND ack_due_at <= ? ORDER BY ack_due_at LIMIT ?",
                (now, limit - len(out) + len(skip_set))).fetchall()
            out += [r for r in overdue if r[0] not in skip_set][: limit - len(out)]
        return [OutboxRow(seq=r[0], lane=Lane(r[1]), topic=r[2], payload=bytes(r[3]),
                          kind=r[4], attempts=r[5], published_at=r[6]) for r in out]

    @_locked
    def mark_published(self, seqs: Iterable[int], now: float | None = None, *,
                       ack_timeout_s: float = 60.0, ack_timeout_max_s: float = 3600.0) -> None:
        """Record that these rows were handed to the broker (attempts + 1); each becomes due
        again ``ack_timeout_s`` later unless acknowledged, the timeout doubling with every
        attempt up to ``ack_timeout_max_s``, so a long collector outage does not turn into a
        resend storm."""
        now = self._clock() if now is None else now
        with self._write() as db:
            db.executemany(
                "UPDATE outbox SET published_at = ?, attempts = attempts + 1,"
                " ack_due_at = ? + MIN(? * (1 << MIN(attempts, 20)), ?) WHERE seq = ?",
                [(now, now, ack_timeout_s, ack_timeout_max_s, s) for s in seqs])

    @_locked
    def requeue_unacknowledged(self) -> int:
        """Make every unacknowledged row due at once (after a reconnect)."""
        with self._write() as db:
            cur = db.execute("UPDATE outbox SET published_at = NULL"
                             " WHERE published_at IS NOT NULL AND quarantined IS NULL")
            return cur.rowcount

    @_locked
    def acknowledge(self, epoch: str, seq: int) -> int:
        """Apply the collector's commit acknowledgement; returns the number of rows removed.

        An acknowledgement for another epoch (an older SD card) is ignored. Quarantined rows are
        kept for inspection (the gap notice already accounted for them).
        """
        if epoch != self.epoch:
            log.info("ack_other_epoch_ignored", ack_epoch=epoch, epoch=self.epoch)
            return 0
        with self._write() as db:
            issued = self._next_seq(db) - 1
            if seq > issued:
                log.warning("ack_beyond_issued", ack_seq=seq, issued=issued)
                seq = issued
            acked = int(db.execute(
                "SELECT value FROM meta WHERE key = 'acked_seq'").fetchone()[0])
            if seq > acked:
                self._set_meta(db, "acked_seq", seq)
            cur = db.execute("DELETE FROM outbox WHERE seq <= ? AND quarantined IS NULL",
                             (seq,))
            return cur.rowcount

    @_locked
    def quarantine(self, seq: int, reason: str, code: str = "refused") -> bool:
        """Stop sending row ``seq`` for good and announce it with a gap notice.

        ``reason`` (free text) stays with the row; ``code`` (``[a-z0-9_]``, e.g. ``refused``,
        ``oversized``, ``unacknowledged``) goes into the gap notice. A refused gap notice is
        quarantined without a further notice (that would loop). Returns False when the row
        is gone (already acknowledged or dropped).
        """
        now = self._clock()
        with self._write() as db:
            row = db.execute("SELECT lane, kind FROM outbox WHERE seq = ? AND quarantined"
                             " IS NULL", (seq,)).fetchone()
            if row is None:
                return False
            db.execute("UPDATE outbox SET quarantined = ? WHERE seq = ?", (reason, seq))
            if row[1] == "data":
                self._add_gap_notice(db, Lane(row[0]), seq, seq, 1, code, now)
        log.error("outbox_quarantined", seq=seq, kind=row[1], reason=reason)
        return True

    # ------------------------------------------------------------ inspection
    @_locked
    def quarantined(self) -> list[tuple[int, str, str]]:
        """``(seq, topic, reason)`` of quarantined rows."""
        return [(r[0], r[1], r[2]) for r in self._db.execute(
            "SELECT seq, topic, quarantined FROM outbox WHERE quarantined IS NOT NULL"
            " ORDER BY seq")]

    @_locked
    def gaps(self) -> list[GapRecord]:
        return [GapRecord(Lane(r[0]), r[1], r[2], r[3], r[4], r[5], r[6])
                for r in self._db.execute(
                    "SELECT lane, first_seq, last_seq, count, reason, notice_seq, at"
                    " FROM gaps ORDER BY id")]

    @_locked
    def stats(self) -> OutboxStats:
        db = self._db
        rows, size = db.execute("SELECT rows, bytes FROM totals WHERE id = 1").fetchone()
        unsent, sent, quarantined = db.execute(
            "SELECT SUM(published_at IS NULL AND quarantined IS NULL),"
            " SUM(published_at IS NOT NULL AND quarantined IS NULL),"
            " SUM(quarantined IS NOT NULL) FROM outbox").fetchone()
        meta = dict(db.execute("SELECT key, value FROM meta").fetchall())
        dropped = int(meta.get("dropped_rows", 0))
        notices = db.execute("SELECT COUNT(*) FROM gaps").fetchone()[0]
        return OutboxStats(rows=rows, bytes=size, unsent=unsent or 0, awaiting_ack=sent or 0,
                           quarantined=quarantined or 0, next_seq=int(meta["next_seq"]),
                           acked_seq=int(meta["acked_seq"]), dropped_rows=dropped,
                           gap_notices=notices)

    @_locked
    def pending_count(self) -> int:
        """Rows still to be delivered (quarantined rows excluded)."""
        return int(self._db.execute(
            "SELECT COUNT(*) FROM outbox WHERE quarantined IS NULL").fetchone()[0])

    @_locked
    def integrity_check(self) -> str:
        return str(self._db.execute("PRAGMA integrity_check").fetchone()[0])

    # ----------------------------------------------------------- agent state
    @_locked
    def heartbeat(self, now: float | None = None) -> None:
        """Record that the agent is alive, so a restart can report when it last ran."""
        now = self._clock() if now is None else now
        with self._write() as db:
            db.execute("INSERT INTO agent_state VALUES ('last_run', ?) ON CONFLICT(key)"
                       " DO UPDATE SET value = excluded.value", (repr(now),))

    @_locked
    def mark_planned_stop(self, now: float | None = None) -> None:
        """Record a clean stop: the next start reports ``last_stop = "planned"`` (no outage)
        unless anything runs and calls :meth:`heartbeat` in between. Call it last, after the
        publisher has stopped."""
        now = self._clock() if now is None else now
        with self._write() as db:
            for key in ("last_run", "planned_stop"):
                db.execute("INSERT INTO agent_state VALUES (?, ?) ON CONFLICT(key)"
                           " DO UPDATE SET value = excluded.value", (key, repr(now)))

    @_locked
    def last_run(self) -> float | None:
        row = self._db.execute(
            "SELECT value FROM agent_state WHERE key = 'last_run'").fetchone()
        return float(row[0]) if row else None
