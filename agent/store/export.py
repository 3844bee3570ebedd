"""Time-series export: drain the recorder store's export queue into an InfluxDB-compatible server.

The recorder store fills an export queue in the same transaction as each commit. One
:class:`TimeSeriesExporter` per store drives that queue: it claims a batch of rows, turns them
into line-protocol points, writes them with the **synchronous** write API, and only after the
server has accepted them marks the rows complete. On an outage or a server error the rows stay
in the queue (and in the exporter's hands) and the write is retried after a bounded
exponential back-off, so nothing is lost. Every point's timestamp comes from the payload (never
from the clock of the write) and its tag set is a pure function of the payload, so a retried
write rewrites the same points: InfluxDB keeps one point per series and timestamp, and a
server that deduplicates (VictoriaMetrics with ``-dedup.minScrapeInterval``) does the same.
The batching write mode of ``influxdb-client`` is deliberately not used: it buffers points in
a background thread and drops them on exit or on a final error.

Servers
-------
* **InfluxDB 2.x**: ``url`` of the server, ``org`` (name or id), ``bucket``, and an API
  ``token`` with write permission on the bucket.
* **InfluxDB 3.x** (Core / Enterprise / Cloud): the v2-compatible write endpoint
  ``/api/v2/write`` is used; pass the database name as ``bucket`` and a token with write
  access as ``token``; ``org`` is ignored by the server but must be a non-empty string.
* Any server that accepts the InfluxDB v2 write API (the tests use VictoriaMetrics
  ``/api/v2/write``; it ignores the token unless configured and stores string fields as 0).

Precision
---------
Timestamps are sent as integers in the chosen ``precision`` (``s``, ``ms``, ``us``, ``ns``)
with the same precision declared on the write, rounded from the payload's float seconds. Use
``ms`` or finer: at ``s`` two points of one series within the same second overwrite each other.
Float seconds near the present resolve about 0.24 µs, so ``us``/``ns`` add no real detail.

Queue rows
----------
The store queues the device messages themselves (``kind`` = the message ``type``, payload =
the decoded message as in ``schemas/*.schema.json``, bytes as ``{"$base64": ...}``):
``summary``, ``aggregate``, ``event``, ``status``, ``gap`` become points; ``capture`` has no
time series and is completed without a write.

Points (measurement, tags, fields)
----------------------------------
Tags take enumerated values only (site and device ids, configured channel names, fixed
vocabularies); numbers are always fields; free text (event ids, agent versions, reasons) is
never written. A vocabulary value the exporter does not know becomes ``other`` (logged), so
a misspelt category can never grow the tag space.

``hc_trend``  (summary) tags ``site, device, channel``; fields ``rms_min, rms_mean,
    rms_max`` [V], ``thd`` [fraction]; time = start of each second.
``hc_trend_device``  (summary) tags ``site, device``; fields ``hz`` [Hz], ``imbalance``
    [fraction], ``flags`` (bitmask), ``event`` (0/1); time = start of each second.
``hc_aggregate``  tags ``site, device, channel, interval`` (the aggregate ``kind``: 3s, 10s,
    10min, ...); fields ``rms`` [V], ``thd`` [fraction], ``flagged`` (0/1), ``count``, and
    on 10-min aggregates (v2) ``h2`` .. ``h40`` [fraction of the fundamental], ``pst``,
    ``plt`` (at 2-h marks) and ``flicker_flagged`` (0/1).
``hc_aggregate_device``  tags ``site, device, interval``; fields ``hz`` [Hz], ``flagged``,
    ``count`` (frequency aggregates).
``hc_event``  (ended event) tags ``site, device, kind, category`` (IEEE 1159, e.g.
    ``momentary_sag``), ``itic`` (no_interruption / no_damage / prohibited), ``semi_f47``
    (inside / outside), ``severity_class`` (``within_curve`` when the IEEE 1564 sag severity
    Se ≤ 1, ``beyond_curve`` above), ``ended_by``; fields ``level_pu, level_v, duration_s,
    severity, sag_energy_s, end_uncertainty_s, time_error_s`` and, for rapid voltage changes
    (kind ``rvc``), ``delta_umax_v, delta_uss_v``; time = event start.
``hc_event_open``  (started, not yet ended) tags ``site, device, kind``; fields
    ``level_pu, level_v``; time = event start. The ended event goes to ``hc_event``, so
    counting ``hc_event`` never counts an event twice.
``hc_status``  tags ``site, device, sync``; fields ``online`` (0 for offline, 1 for online or
    heartbeat), ``uptime_s, outbox_depth, last_ran_utc, time_error_s``; time = ``t``, or for
    ``offline`` the collector's receive time when the queue row carries it (``created_at``):
    a Last Will's ``t`` is its connection time.
``hc_gap``  tags ``site, device``; fields ``count, first_seq, last_seq`` (messages dropped
    at the edge); time = ``t``.
Absent values (null, NaN) are left out; a tag with no value reads ``none``.

A row whose payload cannot be exported (missing key, wrong type, or refused by the server as
malformed) is never dropped: it is handed to the queue's ``reject_exports(ids, reason)`` when
the queue has one, otherwise appended to a dead-letter JSON-lines file, and only then taken
off the queue.
"""

