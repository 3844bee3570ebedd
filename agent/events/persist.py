"""A small on-disk journal of open events, so an event cut short by a power loss (the
monitor usually shares the failing supply) is still reported after the restart.

The journal is one JSON file rewritten atomically (temporary file, fsync, ``os.replace``,
fsync of the directory), so after a crash it holds either the previous or the new state,
never a torn one. It is written:

- at once when an event opens or closes (:meth:`opened`, :meth:`closed`);
- at once when an open event changes kind or start — a dip that falls below the
  interruption threshold becomes an interruption, the moment the supply is most likely to
  vanish (:meth:`alive` notices it);
- otherwise at most every ``alive_interval_s`` of wall time while an event is open, with a
  "last alive" stamp (sample index and UTC). Nothing is written while no event is open.

Recovery convention: an event found open after a restart ended by ``power_loss`` at the
LAST-ALIVE stamp (the latest moment the monitor is known to have still been measuring it; the
real end lies between that stamp and the restart), with ``end_uncertainty_s`` = restart UTC
− last-alive UTC. The restart time is the later bound, not the end: the supply may have come
back long before the monitor finished booting.

Recovered events stay in the journal (in ``previous``) until :meth:`acknowledge` is called
with their ids, so a second crash before they are handed on loses nothing; repeated
:meth:`recover` calls return the same events.
"""

from __future__ import annotations

import dataclasses
import json
import math
import os
import time
from collections.abc import Callable, Iterable
from pathlib import Path
from typing import Any

from agent.acquisition.timebase import Timebase
from agent.events.types import Event, Thresholds

FORMAT = "halfcycle-open-events"
VERSION = 1


_FLOAT_FIELDS = ("start", "start_utc", "nominal_v", "level_v", "end", "end_utc",
                 "enclosing_duration_s", "enclosing_level_v", "sag_energy_s",
                 "end_uncertainty_s", "time_error_s", "enclosing_start_utc")


def _json_safe(value: Any) -> Any:
    """Non-finite floats (e.g. an unsynced clock's infinite error) as "inf"/"-inf"/"nan"."""
    if isinstance(value, float) and not math.isfinite(value):
        return repr(value)
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_json_safe(v) for v in value]
    return value


def event_to_dict(event: Event) -> dict[str, Any]:
    """A JSON-ready dict of an event (tuples become lists, non-finite floats strings)."""
    d = dataclasses.asdict(event)
    d["channels"] = list(event.channels)
    d["per_channel_level_v"] = list(event.per_channel_level_v)
    return dict(_json_safe(d))


def event_from_dict(d: dict[str, Any]) -> Event:
    """Inverse of :func:`event_to_dict`; unknown keys (newer writers) are ignored."""
    names = {f.name for f in dataclasses.fields(Event)}
    kw = {k: v for k, v in d.items() if k in names}
    th = kw.get("thresholds") or {}
    kw["thresholds"] = Thresholds(**{k: float(v) for k, v in th.items()
                                     if k in Thresholds.__dataclass_fields__})
    kw["channels"] = tuple(int(c) for c in kw.get("channels", ()))
    kw["per_channel_level_v"] = tuple(float(v) for v in kw.get("per_channel_level_v", ()))
    for name in _FLOAT_FIELDS:
        if isinstance(kw.get(name), str):
            kw[name] = float(kw[name])
    return Event(**kw)


def atomic_write_json(path: Path, doc: dict[str, Any]) -> None:
    """Write ``doc`` to ``path`` so a crash leaves the old or the new file, never a mix."""
    tmp = path.with_name(path.name + ".tmp")
    data = json.dumps(doc, allow_nan=False, separators=(",", ":")).encode()
    with open(tmp, "wb") as fh:
        fh.write(data)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    dir_fd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dir_fd)
    finally:
        os.close(dir_fd)


