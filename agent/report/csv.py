"""CSV exports of the recorder store: events, aggregates, the per-second trend and outages.

RFC 4180 text: a header row, comma-separated fields, CRLF line ends, fields quoted when they
hold a comma, a quote or a line break (the ``csv`` module's defaults). Units are in the column
names (``_v`` volts, ``_s`` seconds, ``_pu`` per unit of the declared voltage, ``_hz``,
``_pct`` percent); times are given twice, as ISO 8601 UTC (``..._utc_iso``, millisecond
resolution, ``Z``) and as UTC seconds since the epoch (``..._utc_s``). An empty field is a
value the store does not hold. Rows are read from the store a batch at a time and written as
they come (:meth:`agent.store.db.Database.stream`), so a large store is never held in memory.

Multi-channel values are one row per channel (long form), so every file has the same columns
whatever the service type.
"""

from __future__ import annotations

import csv
import math
import sys
from collections.abc import Iterator, Sequence
from datetime import UTC, datetime
from typing import Any, TextIO

from agent.store.recorder import RecorderStore, from_json
from agent.store.trend import unpack_row
from agent.wire.codec import summary_arrays
from agent.wire.errors import WireError

WHATS = ("events", "aggregates", "trend", "outages")

COLUMNS: dict[str, tuple[str, ...]] = {
    "events": ("event_id", "site", "device", "kind", "state", "start_utc_iso", "end_utc_iso",
               "start_utc_s", "duration_s", "level_v", "level_pu", "channels",
               "ieee1159_category", "ieee1159_duration_class", "itic_region", "semi_f47",
               "ieee1564_severity", "ended_by"),
    "aggregates": ("site", "device", "kind", "start_utc_iso", "start_utc_s", "duration_s",
                   "channel", "rms_v", "thd_pct", "frequency_hz", "flagged", "count"),
    "trend": ("site", "device", "t_utc_iso", "t_utc_s", "channel", "rms_v", "rms_min_v",
              "rms_max_v", "thd_pct", "frequency_hz", "imbalance_pct", "flags"),
    "outages": ("site", "device", "start_utc_iso", "end_utc_iso", "start_utc_s", "duration_s",
                "sources"),
}

#: The longest summary the trend filter allows for [s]: a summary stored with ``t0`` before
#: ``--since`` may still hold seconds after it.
MAX_SUMMARY_S = 3600.0


def iso(t: float | None) -> str:
    """ISO 8601 UTC with milliseconds and ``Z`` (empty for None)."""
    if t is None or not math.isfinite(t):
        return ""
    text = datetime.fromtimestamp(t, UTC).isoformat(timespec="milliseconds")
    return text.replace("+00:00", "Z")


def num(value: Any, digits: int) -> str:
    """A number rounded to ``digits`` decimals; empty for None, NaN or a non-number."""
    if isinstance(value, bool) or not isinstance(value, int | float):
        return ""
    x = float(value)
    if not math.isfinite(x):
        return ""
    return repr(round(x, digits))


def _where(filters: Sequence[tuple[str, Any]]) -> tuple[str, tuple[Any, ...]]:
    used = [(cond, value) for cond, value in filters if value is not None]
    if not used:
        return "", ()
    return " WHERE " + " AND ".join(c for c, _ in used), tuple(v for _, v in used)


def event_rows(store: RecorderStore, *, site: str | None = None, unit: str | None = None,
               since: float | None = None, until: float | None = None) -> Iterator[list[str]]:
    where, params = _where([("site = ?", site), ("device = ?", unit),
                            ("start_utc >= ?", since), ("start_utc < ?", until)])
    for (event_id, ev_site, device, kind, state, channels, start, end, duration, level_v,
         level_pu, classification, payload) in store.db.stream(
            "SELECT event_id, site, device, kind, state, channels, start_utc, end_utc,"
            " duration_s, level_v, level_pu, classification, payload FROM events" + where
            + " ORDER BY start_utc, event_id", params):
        cls = from_json(classification) or {}
        body = from_json(payload) or {}
        chans = from_json(channels) or []
        yield [event_id, ev_site, device, kind or "", state, iso(start), iso(end),
               num(start, 3), num(duration, 4), num(level_v, 2), num(level_pu, 4),
               ";".join(str(c) for c in chans), str(cls.get("ieee1159_category") or ""),
               str(cls.get("ieee1159_duration_class") or ""), str(cls.get("itic_region") or ""),
               str(cls.get("semi_f47") or ""), num(cls.get("ieee1564_severity"), 3),
               str(body.get("ended_by") or "")]


