"""Power outages from device reports: per-device outage windows and site-level outages.

Pure logic over decoded ``status`` and ``event`` messages (schemas/status.schema.json,
schemas/event.schema.json); no I/O.

Rules
-----
1. **A Last Will never starts an outage.** The broker publishes a device's will "offline"
   only after the keepalive has run out, up to 1.5 × keepalive after the device went silent
   (MQTT 3.1.1 / 5.0 keepalive rule), and the will carries the time its connection was made,
   not when it fired. It marks the device offline (:func:`presence_from_status`, with the
   window in which it went silent) and nothing more: a network fault looks the same.
2. **Outage windows come from the agent itself, and only from power loss or unexplained
   silence.**
   - its restart report: a status message with ``last_ran`` (the last time the agent was
     alive before this start) opens the window at ``last_ran`` and closes it at the restart,
     ``t - uptime_s`` (the agent's own start; ``t`` when uptime is unknown) — unless the
     report says ``last_stop = "planned"``: the agent stopped cleanly and said so (its
     sequenced offline status with ``reason = "planned_stop"`` and a retained presence with
     the same reason), so the silence was a planned restart, not an outage
     (:func:`planned_stop_window` gives that period for the record);
   - its last-gasp record: an event ``ended_by = "power_loss"`` (the open-event journal
     closed it after the restart) opens the window at the event start and reaches at least
     to its inferred end.
   Windows of one device that overlap or touch (within ``merge_gap_s`` or the event's
   ``end_uncertainty_s``) are one outage window.
3. **Site outage.** When more than ``fraction`` (default 50 %) of a site's devices are out
   at the same instant, one :class:`SiteOutage` covers that period: its devices are those
   whose windows overlap it; start and end are the median (or the earliest start and the
   latest end) of theirs.
"""

from __future__ import annotations

import math
import statistics
from collections.abc import Callable, Collection, Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

from agent.wire.codec import PLANNED_STOP

#: MQTT: the server closes a connection silent for 1.5 × keepalive (MQTT 3.1.1 cl. 3.1.2.10).
WILL_DELAY_FACTOR = 1.5



def _num(msg: Mapping[str, Any], key: str, required: bool = False) -> float | None:
    value = msg.get(key)
    if value is None:
        if required:
            raise ValueError(f"message is missing {key!r}")
        return None
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise ValueError(f"{key} must be a finite number, got {value!r}")
    return float(value)


def _ident(msg: Mapping[str, Any], key: str) -> str:
    value = msg.get(key)
    if not isinstance(value, str) or not value:
        raise ValueError(f"message is missing {key!r}")
    return value


# --- presence (rule 1) ------------------------------------------------------------------------


@dataclass(frozen=True)
class Presence:
    """What a status message says about a device being reachable.

    ``state`` online or offline; the change happened between ``earliest_utc`` and
    ``latest_utc`` [s UTC] (equal when the device itself said so). ``planned`` is True for
    the offline report of a clean stop (``reason = "planned_stop"``): offline, not out.
    """

    device: str
    site: str
    state: Literal["online", "offline"]
    earliest_utc: float
    latest_utc: float
    planned: bool = False


def presence_from_status(msg: Mapping[str, Any], received_at: float, keepalive_s: float,
                         *, will: bool) -> Presence:
    """Presence from one status message received at ``received_at`` [s UTC].

    ``will`` is True for the broker's Last Will (the collector knows it from the message's
    properties or a retained presence topic). A will "offline" places the moment the device
    went silent in ``[received_at - 1.5 keepalive, received_at]``; a device's own
    online/heartbeat/offline report is exact at its ``t``.
    """
    device, site = _ident(msg, "device"), _ident(msg, "site")
    state = msg.get("state")
    if state not in ("online", "offline", "heartbeat"):
        raise ValueError(f"status state must be online, offline or heartbeat, got {state!r}")
    if not keepalive_s > 0:
        raise ValueError("keepalive_s must be > 0")
    if will:
        if state != "offline":
            raise ValueError("a Last Will status must say offline")
        return Presence(device, site, "offline", received_at - WILL_DELAY_FACTOR * keepalive_s,
                        received_at)
    t = _num(msg, "t", required=True)
    assert t is not None
    if state == "offline":
        return Presence(device, site, "offline", t, t, msg.get("reason") == PLANNED_STOP)
    return Presence(device, site, "online", t, t)