from __future__ import annotations

import base64
import json
import math
import os
import random
import re
import threading
import time
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from fractions import Fraction
from pathlib import Path
from typing import Any, Literal, Protocol, runtime_checkable

import numpy as np
import structlog

from agent.wire.records import FLAG_EVENT

log = structlog.get_logger(__name__)

Precision = Literal["s", "ms", "us", "ns"]
_TICKS_PER_SECOND: dict[str, int] = {"s": 1, "ms": 10**3, "us": 10**6, "ns": 10**9}

# --- enumerations (tag vocabularies) -----------------------------------------------------------
EVENT_KINDS = frozenset({"dip", "swell", "interruption", "rvc"})
END_REASONS = frozenset({"recovery", "power_loss", "end_of_data"})
# IEEE 1159 categories (1995/2009 tables).
IEEE1159_CATEGORIES = frozenset({
    "instantaneous_sag", "instantaneous_swell", "momentary_interruption", "momentary_sag",
    "momentary_swell", "temporary_interruption", "temporary_sag", "temporary_swell",
    "sustained_interruption", "undervoltage", "overvoltage",
})
# ITIC (2000) curve regions, named as on the curve.
ITIC_REGIONS = frozenset({"no_interruption", "no_damage", "prohibited"})
# agent.events.classify: inside = must ride through, outside = beyond F47; None = not defined.
SEMI_F47_RESULTS = frozenset({"inside", "outside"})
SYNC_STATES = frozenset({"synced", "unsynced", "holdover", "replay"})
DEVICE_STATES = frozenset({"online", "offline", "heartbeat"})
AGGREGATE_INTERVALS = frozenset({"3s", "10s", "10min", "2h", "1h", "1d"})
UNKNOWN_TAG = "other"
MISSING_TAG = "none"

# Site/device ids are MQTT topic levels (agent.publish.topics); channel names are short labels.
_ID_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}$")
# Channel names are configured per device (agent.site.Site.channel_names): 1-16 printable.
_CHANNEL_RE = re.compile(r"^[^\x00-\x1f\x7f]{1,16}$")
_FIELD_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_]{0,63}$")

# Line-protocol escapes (InfluxDB line protocol reference; as influxdb-client applies them).
_ESCAPE_MEASUREMENT = str.maketrans({",": r"\,", " ": r"\ ", "\n": r"\n", "\t": r"\t",
                                     "\r": r"\r"})
_ESCAPE_KEY = str.maketrans({",": r"\,", "=": r"\=", " ": r"\ ", "\n": r"\n", "\t": r"\t",
                             "\r": r"\r"})
_ESCAPE_STRING = str.maketrans({'"': r'\"', "\\": r"\\"})

# --- queue protocol ----------------------------------------------------------------------------


class ExportQueue(Protocol):
    """What the exporter needs from the recorder store.

    ``claim_exports(limit)`` returns up to ``limit`` not yet completed rows, oldest first,
    each an ``(id, kind, payload)`` tuple or an object with ``id``, ``kind`` and ``payload``
    attributes (:class:`agent.store.recorder.ExportRow`); ``payload`` is a mapping or its
    JSON text. Rows stay in the queue until ``complete_exports(ids)`` is called for them.
    A queue may also offer ``release_exports(ids)`` (give claimed rows back) and
    ``reject_exports(ids, reason)`` (set them aside).
    """

    def claim_exports(self, limit: int) -> Sequence[Any]: ...

    def complete_exports(self, ids: Sequence[int]) -> object: ...


@runtime_checkable
class RejectingExportQueue(Protocol):
    """A queue that can set rows aside (dead-letter) with a reason instead of completing them."""

    def reject_exports(self, ids: Sequence[int], reason: str) -> object: ...


class PayloadError(ValueError):
    """A queue row that cannot become points; the message names the row, kind and problem."""

    def __init__(self, kind: str, problem: str, row_id: int | None = None) -> None:
        self.kind = kind
        self.problem = problem
        self.row_id = row_id
        where = f"export row {row_id} " if row_id is not None else ""
        super().__init__(f"{where}({kind}): {problem}")


# --- points ------------------------------------------------------------------------------------