def _at(values: Any, i: int) -> Any:
    return values[i] if isinstance(values, list) and i < len(values) else None


def aggregate_rows(store: RecorderStore, *, site: str | None = None, unit: str | None = None,
                   since: float | None = None, until: float | None = None
                   ) -> Iterator[list[str]]:
    where, params = _where([("site = ?", site), ("device = ?", unit),
                            ("t_utc >= ?", since), ("t_utc < ?", until)])
    for ag_site, device, kind, t, duration, payload in store.db.stream(
            "SELECT site, device, kind, t_utc, duration_s, payload FROM aggregates" + where
            + " ORDER BY t_utc, device, epoch, seq", params):
        p = from_json(payload) or {}
        channels = p.get("channels") or [str(i) for i in range(len(p.get("rms") or []))]
        head = [ag_site, device, kind or "", iso(t), num(t, 3), num(duration, 3)]
        tail = [num(p.get("hz"), 4), "1" if p.get("flagged") else "0",
                str(p["count"]) if isinstance(p.get("count"), int) else ""]
        if not channels:  # a frequency-only aggregate
            yield [*head, "", "", "", *tail]
        for i, name in enumerate(channels):
            thd = _at(p.get("thd"), i)
            yield [*head, str(name), num(_at(p.get("rms"), i), 3),
                   num(None if thd is None else 100.0 * thd, 3), *tail]


def trend_rows(store: RecorderStore, *, site: str | None = None, unit: str | None = None,
               since: float | None = None, until: float | None = None) -> Iterator[list[str]]:
    """One row per second and channel, decoded from the stored packed summaries."""
    where, params = _where([("site = ?", site), ("device = ?", unit),
                            ("t_utc >= ?", None if since is None else since - MAX_SUMMARY_S),
                            ("t_utc < ?", until)])
    for tr_site, device, epoch, seq, data in store.db.stream(
            "SELECT site, device, epoch, seq, data FROM trend" + where
            + " ORDER BY t_utc, device, epoch, seq", params, size=100):
        try:
            a = summary_arrays(unpack_row(store.db.blob(data), device, tr_site, epoch,
                                          int(seq)))
        except (WireError, KeyError, TypeError, ValueError, IndexError) as exc:
            # Validated at ingest, so only a damaged row gets here: said, not hidden.
            print(f"halfcycle export: skipped trend row {device}/{epoch}/{seq}: summary does "
                  f"not decode ({exc})", file=sys.stderr)
            continue
        for k in range(len(a.t)):
            t = float(a.t[k])
            if not a.present[k] or (since is not None and t < since) \
                    or (until is not None and t >= until):
                continue
            shared = [num(float(a.hz[k]), 3), num(100.0 * float(a.imbalance[k]), 2),
                      str(int(a.flags[k]))]
            for i, name in enumerate(a.channels):
                yield [tr_site, device, iso(t), num(t, 3), str(name),
                       num(float(a.rms_mean[k, i]), 2), num(float(a.rms_min[k, i]), 2),
                       num(float(a.rms_max[k, i]), 2), num(100.0 * float(a.thd[k, i]), 2),
                       *shared]


def outage_rows(store: RecorderStore, *, site: str | None = None, unit: str | None = None,
                since: float | None = None, until: float | None = None) -> Iterator[list[str]]:
    """Each device's outage windows (merged, :meth:`RecorderStore.outage_windows`)."""
    for w in store.outage_windows(site, start_from=since, end_before=until):
        if unit is not None and w.device != unit:
            continue
        yield [w.site, w.device, iso(w.start_utc), iso(w.end_utc), num(w.start_utc, 3),
               num(w.end_utc - w.start_utc, 3), ";".join(w.sources)]


_ROWS = {"events": event_rows, "aggregates": aggregate_rows, "trend": trend_rows,
         "outages": outage_rows}


def write_csv(out: TextIO, store: RecorderStore, what: str, *, site: str | None = None,
              unit: str | None = None, since: float | None = None,
              until: float | None = None) -> int:
    """Write the header and every row of ``what`` to ``out`` (opened with ``newline=""``);
    returns the number of data rows."""
    if what not in _ROWS:
        raise ValueError(f"what must be one of {', '.join(WHATS)}; got {what!r}")
    writer = csv.writer(out, lineterminator="\r\n")  # RFC 4180 section 2: CRLF
    writer.writerow(COLUMNS[what])
    n = 0
    for row in _ROWS[what](store, site=site, unit=unit, since=since, until=until):
        writer.writerow(row)
        n += 1
    return n