# --- per-device outage windows (rule 2) -------------------------------------------------------


@dataclass(frozen=True)
class OutageWindow:
    """One device without power (or without its agent) from ``start_utc`` to ``end_utc``
    [s UTC]; ``sources`` says which reports made it (``restart_report``, ``last_gasp``)."""

    device: str
    site: str
    start_utc: float
    end_utc: float
    sources: tuple[str, ...]

    @property
    def duration_s(self) -> float:
        return self.end_utc - self.start_utc


def restart_window(msg: Mapping[str, Any]) -> OutageWindow | None:
    """The window of a restart report, or None for a status message that is not one.

    Only a device's own ``online`` (or ``heartbeat``) report with ``last_ran`` qualifies,
    and not when it says ``last_stop = "planned"``; an ``offline`` message never opens a
    window (rule 1).
    """
    if msg.get("state") not in ("online", "heartbeat") or msg.get("last_ran") is None:
        return None
    if msg.get("last_stop") == "planned":
        return None  # a planned restart: silence the agent announced is no outage
    return _silence(msg, ("restart_report",))


def planned_stop_window(msg: Mapping[str, Any]) -> OutageWindow | None:
    """The downtime of a planned restart (``last_stop = "planned"``), source
    ``planned_stop``; None for any other message. Not an outage: for listing only."""
    if (msg.get("state") not in ("online", "heartbeat") or msg.get("last_ran") is None
            or msg.get("last_stop") != "planned"):
        return None
    return _silence(msg, ("planned_stop",))


def _silence(msg: Mapping[str, Any], sources: tuple[str, ...]) -> OutageWindow:
    """From ``last_ran`` to the restart ``t - uptime_s`` of a restart report."""
    last_ran = _num(msg, "last_ran", required=True)
    t = _num(msg, "t", required=True)
    uptime = _num(msg, "uptime_s")
    assert last_ran is not None and t is not None
    restart = t - uptime if uptime is not None else t
    if restart < last_ran:
        raise ValueError(f"status of {msg.get('device')!r}: restart at {restart} (t - uptime_s)"
                         f" is before last_ran {last_ran}")
    return OutageWindow(_ident(msg, "device"), _ident(msg, "site"), last_ran, restart, sources)


def last_gasp_window(msg: Mapping[str, Any]) -> OutageWindow | None:
    """The window of an event closed by a power loss (start → inferred end), else None."""
    if msg.get("ended_by") != "power_loss":
        return None
    start = _num(msg, "start_utc", required=True)
    end = _num(msg, "end_utc")
    assert start is not None
    if end is None:
        duration = _num(msg, "duration_s")
        end = start + duration if duration is not None else start
    if end < start:
        raise ValueError(f"event {msg.get('event_id')!r} ends before it starts")
    return OutageWindow(_ident(msg, "device"), _ident(msg, "site"), start, end, ("last_gasp",))


def device_outage_windows(
    statuses: Iterable[Mapping[str, Any]],
    events: Iterable[Mapping[str, Any]],
    merge_gap_s: float = 1.0,
    errors: list[str] | None = None,
) -> list[OutageWindow]:
    """Outage windows per device from restart reports and last-gasp events (rule 2).

    Windows of one device that overlap or lie within ``merge_gap_s`` [s] (or within the
    last-gasp event's ``end_uncertainty_s``, if larger) are merged. Offline messages,
    including Last Wills, contribute nothing. Sorted by (start, device).

    A message that cannot be read raises ValueError, or, when ``errors`` is a list, is
    described there and skipped so one bad report does not hide the others.
    """
    if not merge_gap_s >= 0:
        raise ValueError("merge_gap_s must be >= 0")
    per_device: dict[str, list[tuple[OutageWindow, float]]] = {}

    def add(msg: Mapping[str, Any], make: Callable[[Mapping[str, Any]], OutageWindow | None],
            last_gasp: bool) -> None:
        try:
            w = make(msg)
            slack = max(merge_gap_s, (_num(msg, "end_uncertainty_s") or 0.0)
                        if last_gasp else 0.0)
        except ValueError as exc:
            if errors is None:
                raise
            errors.append(str(exc))
            return
        if w is not None:
            per_device.setdefault(w.device, []).append((w, slack))

    for msg in statuses:
        add(msg, restart_window, False)
    for msg in events:
        add(msg, last_gasp_window, True)
    out: list[OutageWindow] = []
    for windows in per_device.values():
        windows.sort(key=lambda ws: ws[0].start_utc)
        current, slack = windows[0]
        for w, s in windows[1:]:
            if w.start_utc <= current.end_utc + max(slack, s):
                current = OutageWindow(
                    current.device, current.site, current.start_utc,
                    max(current.end_utc, w.end_utc),
                    tuple(sorted(set(current.sources) | set(w.sources))))
                slack = max(slack, s)
            else:
                out.append(current)
                current, slack = w, s
        out.append(current)
    return sorted(out, key=lambda w: (w.start_utc, w.device))