@dataclass(frozen=True)
class LinePoint:
    """One point before serialisation: measurement, tags, fields and an integer timestamp."""

    measurement: str
    tags: tuple[tuple[str, str], ...]
    fields: tuple[tuple[str, float | int | str], ...]
    timestamp: int

    def to_line(self) -> str:
        """InfluxDB line protocol: tags and fields sorted by key, keys and tag values escaped,
        integers with an ``i`` suffix, non-finite floats and empty tag values left out; ""
        when no field remains. Same text as ``influxdb_client.Point.to_line_protocol``."""
        fields = []
        for key, value in sorted(self.fields):
            if isinstance(value, bool):
                text = "true" if value else "false"
            elif isinstance(value, int):
                text = f"{value}i"
            elif isinstance(value, float):
                if not math.isfinite(value):
                    continue
                text = repr(value)
                if text.endswith(".0"):
                    text = text[:-2]
            else:
                text = '"' + str(value).translate(_ESCAPE_STRING) + '"'
            fields.append(f"{key.translate(_ESCAPE_KEY)}={text}")
        if not fields:
            return ""
        head = self.measurement.translate(_ESCAPE_MEASUREMENT)
        for key, tag in sorted(self.tags):
            value = tag.translate(_ESCAPE_KEY)
            if value.endswith("\\"):
                value += " "
            if key and value:
                head += f",{key.translate(_ESCAPE_KEY)}={value}"
        return f"{head} {','.join(fields)} {self.timestamp}"


def to_timestamp(t_utc: float, precision: Precision) -> int:
    """Integer timestamp in ``precision`` ticks for UTC seconds ``t_utc`` [s].

    Computed exactly from the float's binary value (no rounding error from ``t * 1e9``), so
    the same payload always gives the same timestamp; halves round to even.
    """
    return round(Fraction(t_utc) * _TICKS_PER_SECOND[precision])


def _req(payload: Mapping[str, Any], key: str, kind: str) -> Any:
    if key not in payload or payload[key] is None:
        raise PayloadError(kind, f"missing {key!r}")
    return payload[key]


def _ident(payload: Mapping[str, Any], key: str, kind: str) -> str:
    value = _req(payload, key, kind)
    if not isinstance(value, str) or not _ID_RE.match(value):
        raise PayloadError(kind, f"{key} {value!r} is not an identifier (letters, digits, _ . -)")
    return value