class OpenEventJournal:
    """Persist open events; close them as ``power_loss`` after a restart.

    Parameters
    ----------
    path : file of the journal (its directory must exist)
    alive_interval_s : float  [s] wall time between "last alive" rewrites while events are open
    timebase : Timebase, optional  maps the last-alive sample index to UTC when
        :meth:`alive` is not given a UTC (preferred: the same timebase as the detector's)
    wall_clock : callable  UTC now [s]; the last-alive UTC when neither a UTC nor a timebase
        is given
    monotonic : callable  [s] a monotonic clock for the rewrite interval
    """

    def __init__(
        self,
        path: str | Path,
        alive_interval_s: float = 1.0,
        *,
        timebase: Timebase | None = None,
        wall_clock: Callable[[], float] = time.time,
        monotonic: Callable[[], float] = time.monotonic,
    ) -> None:
        self.path = Path(path)
        self.alive_interval_s = float(alive_interval_s)
        self._wall = wall_clock
        self._timebase = timebase
        self._mono = monotonic
        self._open: dict[str, Event] = {}
        self._fingerprint: tuple[tuple[str, str, float], ...] = ()
        self._last_alive: dict[str, float] | None = None
        self._last_write = -float("inf")
        self.problems: list[str] = []
        # Entries from earlier runs: {"event": ..., "last_alive": ..., "closed": ... | None}
        self._previous: list[dict[str, Any]] = self._load()

    # ------------------------------------------------------------------ writing

    def opened(self, event: Event) -> None:
        """An event started: persist it now."""
        self._open[event.event_id] = event
        self._raise_alive(event.start, event.start_utc)
        self._write()

    def closed(self, event: Event) -> None:
        """An event ended normally: drop it from the journal now."""
        if self._open.pop(event.event_id, None) is not None:
            self._write()

    def alive(self, index: float, utc: float | None = None) -> bool:
        """The monitor has measured up to sample ``index`` (at ``utc``; default: the
        timebase's UTC of ``index``, else the wall clock).

        Rewrites the journal when an open event changed kind or start (e.g. became an
        interruption) or when ``alive_interval_s`` has passed; returns True if it wrote.
        """
        if not self._open:
            return False
        if utc is None:
            utc = self._timebase.to_utc(index) if self._timebase is not None else self._wall()
        self._last_alive = {"index": float(index), "utc": float(utc)}
        if (self._current_fingerprint() != self._fingerprint
                or self._mono() - self._last_write >= self.alive_interval_s):
            self._write()
            return True
        return False

    # ------------------------------------------------------------------ recovery

    def recover(self, now_utc: float) -> list[Event]:
        """Events left open by an earlier run, closed as ended_by="power_loss".

        The end is the last-alive stamp; ``end_uncertainty_s`` = ``now_utc`` − that stamp
        (0 if the restart clock reads earlier, e.g. an unsynced clock: see ``sync_state``).
        """
        changed = False
        out: list[Event] = []
        for entry in self._previous:
            if entry.get("closed") is None:
                entry["closed"] = event_to_dict(self._close(entry, now_utc))
                changed = True
            out.append(event_from_dict(entry["closed"]))
        if changed:
            self._write()
        return out

    def acknowledge(self, event_ids: Iterable[str]) -> None:
        """The recovered events with these ids are safely handed on: forget them."""
        ids = set(event_ids)
        kept = [e for e in self._previous if e["event"].get("event_id") not in ids]
        if len(kept) != len(self._previous):
            self._previous = kept
            self._write()

    # ------------------------------------------------------------------ internals

    @staticmethod
    def _close(entry: dict[str, Any], now_utc: float) -> Event:
        ev = event_from_dict(entry["event"])
        alive = entry.get("last_alive") or {"index": ev.start, "utc": ev.start_utc}
        ev.end = max(float(alive["index"]), ev.start)
        ev.end_utc = max(float(alive["utc"]), ev.start_utc)
        ev.ended_by = "power_loss"
        ev.end_uncertainty_s = max(0.0, float(now_utc) - ev.end_utc)
        if ev.kind == "interruption" and ev.enclosing_start_utc is not None:
            ev.enclosing_duration_s = ev.end_utc - ev.enclosing_start_utc
        return ev

    def _raise_alive(self, index: float, utc: float) -> None:
        if self._last_alive is None or index > self._last_alive["index"]:
            self._last_alive = {"index": float(index), "utc": float(utc)}

    def _current_fingerprint(self) -> tuple[tuple[str, str, float], ...]:
        return tuple((e.event_id, e.kind, e.start) for e in self._open.values())

    def _write(self) -> None:
        doc = {
            "format": FORMAT,
            "version": VERSION,
            "last_alive": self._last_alive,
            "open": [event_to_dict(e) for e in self._open.values()],
            "previous": self._previous,
        }
        atomic_write_json(self.path, doc)
        self._fingerprint = self._current_fingerprint()
        self._last_write = self._mono()

    def _load(self) -> list[dict[str, Any]]:
        """Entries from the file left by an earlier run (its open events become previous)."""
        try:
            raw = self.path.read_bytes()
        except FileNotFoundError:
            return []
        try:
            doc = json.loads(raw)
            if not isinstance(doc, dict) or doc.get("format") != FORMAT:
                raise ValueError("not an open-event journal")
            if int(doc.get("version", 0)) > VERSION:
                raise ValueError(f"journal version {doc.get('version')} is newer than {VERSION}")
            previous = list(doc.get("previous") or [])
            for ev in doc.get("open") or []:
                event_from_dict(ev)  # validate now, not at recovery
                previous.append({"event": ev, "last_alive": doc.get("last_alive"),
                                 "closed": None})
            for entry in previous:
                event_from_dict(entry["event"])
            return previous
        except (ValueError, TypeError, KeyError) as exc:
            # Keep the bytes for a person to look at; start afresh rather than crash.
            n = 0
            while (aside := self.path.with_name(f"{self.path.name}.corrupt-{n}")).exists():
                n += 1
            os.replace(self.path, aside)
            self.problems.append(f"{self.path}: unreadable journal moved to {aside}: {exc}")
            return []