# --- site outages (rule 3) --------------------------------------------------------------------


@dataclass(frozen=True)
class SiteOutage:
    """Most of a site's devices out at once.

    ``start_utc``/``end_utc`` [s UTC] per the chosen rule; ``devices`` affected (sorted);
    ``devices_monitored`` the site's device count; ``peak_out`` the most devices out at one
    instant.
    """

    site: str
    start_utc: float
    end_utc: float
    devices: tuple[str, ...]
    devices_monitored: int
    peak_out: int

    @property
    def fraction_affected(self) -> float:
        return len(self.devices) / self.devices_monitored


def site_outages(
    windows: Iterable[OutageWindow],
    site_devices: Mapping[str, int | Collection[str]],
    fraction: float = 0.5,
    rule: Literal["median", "earliest"] = "median",
) -> list[SiteOutage]:
    """Site-level outages (rule 3).

    Parameters
    ----------
    windows : per-device outage windows (:func:`device_outage_windows`)
    site_devices : site → its monitored devices (or their number); the denominator
    fraction : a site outage needs more than this share of the site's devices out at once
    rule : ``median`` — median start and median end of the affected devices' windows (robust
        to one device with a bad clock or a late restart); ``earliest`` — earliest start and
        latest end.
    """
    if not 0 <= fraction < 1:
        raise ValueError("fraction must be in [0, 1)")
    if rule not in ("median", "earliest"):
        raise ValueError("rule must be median or earliest")
    by_site: dict[str, list[OutageWindow]] = {}
    for w in windows:
        by_site.setdefault(w.site, []).append(w)
    out: list[SiteOutage] = []
    for site, ws in by_site.items():
        if site not in site_devices:
            raise ValueError(f"site {site!r} has outage windows but no device count")
        known = site_devices[site]
        n_devices = known if isinstance(known, int) else len(known)
        outside = {w.device for w in ws} - (set(known) if not isinstance(known, int) else set())
        if not isinstance(known, int) and outside:
            raise ValueError(f"site {site!r}: devices {sorted(outside)} are not in its list")
        if n_devices < len({w.device for w in ws}):
            raise ValueError(f"site {site!r}: more devices out than monitored")
        need = math.floor(fraction * n_devices) + 1  # strictly more than fraction
        for lo, hi, peak in _crowded_periods(ws, need):
            members = [w for w in ws if w.start_utc <= hi and w.end_utc >= lo]
            devices = tuple(sorted({w.device for w in members}))
            starts = [w.start_utc for w in members]
            ends = [w.end_utc for w in members]
            if rule == "median":
                start, end = statistics.median(starts), statistics.median(ends)
            else:
                start, end = min(starts), max(ends)
            out.append(SiteOutage(site, start, end, devices, n_devices, peak))
    return sorted(out, key=lambda s: (s.start_utc, s.site))


def _crowded_periods(windows: list[OutageWindow], need: int) -> list[tuple[float, float, int]]:
    """Periods in which at least ``need`` distinct devices are out at once (sweep line);
    returns (start, end, peak count)."""
    edges: list[tuple[float, int, str]] = []
    for w in windows:
        edges.append((w.start_utc, 0, w.device))  # starts before ends at the same instant
        edges.append((w.end_utc, 1, w.device))
    edges.sort()
    out_count: dict[str, int] = {}
    periods: list[tuple[float, float, int]] = []
    open_at: float | None = None
    peak = 0
    for t, is_end, device in edges:
        if is_end:
            out_count[device] -= 1
            if out_count[device] == 0:
                del out_count[device]
        else:
            out_count[device] = out_count.get(device, 0) + 1
        n = len(out_count)
        if open_at is None and n >= need:
            open_at, peak = t, n
        elif open_at is not None:
            peak = max(peak, n)
            if n < need:
                periods.append((open_at, t, peak))
                open_at = None
    return periods