def _number(value: Any, key: str, kind: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise PayloadError(kind, f"{key} must be a number, got {type(value).__name__} {value!r}")
    return float(value)


def _opt_number(payload: Mapping[str, Any], key: str, kind: str) -> float | None:
    value = payload.get(key)
    return None if value is None else _number(value, key, kind)


def _time(payload: Mapping[str, Any], key: str, kind: str) -> float:
    t = _number(_req(payload, key, kind), key, kind)
    if not math.isfinite(t):
        raise PayloadError(kind, f"{key} is not finite")
    return t


def _enum(value: Any, allowed: frozenset[str], key: str) -> str:
    """Map a value onto a tag vocabulary: itself if known, ``other`` if not, ``none`` if absent."""
    if value is None:
        return MISSING_TAG
    text = str(value).strip().lower().replace(" ", "_").replace("-", "_")
    if text in allowed:
        return text
    log.warning("export.unknown_tag_value", tag=key, value=str(value)[:80])
    return UNKNOWN_TAG


def _channel_values(payload: Mapping[str, Any], key: str, n: int, kind: str,
                    required: bool = True) -> list[float | None]:
    values = payload.get(key)
    if values is None:
        if required:
            raise PayloadError(kind, f"missing {key!r}")
        return [None] * n
    if not isinstance(values, list | tuple) or len(values) != n:
        raise PayloadError(kind, f"{key} must be a list with one value per channel ({n})")
    return [None if v is None else _number(v, key, kind) for v in values]


def _channels(payload: Mapping[str, Any], kind: str) -> list[str]:
    names = _req(payload, "channels", kind)
    if (not isinstance(names, list | tuple) or not names
            or not all(isinstance(c, str) and _CHANNEL_RE.match(c) for c in names)):
        raise PayloadError(kind, "channels must be a non-empty list of channel names")
    if len(set(names)) != len(names):
        raise PayloadError(kind, "channel names repeat")
    return list(names)


def _fields(**values: float | int | None) -> tuple[tuple[str, float | int], ...]:
    return tuple((k, v) for k, v in sorted(values.items())
                 if v is not None and not (isinstance(v, float) and not math.isfinite(v)))


def _first(payload: Mapping[str, Any], *keys: str) -> Any:
    for key in keys:
        if payload.get(key) is not None:
            return payload[key]
    return None


def _message_timestamp(payload: Mapping[str, Any], kind: str, precision: Precision) -> int:
    """The message's own time (``t``, or ``t_utc`` in older payloads) as a line timestamp."""
    t = _first(payload, "t", "t_utc")
    if t is None:
        raise PayloadError(kind, "missing 't'")
    return to_timestamp(_number(t, "t", kind), precision)


def _harmonic_fields(payload: Mapping[str, Any], channels: int, kind: str
                     ) -> list[dict[str, float | None]]:
    """Per channel ``{"h2": fraction, ...}`` from an aggregate's v2 ``harmonics`` (or empty)."""
    field = payload.get("harmonics")
    if not field:
        return [{} for _ in range(channels)]
    if not isinstance(field, Mapping) or not isinstance(field.get("values"), list):
        raise PayloadError(kind, "harmonics must be a map with a values list")
    first = field.get("first", 2)
    exp = field.get("exp", -4)
    if not all(isinstance(x, int) and not isinstance(x, bool) for x in (first, exp)):
        raise PayloadError(kind, "harmonics first and exp must be integers")
    rows = list(field["values"]) + [None] * channels
    out: list[dict[str, float | None]] = []
    for row in rows[:channels]:
        if row is None:
            out.append({})
            continue
        if not isinstance(row, list):
            raise PayloadError(kind, "harmonics values must be lists")
        out.append({f"h{first + i}": (None if x is None else _number(x, "harmonics", kind)
                                      * 10.0 ** exp) for i, x in enumerate(row)})
    return out


def _flicker_fields(payload: Mapping[str, Any], channels: int, kind: str
                    ) -> list[dict[str, float | None]]:
    """Per channel ``pst`` / ``plt`` (and ``flicker_flagged`` 0/1) from an aggregate's v2
    ``flicker`` (or empty)."""
    field = payload.get("flicker")
    if not field:
        return [{} for _ in range(channels)]
    if not isinstance(field, Mapping) or not isinstance(field.get("pst"), list):
        raise PayloadError(kind, "flicker must be a map with a pst list")
    pst = (list(field["pst"]) + [None] * channels)[:channels]
    plt = field.get("plt")
    plt = (list(plt) + [None] * channels)[:channels] if isinstance(plt, list) else [None] * channels
    flagged = 1.0 if field.get("flagged") else 0.0
    return [{"pst": None if p is None else _number(p, "pst", kind),
             "plt": None if q is None else _number(q, "plt", kind),
             "flicker_flagged": flagged if p is not None else None}
            for p, q in zip(pst, plt, strict=True)]


def aggregate_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """``hc_aggregate`` points per channel and an ``hc_aggregate_device`` point (frequency)
    for one ``aggregate`` message (schemas/aggregate.schema.json)."""
    kind = "aggregate"
    site, device = _ident(payload, "site", kind), _ident(payload, "device", kind)
    ts = _message_timestamp(payload, kind, precision)
    names = _channels(payload, kind)
    rms_raw = payload.get("rms") or []
    rms = _channel_values(payload, "rms", len(names), kind) if rms_raw else [None] * len(names)
    thd = (_channel_values(payload, "thd", len(names), kind)
           if payload.get("thd") else [None] * len(names))
    flagged = payload.get("flagged", False)
    if not isinstance(flagged, bool):
        raise PayloadError(kind, "flagged must be true or false")
    count = payload.get("count")
    if count is not None and (isinstance(count, bool) or not isinstance(count, int)):
        raise PayloadError(kind, "count must be an integer")
    interval = _enum(_first(payload, "kind", "interval") or "10min", AGGREGATE_INTERVALS,
                     "interval")
    harm = _harmonic_fields(payload, len(names), kind)
    for i, extra in enumerate(_flicker_fields(payload, len(names), kind)):
        harm[i].update(extra)
    out = []
    for name, r, h, hf in zip(names, rms, thd, harm, strict=True):
        if r is None and h is None:
            continue
        out.append(LinePoint("hc_aggregate",
                             (("channel", name), ("device", device), ("interval", interval),
                              ("site", site)),
                             _fields(rms=r, thd=h, flagged=int(flagged), count=count, **hf), ts))
    hz = _opt_number(payload, "hz", kind)
    if hz is not None:
        out.append(LinePoint("hc_aggregate_device",
                             (("device", device), ("interval", interval), ("site", site)),
                             _fields(hz=hz, flagged=int(flagged), count=count), ts))
    return out


def from_stored_json(value: Any) -> Any:
    """Undo the recorder store's JSON form of bytes (``{"$base64": ...}``)."""
    if isinstance(value, Mapping):
        if set(value) == {"$base64"}:
            return base64.b64decode(value["$base64"])
        return {k: from_stored_json(v) for k, v in value.items()}
    if isinstance(value, list):
        return [from_stored_json(v) for v in value]
    return value


def summary_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """Per-second points of one ``summary`` message (schemas/summary.schema.json):
    ``hc_trend`` per channel and second, ``hc_trend_device`` per second."""
    from agent.wire.codec import summary_arrays
    from agent.wire.errors import WireError

    kind = "summary"
    site, device = _ident(payload, "site", kind), _ident(payload, "device", kind)
    names = _channels(payload, kind)
    for key in ("t0", "period_s", "n"):
        _number(_req(payload, key, kind), key, kind)
    try:
        arrays = summary_arrays(from_stored_json(payload))
    except (WireError, KeyError, TypeError, ValueError, IndexError) as exc:
        raise PayloadError(kind, f"summary arrays do not decode: {exc}") from None
    out: list[LinePoint] = []
    has_value = arrays.present.copy()
    for values in (arrays.rms_min, arrays.rms_mean, arrays.rms_max, arrays.thd):
        has_value |= ~np.isnan(values).all(axis=1)
    has_value |= ~np.isnan(arrays.hz) | ~np.isnan(arrays.imbalance)
    for i in np.flatnonzero(has_value):
        ts = to_timestamp(float(arrays.t[i]), precision)
        for c, name in enumerate(names):
            fields = _fields(rms_min=float(arrays.rms_min[i, c]),
                             rms_mean=float(arrays.rms_mean[i, c]),
                             rms_max=float(arrays.rms_max[i, c]), thd=float(arrays.thd[i, c]))
            if fields:
                out.append(LinePoint("hc_trend", (("channel", name), ("device", device),
                                                  ("site", site)), fields, ts))
        flags = int(arrays.flags[i])
        dev_fields = _fields(hz=float(arrays.hz[i]), imbalance=float(arrays.imbalance[i]),
                             flags=flags if arrays.present[i] else None,
                             event=int(flags & FLAG_EVENT) if arrays.present[i] else None)
        if dev_fields:
            out.append(LinePoint("hc_trend_device", (("device", device), ("site", site)),
                                 dev_fields, ts))
    return out


def severity_class(severity: float | None) -> str:
    """``within_curve`` for IEEE 1564 sag severity Se ≤ 1, ``beyond_curve`` above, else ``none``."""
    if severity is None or not math.isfinite(severity):
        return MISSING_TAG
    return "within_curve" if severity <= 1.0 else "beyond_curve"


def ieee1159_tag(classification: Mapping[str, Any]) -> str:
    """One IEEE 1159 category tag from the classifier's category and duration class
    (``sag`` + ``momentary`` → ``momentary_sag``); ``none`` when unclassified or absent."""
    category = classification.get("ieee1159_category", classification.get("ieee1159"))
    if category is None or category == "unclassified":
        return MISSING_TAG
    duration_class = classification.get("ieee1159_duration_class")
    text = str(category).strip().lower()
    if text in ("sag", "swell", "interruption") and duration_class:
        text = f"{str(duration_class).strip().lower()}_{text}"
    return _enum(text, IEEE1159_CATEGORIES, "category")


def event_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """One ``hc_event`` point (ended event) or ``hc_event_open`` point (started, not ended)
    for one ``event`` message (schemas/event.schema.json)."""
    kind = "event"
    site, device = _ident(payload, "site", kind), _ident(payload, "device", kind)
    ev_kind = _req(payload, "kind", kind)
    if ev_kind not in EVENT_KINDS:
        raise PayloadError(kind, f"kind must be one of {sorted(EVENT_KINDS)}, got {ev_kind!r}")
    start = _time(payload, "start_utc", kind)
    ts = to_timestamp(start, precision)
    level_pu = _number(_req(payload, "level_pu", kind), "level_pu", kind)
    level_v = _opt_number(payload, "level_v", kind)
    duration = _opt_number(payload, "duration_s", kind)
    end = _opt_number(payload, "end_utc", kind)
    if duration is None and end is not None:
        duration = end - start
    if payload.get("change") == "started" or duration is None:
        return [LinePoint("hc_event_open", (("device", device), ("kind", ev_kind), ("site", site)),
                          _fields(level_pu=level_pu, level_v=level_v), ts)]
    if duration < 0:
        raise PayloadError(kind, f"event ends before it starts (duration {duration} s)")
    cls = payload.get("classification") or {}
    if not isinstance(cls, Mapping):
        raise PayloadError(kind, "classification must be a mapping")
    sync = payload.get("sync") or {}
    if not isinstance(sync, Mapping):
        raise PayloadError(kind, "sync must be a mapping")
    severity_raw = _first(cls, "ieee1564_severity", "severity")
    severity = None if severity_raw is None else _number(severity_raw, "severity", kind)
    tags = (
        ("category", ieee1159_tag(cls)),
        ("device", device),
        ("ended_by", _enum(payload.get("ended_by"), END_REASONS, "ended_by")),
        ("itic", _enum(_first(cls, "itic_region", "itic"), ITIC_REGIONS, "itic")),
        ("kind", ev_kind),
        ("semi_f47", _enum(cls.get("semi_f47"), SEMI_F47_RESULTS, "semi_f47")),
        ("severity_class", severity_class(severity)),
        ("site", site),
    )
    fields = _fields(level_pu=level_pu, level_v=level_v, duration_s=duration, severity=severity,
                     sag_energy_s=_opt_number(payload, "sag_energy_s", kind),
                     end_uncertainty_s=_opt_number(payload, "end_uncertainty_s", kind),
                     time_error_s=_opt_number(sync, "error_s", kind),
                     delta_umax_v=_opt_number(payload, "delta_umax_v", kind),
                     delta_uss_v=_opt_number(payload, "delta_uss_v", kind))
    return [LinePoint("hc_event", tags, fields, ts)]


def status_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """One ``hc_status`` point for one ``status`` message (schemas/status.schema.json)."""
    kind = "status"
    site, device = _ident(payload, "site", kind), _ident(payload, "device", kind)
    ts = _message_timestamp(payload, kind, precision)
    state = payload.get("state")
    if state not in DEVICE_STATES:
        raise PayloadError(kind, f"state must be one of {sorted(DEVICE_STATES)}, got {state!r}")
    clock = payload.get("clock") or {}
    if not isinstance(clock, Mapping):
        raise PayloadError(kind, "clock must be a mapping")
    depth = payload.get("outbox_depth")
    if depth is not None and (isinstance(depth, bool) or not isinstance(depth, int)):
        raise PayloadError(kind, "outbox_depth must be an integer")
    fields = _fields(online=int(state != "offline"),
                     uptime_s=_opt_number(payload, "uptime_s", kind), outbox_depth=depth,
                     last_ran_utc=_opt_number(payload, "last_ran", kind),
                     time_error_s=_opt_number(clock, "error_s", kind))
    tags = (("device", device), ("site", site),
            ("sync", _enum(clock.get("sync"), SYNC_STATES, "sync")))
    return [LinePoint("hc_status", tags, fields, ts)]


def gap_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """One ``hc_gap`` point: messages the edge dropped (schemas/gap.schema.json)."""
    kind = "gap"
    site, device = _ident(payload, "site", kind), _ident(payload, "device", kind)
    ts = _message_timestamp(payload, kind, precision)
    values = {}
    for key in ("count", "first_seq", "last_seq"):
        v = _req(payload, key, kind)
        if isinstance(v, bool) or not isinstance(v, int):
            raise PayloadError(kind, f"{key} must be an integer")
        values[key] = v
    return [LinePoint("hc_gap", (("device", device), ("site", site)), _fields(**values), ts)]


def no_points(payload: Mapping[str, Any], precision: Precision) -> list[LinePoint]:
    """Kinds that have no time series (``capture``: the recorder store keeps the file)."""
    return []


POINT_BUILDERS: dict[str, Callable[[Mapping[str, Any], Precision], list[LinePoint]]] = {
    "aggregate": aggregate_points,
    "summary": summary_points,
    "event": event_points,
    "status": status_points,
    "gap": gap_points,
    "capture": no_points,
}


def points_for_row(kind: str, payload: Any, precision: Precision = "ms",
                   received_at: float | None = None) -> list[LinePoint]:
    """Points for one queue row; raises :class:`PayloadError` when the row cannot be exported.

    ``received_at`` [s UTC] is when the collector received the message (the queue row's
    ``created_at``). An ``offline`` status is timed by it when given: a Last Will carries the
    time its connection was made, not when it fired, and would otherwise land on (and
    overwrite) the ``online`` point of that connection.
    """
    if isinstance(payload, str | bytes):
        try:
            payload = json.loads(payload)
        except ValueError as exc:
            raise PayloadError(kind, f"payload is not JSON: {exc}") from None
    if not isinstance(payload, Mapping):
        raise PayloadError(kind, f"payload must be a mapping, got {type(payload).__name__}")
    if kind == "status" and received_at is not None and payload.get("state") == "offline":
        payload = {**payload, "t": received_at}
    builder = POINT_BUILDERS.get(kind)
    if builder is None:
        known = ", ".join(sorted(POINT_BUILDERS))
        raise PayloadError(kind, f"unknown export kind (known: {known})")
    return builder(payload, precision)


# --- exporter ----------------------------------------------------------------------------------


class _BadData(Exception):
    """The server refused the batch as malformed (400/413/422)."""

    def __init__(self, status: int, message: str) -> None:
        self.status = status
        super().__init__(message)


class _Transient(Exception):
    """Outage, overload, server error or a configuration/permission problem: retry later."""


@dataclass
class ExportStep:
    """The outcome of one :meth:`TimeSeriesExporter.export_once` call."""

    claimed: int = 0
    completed: int = 0
    rejected: int = 0
    points: int = 0
    error: str | None = None
    retry_in_s: float = 0.0

    @property
    def idle(self) -> bool:
        return self.claimed == 0 and self.error is None


@dataclass
class ExportStats:
    """Totals over a :meth:`TimeSeriesExporter.drain` run."""

    completed: int = 0
    rejected: int = 0
    points: int = 0
    failures: int = 0
    errors: list[str] = field(default_factory=list)
    drained: bool = False
    elapsed_s: float = 0.0


@dataclass
class _Row:
    row_id: int
    kind: str
    payload: Any
    lines: list[str]


class TimeSeriesExporter:
    """Drive one store's export queue into an InfluxDB v2-write-compatible server.

    Parameters
    ----------
    queue : ExportQueue
        The store's export queue (``claim_exports`` / ``complete_exports``, optionally
        ``reject_exports``).
    url, token, org, bucket : str
        Server address and write credentials (see the module docstring for 2.x vs 3.x).
    precision : {"s", "ms", "us", "ns"}
        Timestamp precision of the line protocol and of the write request.
    batch_size : int
        Rows claimed at a time.
    max_points_per_write : int
        Lines per HTTP write (InfluxDB documentation suggests 5000); a claimed batch is
        written in such chunks, each chunk's rows completed as soon as it is written.
    timeout_s : float  [s]
        HTTP timeout of one write.
    backoff_initial_s, backoff_max_s : float  [s]
        Retry delay after the first failure, doubling per further failure up to the maximum.
    jitter : float
        Random fraction added to each delay (0 for deterministic delays).
    dead_letter_path : path, optional
        Where rows that can never be written are kept (JSON lines) when the queue has no
        ``reject_exports``; one of the two is required.
    """

    def __init__(
        self,
        queue: ExportQueue,
        url: str,
        token: str,
        org: str,
        bucket: str,
        precision: Precision = "ms",
        *,
        batch_size: int = 500,
        max_points_per_write: int = 5000,
        timeout_s: float = 10.0,
        backoff_initial_s: float = 0.5,
        backoff_max_s: float = 30.0,
        jitter: float = 0.1,
        dead_letter_path: str | Path | None = None,
    ) -> None:
        if precision not in _TICKS_PER_SECOND:
            raise ValueError(f"precision must be one of s, ms, us, ns; got {precision!r}")
        if batch_size < 1 or max_points_per_write < 1:
            raise ValueError("batch_size and max_points_per_write must be at least 1")
        if not (0 < backoff_initial_s <= backoff_max_s):
            raise ValueError("need 0 < backoff_initial_s <= backoff_max_s")
        if not (url and org and bucket):
            raise ValueError("url, org and bucket must be non-empty")
        if not isinstance(queue, RejectingExportQueue) and dead_letter_path is None:
            raise ValueError("the queue has no reject_exports(): give a dead_letter_path so rows "
                             "that can never be written are kept, not dropped")
        from influxdb_client import InfluxDBClient, WritePrecision
        from influxdb_client.client.write_api import SYNCHRONOUS

        self.queue = queue
        self.precision: Precision = precision
        self.bucket = bucket
        self.org = org
        self.batch_size = batch_size
        self.max_points_per_write = max_points_per_write
        self.backoff_initial_s = backoff_initial_s
        self.backoff_max_s = backoff_max_s
        self.jitter = jitter
        self.dead_letter_path = Path(dead_letter_path) if dead_letter_path is not None else None
        self._write_precision: Any = {"s": WritePrecision.S, "ms": WritePrecision.MS,
                                      "us": WritePrecision.US, "ns": WritePrecision.NS}[precision]
        # urllib3 retries off: this class owns retrying, so the queue stays the source of truth.
        self._client = InfluxDBClient(url=url, token=token, org=org,
                                      timeout=int(timeout_s * 1000), retries=False)
        self._write_api = self._client.write_api(write_options=SYNCHRONOUS)
        self._held: list[_Row] = []  # claimed, not yet written: retried before claiming more
        self._failures = 0
        self.failures_total = 0  # every failed write or queue access (the collector's metric)
        self._lock = threading.Lock()

    # -- public -----------------------------------------------------------------------------

    @property
    def held(self) -> int:
        """Rows claimed and not yet written (they are still in the queue too)."""
        return len(self._held)

    @property
    def consecutive_failures(self) -> int:
        return self._failures

    def export_once(self) -> ExportStep:
        """Write one batch (the held one first, else a newly claimed one); never sleeps."""
        with self._lock:
            step = ExportStep()
            if not self._held:
                claimed = list(self.queue.claim_exports(self.batch_size))
                step.claimed = len(claimed)
                self._held = self._prepare(claimed, step)
            else:
                step.claimed = len(self._held)
            if not self._held:
                self._failures = 0
                return step
            try:
                for chunk in self._chunks(list(self._held)):
                    self._write_rows(chunk, step)
            except _Transient as exc:
                self._failures += 1
                self.failures_total += 1
                step.error = str(exc)
                step.retry_in_s = self._backoff()
                log.warning("export.write_failed", error=step.error, held=len(self._held),
                            retry_in_s=round(step.retry_in_s, 3), failures=self._failures)
                return step
            self._failures = 0
            return step

    def drain(self, timeout_s: float = 60.0,
              sleep: Callable[[float], None] = time.sleep) -> ExportStats:
        """Export until the queue is empty or ``timeout_s`` has passed, backing off on failures."""
        stats = ExportStats()
        t0 = time.monotonic()
        while True:
            step = self.export_once()
            stats.completed += step.completed
            stats.rejected += step.rejected
            stats.points += step.points
            if step.error is not None:
                stats.failures += 1
                stats.errors.append(step.error)
            if step.idle:
                stats.drained = True
                break
            remaining = timeout_s - (time.monotonic() - t0)
            if remaining <= 0:
                break
            if step.error is not None:
                sleep(min(step.retry_in_s, remaining))
        stats.elapsed_s = time.monotonic() - t0
        return stats

    def run(self, stop: threading.Event, idle_s: float = 1.0) -> None:
        """Export until ``stop`` is set: poll every ``idle_s`` when idle, back off on failures."""
        while not stop.is_set():
            try:
                step = self.export_once()
            except Exception as exc:  # the store failed: rows stay queued, try again later
                self._failures += 1
                self.failures_total += 1
                delay = self._backoff()
                log.error("export.queue_failed", error=repr(exc), retry_in_s=round(delay, 3))
                stop.wait(delay)
                continue
            if step.error is not None:
                stop.wait(step.retry_in_s)
            elif step.idle:
                stop.wait(idle_s)

    def close(self) -> None:
        """Close the HTTP client. Held rows stay in the queue; a queue with
        ``release_exports`` gets them back at once (else its claim lease runs out)."""
        release = getattr(self.queue, "release_exports", None)
        if self._held and callable(release):
            try:
                release([r.row_id for r in self._held])
            except Exception as exc:  # the lease expires anyway: nothing is lost
                log.warning("export.release_failed", error=repr(exc))
        self._held = []
        self._write_api.close()
        self._client.close()

    def __enter__(self) -> TimeSeriesExporter:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    # -- internals --------------------------------------------------------------------------

    def _backoff(self) -> float:
        delay = min(self.backoff_max_s, self.backoff_initial_s * 2 ** (self._failures - 1))
        return delay * (1.0 + self.jitter * random.random())

    def _prepare(self, claimed: Iterable[Any], step: ExportStep) -> list[_Row]:
        rows: list[_Row] = []
        empty: list[int] = []
        for item in claimed:
            received_at = getattr(item, "created_at", None)
            if hasattr(item, "payload"):
                row_id, kind, payload = int(item.id), str(item.kind), item.payload
            else:
                row_id, kind, payload = item
            try:
                points = points_for_row(kind, payload, self.precision, received_at)
            except PayloadError as exc:
                exc.row_id = row_id
                self._reject([(row_id, kind, payload)], f"{exc.kind}: {exc.problem}")
                step.rejected += 1
                continue
            lines = [line for line in (p.to_line() for p in points) if line]
            if lines:
                rows.append(_Row(row_id, kind, payload, lines))
            else:
                empty.append(row_id)  # e.g. every value NaN: nothing to write, nothing lost
        if empty:
            self.queue.complete_exports(empty)
            step.completed += len(empty)
        return rows

    def _chunks(self, rows: list[_Row]) -> Iterator[list[_Row]]:
        """Consecutive rows of at most ``max_points_per_write`` lines (a bigger row alone)."""
        chunk: list[_Row] = []
        size = 0
        for row in rows:
            if chunk and size + len(row.lines) > self.max_points_per_write:
                yield chunk
                chunk, size = [], 0
            chunk.append(row)
            size += len(row.lines)
        if chunk:
            yield chunk

    def _write_rows(self, rows: list[_Row], step: ExportStep) -> None:
        """Write ``rows``; on a malformed-data refusal split the batch to find the bad rows."""
        try:
            self._post([line for r in rows for line in r.lines])
        except _BadData as exc:
            if len(rows) == 1:
                row = rows[0]
                self._reject([(row.row_id, row.kind, row.payload)],
                             f"server refused ({exc.status}): {exc}")
                self._drop_held([row.row_id])
                step.rejected += 1
                return
            half = len(rows) // 2
            self._write_rows(rows[:half], step)
            self._write_rows(rows[half:], step)
            return
        ids = [r.row_id for r in rows]
        self.queue.complete_exports(ids)
        self._drop_held(ids)
        step.completed += len(ids)
        step.points += sum(len(r.lines) for r in rows)

    def _drop_held(self, ids: Sequence[int]) -> None:
        gone = set(ids)
        self._held = [r for r in self._held if r.row_id not in gone]

    def _post(self, lines: list[str]) -> None:
        import urllib3
        from influxdb_client.rest import ApiException

        try:
            self._write_api.write(bucket=self.bucket, org=self.org, record=lines,
                                  write_precision=self._write_precision)
        except ApiException as exc:
            status = int(exc.status or 0)
            body = (exc.body or exc.reason or "")
            text = body.decode(errors="replace") if isinstance(body, bytes) else str(body)
            if status in (400, 413, 422):
                raise _BadData(status, text[:300]) from None
            raise _Transient(f"HTTP {status}: {text[:300]}") from None
        except (urllib3.exceptions.HTTPError, OSError) as exc:
            raise _Transient(f"{type(exc).__name__}: {exc}") from None

    def _reject(self, rows: list[tuple[int, str, Any]], reason: str) -> None:
        ids = [r[0] for r in rows]
        log.error("export.row_rejected", ids=ids, reason=reason)
        if isinstance(self.queue, RejectingExportQueue):
            self.queue.reject_exports(ids, reason)
            return
        assert self.dead_letter_path is not None  # checked in __init__
        self.dead_letter_path.parent.mkdir(parents=True, exist_ok=True)
        with self.dead_letter_path.open("a", encoding="utf-8") as fh:
            for row_id, kind, payload in rows:
                fh.write(json.dumps({"id": row_id, "kind": kind, "reason": reason,
                                     "payload": payload}, default=str) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        self.queue.complete_exports(ids)
