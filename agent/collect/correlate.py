"""Fleet correlation of RMS events: simultaneity grouping, temporal aggregation, SARFI indices.

Pure functions over lists of event records (no I/O). A *home* is one monitoring device: the
number of homes affected by a fleet event is the number of distinct devices in it.

* :func:`group_simultaneous` joins events on different devices that started together (within
  a window widened by both devices' stated clock errors) into one :class:`FleetEvent`.
* :func:`aggregate_temporal` applies the IEEE 1564 one-minute temporal aggregation (events
  within one minute of the first event of an aggregate count as one), per device or over
  fleet events, so a reclosing sequence counts once.
* :func:`sarfi` computes SARFI-X for the usual thresholds and SARFI-ITIC / SARFI-SEMI.

References
----------
IEEE 1564-2014, Guide for voltage sag indices: SARFI-X, SARFI-curve, temporal aggregation
(the one-minute rule from memory). ITIC curve (2000 revision) and SEMI F47 boundaries are
evaluated by :func:`agent.events.classify.classify`.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, Generic, Protocol, TypeVar

from agent.events.classify import classify

EVENT_KINDS = ("dip", "swell", "interruption")
#: Starts within this window [s] (plus both clocks' errors) are one fleet event (common
#: practice: a few cycles, well above the clock error of a synchronised monitor).
SIMULTANEITY_WINDOW_S = 0.100
#: IEEE 1564-2014 temporal aggregation window [s] (from memory).
TEMPORAL_WINDOW_S = 60.0
#: Usual SARFI-X thresholds [% of nominal] (IEEE 1564-2014).
SARFI_THRESHOLDS = (140, 120, 110, 90, 80, 70, 50, 10)


@dataclass(frozen=True)
class EventRecord:
    """One RMS event at one home.

    ``start_utc``/``end_utc`` [s UTC] (``end_utc`` None while open); ``level_pu`` [pu] is the
    residual for dips and interruptions, the maximum for swells; ``time_error_s`` [s] the
    device clock's stated error bound at the event (None = unknown); ``feeder`` and
    ``transformer`` optional network labels of the home.
    """

    device: str
    site: str
    start_utc: float
    end_utc: float | None
    kind: str
    level_pu: float
    time_error_s: float | None = None
    feeder: str | None = None
    transformer: str | None = None
    event_id: str | None = None
    #: [s] time below the dip threshold where the event recorded it (an interruption's own
    #: duration is its time below the interruption threshold); IEEE 1564 judges sags on it.
    dip_duration_s: float | None = None

    def __post_init__(self) -> None:
        if self.kind not in EVENT_KINDS:
            raise ValueError(f"event kind must be one of {EVENT_KINDS}, got {self.kind!r}")
        for name in ("start_utc", "level_pu"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float) \
                    or not math.isfinite(value):
                raise ValueError(f"{name} must be a finite number, got {value!r}")
        if self.end_utc is not None and not self.end_utc >= self.start_utc:
            raise ValueError(f"end_utc {self.end_utc!r} is before start_utc {self.start_utc}")
        if self.time_error_s is not None and not self.time_error_s >= 0:
            raise ValueError(f"time_error_s must be >= 0, got {self.time_error_s!r}")
        if self.dip_duration_s is not None and not (
                isinstance(self.dip_duration_s, int | float)
                and math.isfinite(self.dip_duration_s) and self.dip_duration_s >= 0):
            raise ValueError(f"dip_duration_s must be a number >= 0, got "
                             f"{self.dip_duration_s!r}")

    @property
    def duration_s(self) -> float | None:
        return None if self.end_utc is None else self.end_utc - self.start_utc

    @property
    def deviation_pu(self) -> float:
        """Distance from nominal [pu]; the larger, the more severe."""
        return abs(1.0 - self.level_pu)


_RECORD_KEYS = ("device", "site", "start_utc", "end_utc", "kind", "level_pu", "time_error_s",
                "feeder", "transformer", "event_id", "dip_duration_s")


def event_record(obj: EventRecord | Mapping[str, Any], *, feeder: str | None = None,
                 transformer: str | None = None) -> EventRecord:
    """An :class:`EventRecord` from itself or a mapping with the same keys, such as a wire
    ``event`` message (``end_utc`` may be replaced by ``duration_s``, ``time_error_s`` by
    ``sync.error_s``; other keys are ignored). ``feeder``/``transformer`` (from the device's
    site model) fill in labels the mapping lacks. Raises ValueError naming the key."""
    if isinstance(obj, EventRecord):
        return obj
    if not isinstance(obj, Mapping):
        raise ValueError(f"an event record must be a mapping, got {type(obj).__name__}")
    values: dict[str, Any] = {k: obj.get(k) for k in _RECORD_KEYS}
    sync = obj.get("sync")
    if values["time_error_s"] is None and isinstance(sync, Mapping):
        values["time_error_s"] = sync.get("error_s")
    values["feeder"] = values["feeder"] or feeder
    values["transformer"] = values["transformer"] or transformer
    for key in ("device", "site", "start_utc", "kind", "level_pu"):
        if values[key] is None:
            raise ValueError(f"event record is missing {key!r}")
    if values["end_utc"] is None and obj.get("duration_s") is not None:
        values["end_utc"] = float(values["start_utc"]) + float(obj["duration_s"])
    return EventRecord(**values)


# --- (a) simultaneity -------------------------------------------------------------------------


@dataclass(frozen=True)
class FleetEvent:
    """Events on several homes that started together.

    ``start_utc`` is the earliest start, ``end_utc`` the latest end (None while any member is
    open); ``events`` sorted by start; ``devices``/``sites`` distinct and sorted; ``feeder``/
    ``transformer`` the label the labelled members share (None if none is labelled).
    """

    events: tuple[EventRecord, ...]
    feeder: str | None = None
    transformer: str | None = None

    @property
    def start_utc(self) -> float:
        return self.events[0].start_utc

    @property
    def end_utc(self) -> float | None:
        ends = [e.end_utc for e in self.events]
        return None if any(t is None for t in ends) else max(t for t in ends if t is not None)

    @property
    def devices(self) -> tuple[str, ...]:
        return tuple(sorted({e.device for e in self.events}))

    @property
    def sites(self) -> tuple[str, ...]:
        return tuple(sorted({e.site for e in self.events}))

    @property
    def homes(self) -> int:
        """Number of homes affected (distinct devices)."""
        return len(self.devices)

    @property
    def worst(self) -> EventRecord:
        """The member farthest from nominal (deepest dip or highest swell)."""
        return max(self.events, key=lambda e: e.deviation_pu)

    @property
    def level_pu(self) -> float:
        return self.worst.level_pu


def _order(e: EventRecord) -> tuple[Any, ...]:
    """A total order, so the result never depends on the order of arrival."""
    return (e.start_utc, e.device, e.feeder or "", e.transformer or "",
            -1.0 if e.time_error_s is None else e.time_error_s, e.kind, e.level_pu,
            -1.0 if e.end_utc is None else e.end_utc, e.site, e.event_id or "")


@dataclass
class _OpenGroup:
    anchor: EventRecord
    members: list[EventRecord] = field(default_factory=list)
    feeder: str | None = None
    transformer: str | None = None


def _compatible(label: str | None, group_label: str | None) -> bool:
    """Labels narrow a group only when both sides have one."""
    return label is None or group_label is None or label == group_label


def group_simultaneous(
    events: Iterable[EventRecord | Mapping[str, Any]],
    window_s: float = SIMULTANEITY_WINDOW_S,
    default_time_error_s: float = 0.0,
) -> list[FleetEvent]:
    """Group events whose starts coincide into fleet events.

    The earliest event of a group is its anchor; a later event joins the group when its
    start lies within ``window_s + te(anchor) + te(event)`` of the anchor's start, where
    ``te`` is the device's stated clock error [s] (``default_time_error_s`` when unknown),
    and when its feeder and transformer labels agree with the group's (an unlabelled event,
    or a group without that label, does not narrow). An event that fits several groups joins
    the one with the earliest anchor. Measuring from the anchor (not from the latest member)
    keeps a chain of jittered starts from growing a group without bound.

    Parameters
    ----------
    events : iterable of EventRecord or mappings
    window_s : float  [s]  simultaneity window, 100 ms by default
    default_time_error_s : float  [s]  clock error assumed where a record states none

    Returns
    -------
    list of FleetEvent, ordered by start.
    """
    if not window_s >= 0 or not default_time_error_s >= 0:
        raise ValueError("window_s and default_time_error_s must be >= 0")
    records = sorted((event_record(e) for e in events), key=_order)

    def te(e: EventRecord) -> float:
        return default_time_error_s if e.time_error_s is None else e.time_error_s

    max_te = max((te(e) for e in records), default=0.0)
    open_groups: list[_OpenGroup] = []
    done: list[_OpenGroup] = []
    for ev in records:
        # Groups whose widest possible window has passed can take no further event.
        still = []
        for g in open_groups:
            if ev.start_utc - g.anchor.start_utc > window_s + te(g.anchor) + max_te:
                done.append(g)
            else:
                still.append(g)
        open_groups = still
        for g in open_groups:
            if (ev.start_utc - g.anchor.start_utc <= window_s + te(g.anchor) + te(ev)
                    and _compatible(ev.feeder, g.feeder)
                    and _compatible(ev.transformer, g.transformer)):
                g.members.append(ev)
                g.feeder = g.feeder or ev.feeder
                g.transformer = g.transformer or ev.transformer
                break
        else:
            open_groups.append(_OpenGroup(ev, [ev], ev.feeder, ev.transformer))
    done.extend(open_groups)
    fleet = [FleetEvent(tuple(g.members), g.feeder, g.transformer) for g in done]
    return sorted(fleet, key=lambda f: (f.start_utc, f.devices))


# --- (b) temporal aggregation -----------------------------------------------------------------


class _Timed(Protocol):
    @property
    def start_utc(self) -> float: ...

    @property
    def level_pu(self) -> float: ...


T = TypeVar("T", bound=_Timed)


@dataclass(frozen=True)
class TemporalAggregate(Generic[T]):
    """Events counted as one (IEEE 1564 temporal aggregation).

    ``members`` in start order; ``representative`` is the most severe member (farthest from
    1 pu), whose magnitude and duration stand for the aggregate (IEEE 1564, from memory);
    ``key`` the grouping key (e.g. the device) or None.
    """

    members: tuple[T, ...]
    representative: T
    key: str | None = None

    @property
    def start_utc(self) -> float:
        return self.members[0].start_utc

    @property
    def count(self) -> int:
        return len(self.members)


def aggregate_temporal(
    items: Iterable[T],
    window_s: float = TEMPORAL_WINDOW_S,
    key: Callable[[T], str] | None = None,
) -> list[TemporalAggregate[T]]:
    """IEEE 1564 temporal aggregation: within each ``key`` group (all items together when
    None), the first event opens an aggregate and every event that starts within
    ``window_s`` [s] of that first event (inclusive) belongs to it; the next event after
    the window opens the next aggregate. Works on :class:`EventRecord` (use
    ``key=lambda e: e.device`` for per-home aggregation) and on :class:`FleetEvent`.

    References
    ----------
    IEEE 1564-2014 temporal aggregation, one-minute interval (from memory).
    """
    if not window_s >= 0:
        raise ValueError("window_s must be >= 0")
    by_key: dict[str | None, list[T]] = {}
    for item in items:
        by_key.setdefault(None if key is None else key(item), []).append(item)
    out: list[TemporalAggregate[T]] = []
    for k, group in by_key.items():
        group.sort(key=lambda e: e.start_utc)
        current: list[T] = []
        for item in group:
            if current and item.start_utc - current[0].start_utc > window_s:
                out.append(_aggregate(current, k))
                current = []
            current.append(item)
        if current:
            out.append(_aggregate(current, k))
    return sorted(out, key=lambda a: (a.start_utc, a.key or ""))


def _aggregate(members: list[T], key: str | None) -> TemporalAggregate[T]:
    worst = max(members, key=lambda e: abs(1.0 - e.level_pu))
    return TemporalAggregate(tuple(members), worst, key)


# --- (c) SARFI --------------------------------------------------------------------------------


@dataclass(frozen=True)
class SarfiResult:
    """SARFI indices over one reporting period.

    ``counts[X]`` = Σ Nᵢ, homes with an event below X % (X < 100: dips and interruptions by
    residual) or above X % (X > 100: swells by maximum); ``index[X]`` = counts[X] / N_T.
    ``itic_count`` counts sags (dips and interruptions) below the ITIC curve's lower
    boundary (no-damage region): SARFI-ITIC as IEEE 1564 defines it, a sag index;
    ``itic_swell_count`` counts swells above its upper boundary (prohibited region), reported
    apart. ``semi_count`` counts sags outside SEMI F47 (50 ms–1 s only). ``itic`` /
    ``itic_swell`` / ``semi`` divide them by N_T. ``skipped_open`` events had no end (no
    duration) and were not counted.
    """

    homes_monitored: int
    counts: dict[int, int]
    index: dict[int, float]
    itic_count: int
    itic: float
    semi_count: int
    semi: float
    skipped_open: int = 0
    itic_swell_count: int = 0
    itic_swell: float = 0.0


def sarfi(
    events: Iterable[EventRecord | Mapping[str, Any]],
    homes_monitored: int,
    thresholds: Sequence[int] = SARFI_THRESHOLDS,
) -> SarfiResult:
    """SARFI-X, SARFI-ITIC and SARFI-SEMI over ended events of one period.

    Each event record is one home's event, so Nᵢ = 1 per record: pass the representatives of
    :func:`aggregate_temporal` (per device) to count a reclosing sequence once.

    Parameters
    ----------
    events : iterable of EventRecord or mappings
    homes_monitored : int  N_T, homes monitored over the period (>= homes with events)
    thresholds : sequence of int  [% of nominal], none equal to 100

    References
    ----------
    IEEE 1564-2014 SARFI-X = Σ Nᵢ / N_T and SARFI-curve (a sag index: sags below the
    curve); ITIC curve (2000); SEMI F47.
    """
    if isinstance(homes_monitored, bool) or not isinstance(homes_monitored, int) \
            or homes_monitored < 1:
        raise ValueError(f"homes_monitored must be a positive integer, got {homes_monitored!r}")
    if any(x == 100 or x <= 0 for x in thresholds):
        raise ValueError("SARFI thresholds must be positive and not 100 %")
    records = [event_record(e) for e in events]
    devices = {e.device for e in records}
    if len(devices) > homes_monitored:
        raise ValueError(f"events come from {len(devices)} homes but only {homes_monitored} "
                         "are monitored")
    counts = {int(x): 0 for x in thresholds}
    itic_count = itic_swell_count = semi_count = skipped = 0
    for ev in records:
        duration = ev.duration_s
        if ev.kind in ("dip", "interruption") and ev.dip_duration_s is not None \
                and duration is not None:
            duration = ev.dip_duration_s  # the sag's duration below the dip threshold
        if duration is None:
            skipped += 1
            continue
        low = ev.kind in ("dip", "interruption")
        for x in counts:
            limit = x / 100.0
            if (x < 100 and low and ev.level_pu < limit) or \
                    (x > 100 and not low and ev.level_pu > limit):
                counts[x] += 1
        # nominal_hz only matters for the cycle-based IEEE 1159 bounds, not ITIC/SEMI.
        result = classify(ev.kind, max(0.0, ev.level_pu), duration, 50.0)
        if low and result["itic_region"] == "no_damage":
            itic_count += 1
        elif not low and result["itic_region"] == "prohibited":
            itic_swell_count += 1
        if result["semi_f47"] == "outside":
            semi_count += 1
    n_t = float(homes_monitored)
    return SarfiResult(
        homes_monitored=homes_monitored, counts=counts,
        index={x: c / n_t for x, c in counts.items()},
        itic_count=itic_count, itic=itic_count / n_t,
        semi_count=semi_count, semi=semi_count / n_t, skipped_open=skipped,
        itic_swell_count=itic_swell_count, itic_swell=itic_swell_count / n_t,
    )
