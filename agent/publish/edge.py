"""The edge agent: source → pipeline → outbox → MQTT, as run by ``halfcycle edge run``.

The measurement loop runs on the main thread and ends each block with one outbox commit
(:class:`EdgeSink`, the last stage of the shared pipeline); the :class:`Publisher` drains the
outbox on its own thread with its own connection to the outbox file. Nothing is published
that is not first committed, and nothing leaves the outbox before the collector's commit
acknowledgement covers it.
"""

from __future__ import annotations

import math
import signal
import threading
import time
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import structlog

from agent import __version__
from agent.acquisition.base import Source, SourceInfo
from agent.acquisition.clock import ClockModel
from agent.acquisition.open_source import open_source
from agent.acquisition.timebase import ReplayTimebase, Timebase
from agent.events.classify import classify_event
from agent.events.types import Event
from agent.measurement.harmonics import max_harmonic_order
from agent.measurement.types import BasicIntervals, HalfCycleRms, MeasurementOutput
from agent.ops.systemd import Notifier
from agent.pipeline import Frame, edge_stages, push
from agent.publish import topics
from agent.publish.mqtt import Publisher, PublisherConfig
from agent.publish.outbox import Lane, MessageId, Outbox, OutboxLimits
from agent.settings import EdgeSettings
from agent.site import Site
from agent.wire import codec
from agent.wire.codec import PLANNED_STOP
from agent.wire.errors import WireError
from agent.wire.records import FLAG_BITS, SummaryBatcher, default_rms_exponent, per_second

log = structlog.get_logger("halfcycle.edge")

# Message kinds that carry the clock state of the data they hold (events carry their own).
_CLOCKED_KINDS = ("summary", "aggregate", "capture")
# Sources that are replayed or synthesised carry no wall time of their own.
_LIVE_KINDS = ("serial",)


def _concat_half(parts: list[HalfCycleRms], channels: int) -> HalfCycleRms:
    if not parts:
        e = np.empty(0)
        return HalfCycleRms(e, e.copy(), np.empty((0, channels)), np.empty(0, dtype=bool))
    return HalfCycleRms(
        np.concatenate([p.start for p in parts]),
        np.concatenate([p.end for p in parts]),
        np.concatenate([p.urms for p in parts]),
        np.concatenate([p.synthetic for p in parts]),
    )


def _concat_iv(parts: list[BasicIntervals], channels: int) -> BasicIntervals:
    if not parts:
        e = np.empty(0)
        c = np.empty((0, channels))
        return BasicIntervals(e, e.copy(), c, c.copy(), e.copy(), e.copy(), np.empty(0, dtype=bool))
    return BasicIntervals(
        *(
            np.concatenate([getattr(p, f) for p in parts])
            for f in ("start", "end", "rms", "thd", "imbalance", "hz", "flagged")
        )
    )


def _take_half(h: HalfCycleRms, keep: np.ndarray) -> HalfCycleRms:
    return HalfCycleRms(h.start[keep], h.end[keep], h.urms[keep], h.synthetic[keep])


def _take_iv(b: BasicIntervals, keep: np.ndarray) -> BasicIntervals:
    return BasicIntervals(
        b.start[keep],
        b.end[keep],
        b.rms[keep],
        b.thd[keep],
        b.imbalance[keep],
        b.hz[keep],
        b.flagged[keep],
    )


class SecondAccumulator:
    """Turns the measurement stream into per-second records on UTC second boundaries.

    A second is complete once both the Urms(1/2) values (binned by window end) and the
    10/12-cycle values (binned by start) have moved past its end; rows of incomplete seconds
    are carried to the next block, so block size never changes a record.
    """

    def __init__(self, timebase: Timebase, channels: int) -> None:
        self.timebase = timebase
        self.channels = channels
        self._half: list[HalfCycleRms] = []
        self._iv: list[BasicIntervals] = []
        self._flags: list[tuple[float, float, int]] = []  # (start index, end index, bit)
        self._next_second: float | None = None

    def _index_of(self, utc: float, ref: float) -> float:
        return ref + (utc - self.timebase.to_utc(ref)) * self.timebase.sample_rate()

    def add(
        self, m: MeasurementOutput, *, final: bool = False
    ) -> tuple[np.ndarray, tuple[Any, ...]] | None:
        if len(m.half_cycles):
            self._half.append(m.half_cycles)
        if len(m.intervals):
            self._iv.append(m.intervals)
        for fl in m.flags:
            bit = FLAG_BITS.get(fl.kind)
            if bit:
                self._flags.append((fl.start, fl.end, bit))
        half = _concat_half(self._half, self.channels)
        iv = _concat_iv(self._iv, self.channels)
        if not len(half) and not len(iv):
            return None
        first = min(x for x in (half.start[:1].tolist() + iv.start[:1].tolist()))
        if final:
            done = max(
                half.end[-1] if len(half) else -math.inf, iv.end[-1] if len(iv) else -math.inf
            )
        else:
            done = min(half.end[-1] if len(half) else math.inf, iv.end[-1] if len(iv) else math.inf)
        ref = float(done)
        if self._next_second is None:
            self._next_second = math.floor(self.timebase.to_utc(float(first)))
        t_done = self.timebase.to_utc(ref)
        last = math.ceil(t_done) if final else math.floor(t_done)
        if last <= self._next_second:
            self._half, self._iv = [half], [iv]
            return None
        secs = np.arange(self._next_second, last, 1.0)
        edges = np.array([self._index_of(float(t), ref) for t in (*secs, last)])
        rms_min, rms_mean, rms_max, hz, thd, imb, flags = per_second(half, iv, edges)
        flags = flags.copy()
        for a, b, bit in self._flags:
            hit = (edges[:-1] < b) & (edges[1:] > a)
            flags[hit] |= bit
        self._flags = [f for f in self._flags if f[1] > edges[-1]]
        self._half = [_take_half(half, half.end > edges[-1])]
        self._iv = [_take_iv(iv, iv.start >= edges[-1])]
        self._next_second = float(last)
        have = ~(np.all(np.isnan(rms_min), axis=1) & np.all(np.isnan(rms_mean), axis=1))
        if not have.any():
            return None
        return secs[have], (
            rms_min[have],
            rms_mean[have],
            rms_max[have],
            hz[have],
            thd[have],
            imb[have],
            flags[have],
        )


@dataclass
class SinkCounters:
    summaries: int = 0
    aggregates: int = 0
    events: int = 0
    captures: int = 0
    capture_chunks: int = 0
    statuses: int = 0
    encode_errors: int = 0
    by_kind: dict[str, int] = field(default_factory=dict)


class EdgeSink:
    """Last pipeline stage at the edge: everything a block produced → one outbox commit."""

    def __init__(
        self,
        outbox: Outbox,
        site: Site,
        info: SourceInfo,
        timebase: Timebase,
        *,
        summary_seconds: int = 60,
        max_packet_bytes: int = 256 * 1024,
        heartbeat_s: float = 600.0,
        clock: Callable[[], float] = time.time,
    ) -> None:
        self.outbox = outbox
        self.site = site
        self.info = info
        self.timebase = timebase
        self.identity = codec.Identity(site=site.site_id, device=site.device_id, epoch=outbox.epoch)
        self.batcher = SummaryBatcher(
            info.channel_names,
            k=summary_seconds,
            exponents={"rms": default_rms_exponent(info.channels)},
        )
        self.seconds = SecondAccumulator(timebase, info.channels)
        self.max_packet = max_packet_bytes
        self.heartbeat_s = heartbeat_s
        self.clock = clock
        self.started = time.monotonic()
        self._last_heartbeat = time.monotonic()
        self.counters = SinkCounters()
        self._steps_seen = int(getattr(timebase, "steps", 0) or 0)
        self._pending: list[tuple[str, Any, Lane]] = []

    def _topic(self, kind: str) -> str:
        return topics.topic(self.site.site_id, self.site.device_id, kind)

    def _queue(self, kind: str, body: dict[str, Any], lane: Lane) -> None:
        if kind in _CLOCKED_KINDS and "clock" not in body:
            ts = self.timebase.state()
            body["clock"] = {"sync": ts.sync, "error_s": ts.error_s}
        # Validate now, with a stand-in seq: a message our own schema refuses is a bug, and
        # it must not roll back the block's whole outbox commit (nor stop the agent).
        try:
            codec.encode(self.identity.stamp(body, 1))
        except WireError as exc:
            self._refused(kind, exc)
            return

        def payload(mid: MessageId, body: dict[str, Any] = body) -> bytes:
            return codec.encode(self.identity.stamp(body, mid.seq), check=False)

        self._pending.append((self._topic(kind), payload, lane))
        self.counters.by_kind[kind] = self.counters.by_kind.get(kind, 0) + 1

    def _clock_flags(self, arrays: tuple[Any, ...]) -> tuple[Any, ...]:
        """Mark seconds stamped by an unsynchronised clock, or right after a clock step."""
        bits = 0
        if self.timebase.state().sync in ("unsynced", "holdover"):
            bits |= FLAG_BITS["unsynced_clock"]
        steps = int(getattr(self.timebase, "steps", 0) or 0)
        if steps != self._steps_seen:
            self._steps_seen = steps
            bits |= FLAG_BITS["clock_step"]
        if not bits:
            return arrays
        *values, flags = arrays
        return (*values, np.asarray(flags) | bits)

    def status(
        self,
        state: str,
        *,
        last_ran: float | None = None,
        reason: str | None = None,
        last_stop: str | None = None,
    ) -> None:
        ts = self.timebase.state()
        self._queue(
            "status",
            codec.status_body(
                state,
                agent_version=__version__,
                uptime_s=time.monotonic() - self.started,
                outbox_depth=self.outbox.pending_count(),
                sync=ts.sync,
                time_error_s=ts.error_s,
                last_ran=last_ran,
                t=self.clock(),
                reason=reason,
                site_model=codec.site_model_body(self.site) if state == "online" else None,
                last_stop=last_stop,
                # Which harmonics the published THD covers (below 40 at low sample rates).
                thd_max_order=max(0, max_harmonic_order(self.info.sample_rate,
                                                        self.site.nominal_hz)),
            ),
            Lane.PRIORITY,
        )
        self.counters.statuses += 1

    def event(self, ev: Event, change: str) -> None:
        try:
            # channel_names lists the names of the channels involved, in the same order.
            body = codec.event_body(
                ev, change, channel_names=[self.info.channel_names[c] for c in ev.channels]
            )
        except WireError as exc:
            self._refused("event", exc)
            return
        self._queue("event", body, Lane.PRIORITY)
        self.counters.events += 1

    def _refused(self, kind: str, exc: WireError) -> None:
        self.counters.encode_errors += 1
        log.error("message_refused_by_schema", kind=kind, reason=exc.reason)

    def startup(
        self, recovered: list[Event], previous_run: float | None, last_stop: str | None = None
    ) -> None:
        """The restart report: when the agent last ran, whether that run stopped cleanly
        (``last_stop``, see :meth:`Outbox.mark_planned_stop`), and events closed by power
        loss."""
        self.status(
            "online",
            last_ran=previous_run,
            reason="restart" if previous_run is not None else "first start",
            last_stop=last_stop if previous_run is not None else None,
        )
        for ev in recovered:
            self.event(ev, "ended")
        self.commit()

    def commit(self) -> list[MessageId]:
        if not self._pending:
            return []
        ids = self.outbox.put_many(self._pending)
        self._pending = []
        return ids

    def __call__(self, frame: Frame) -> Frame:
        m = frame.measurement
        if m is not None:
            got = self.seconds.add(m, final=frame.final)
            if got is not None:
                t, arrays = got
                arrays = self._clock_flags(arrays)
                try:
                    bodies = self.batcher.add_many(t, *arrays)
                except WireError as exc:  # e.g. a second seen twice after a clock step
                    self._refused("summary", exc)
                    bodies = []
                for body in bodies:
                    self._queue("summary", body, Lane.BULK)
                    self.counters.summaries += 1
            for agg in m.aggregates:
                if agg.kind == "10min":
                    try:
                        body = codec.aggregate_body(agg, self.info.channel_names)
                    except WireError as exc:
                        self._refused("aggregate", exc)
                        continue
                    self._queue("aggregate", body, Lane.BULK)
                    self.counters.aggregates += 1
        for update in frame.updates:
            self.event(update.event, update.change)
        for cap in frame.captures:
            try:
                ts = self.timebase.state()
                chunks = codec.capture_bodies(
                    cap,
                    topic=self._topic("capture"),
                    max_packet=self.max_packet,
                    clock={"sync": ts.sync, "error_s": ts.error_s},
                )
            except WireError as exc:
                self._refused("capture", exc)
                continue
            for body in chunks:
                self._queue("capture", body, Lane.BULK)
            self.counters.captures += 1
            self.counters.capture_chunks += len(chunks)
        if frame.final:
            last = self.batcher.flush()
            if last is not None:
                self._queue("summary", last, Lane.BULK)
                self.counters.summaries += 1
        now = time.monotonic()
        if now - self._last_heartbeat >= self.heartbeat_s:
            self._last_heartbeat = now
            self.status("heartbeat")
        self.commit()
        return frame


def source_duration_s(source: Source) -> float | None:
    """Length of a finite source [s] (replays and scenarios), None for a live one."""
    rate = source.info.sample_rate
    for attr in ("frames", "rows"):  # WavSource, CsvSource
        n = getattr(source, attr, None)
        if isinstance(n, int):
            return n / rate
    scenario = getattr(source, "scenario", None)  # SimSource
    duration = getattr(scenario, "duration_s", None)
    return float(duration) if isinstance(duration, int | float) else None


def _timebase_for(settings: EdgeSettings, source: Source, speed: float) -> Timebase:
    kind = settings.source.get("kind", str, required=True)
    if kind in _LIVE_KINDS:
        return ClockModel(source.info.sample_rate)
    # A replayed or simulated source is stamped as if measured now; when it runs faster than
    # real time its origin moves back so that its last sample lands at the moment it ends,
    # and no timestamp ever lies in the future (the collector quarantines those).
    now = time.time()
    duration = source_duration_s(source)
    if duration is not None and speed > 1.0:
        now -= duration * (1.0 - 1.0 / speed)
    return ReplayTimebase(source.info.sample_rate, origin=now)


@dataclass
class EdgeResult:
    blocks: int
    samples: int
    counters: SinkCounters
    outbox_pending: int
    published: int


def run_edge(
    settings: EdgeSettings,
    *,
    stop: threading.Event | None = None,
    pace: bool = True,
    speed: float = 1.0,
    max_seconds: float | None = None,
    drain_timeout_s: float = 10.0,
    outbox_limits: OutboxLimits | None = None,
) -> EdgeResult:
    """Run the agent until the source ends, ``stop`` is set, or ``max_seconds`` of signal.

    ``pace`` sleeps so that replayed and simulated sources run at ``speed`` times real time
    (a live source paces itself). On the way out the pipeline is flushed into the outbox and
    the publisher gets ``drain_timeout_s`` to deliver what is still unacknowledged.
    """
    stop = stop or threading.Event()
    if not settings.mqtt.data:
        from agent.config import ConfigError

        raise ConfigError(settings.path, "mqtt", "required table is missing: the agent needs "
                          "its broker (host, port, tls, ca_file, password_file); see "
                          "deploy/edge.example.toml")
    mqtt_config = PublisherConfig.from_section(settings.mqtt)
    settings.state_dir.mkdir(parents=True, exist_ok=True)
    site = settings.site
    source = open_source(settings.source)
    info = source.info
    if info.channels != site.channels:
        source.close()
        from agent.config import ConfigError

        raise ConfigError(
            settings.path,
            "site.channels",
            f"{site.channels} channels declared, the source has {info.channels}",
        )
    timebase = _timebase_for(settings, source, speed if pace else math.inf)
    outbox_path = settings.state_dir / "outbox.sqlite"
    outbox = Outbox(outbox_path, site.device_id, site.site_id, limits=outbox_limits)
    sink = EdgeSink(
        outbox,
        site,
        info,
        timebase,
        summary_seconds=settings.summary_seconds,
        max_packet_bytes=mqtt_config.max_packet_bytes,
    )
    stages, parts = edge_stages(
        info,
        site,
        timebase,
        thresholds=settings.thresholds,
        gains=settings.gains(),
        capture=settings.capture,
        journal_path=settings.state_dir / "open-events.json",
        rvc=settings.rvc,
        sinks=[sink],
    )
    assert parts.journal is not None
    recovered = parts.journal.recover(time.time())
    for ev in recovered:
        classify_event(ev, site.nominal_hz)
    sink.startup(recovered, outbox.previous_run, outbox.previous_stop)  # committed before ...
    parts.journal.acknowledge(ev.event_id for ev in recovered)  # ... the journal forgets them
    outbox.heartbeat()  # this run has started: a crash from here on is not a planned stop
    log.info(
        "edge_start",
        device=site.device_id,
        site=site.site_id,
        epoch=outbox.epoch,
        source=info.description,
        rate=info.sample_rate,
        previous_run=outbox.previous_run,
        recovered_events=len(recovered),
    )

    publisher_stop = threading.Event()
    publisher = Publisher(
        Outbox(outbox_path, site.device_id, site.site_id, limits=outbox_limits), mqtt_config
    )
    thread = threading.Thread(
        target=publisher.run, args=(publisher_stop,), name="publisher", daemon=True
    )
    thread.start()
    blocks = samples = 0
    t_start = time.monotonic()
    live = isinstance(timebase, ClockModel)
    planned = False
    # systemd Type=notify: ready once measuring into the outbox (the broker may be away);
    # watchdog pings from the measurement loop, so a stalled source or pipeline is restarted.
    notifier = Notifier()
    notifier.ready(f"measuring {site.site_id}/{site.device_id} into {outbox_path}")
    try:
        for block in source.blocks():
            notifier.watchdog()
            if live:
                assert isinstance(timebase, ClockModel)
                timebase.observe(block.end_index, block.wall_time)
            frame = push(stages, Frame(block))
            del frame
            blocks += 1
            samples = block.end_index
            if max_seconds is not None and samples >= max_seconds * info.sample_rate:
                break
            if stop.is_set():
                break
            if pace and not live:
                lag = samples / info.sample_rate / speed - (time.monotonic() - t_start)
                if lag > 0 and stop.wait(lag):
                    break
        push(stages, Frame(None))
        # A clean stop (signal, end of the source, max_seconds) says so before it goes, in
        # the sequence, so the collector never reads the silence as an outage.
        sink.status("offline", reason=PLANNED_STOP)
        sink.commit()
        planned = True
    finally:
        source.close()
        # Let the publisher deliver what is committed, within bounds; the outbox keeps the rest.
        notifier.stopping()
        deadline = time.monotonic() + drain_timeout_s
        while outbox.pending_count() and time.monotonic() < deadline and thread.is_alive():
            time.sleep(0.1)
        if planned:
            publisher.stop_reason = PLANNED_STOP  # the retained offline presence says so too
        publisher_stop.set()
        thread.join(timeout=drain_timeout_s + 5)
        if planned and not thread.is_alive():
            outbox.mark_planned_stop()  # last: the next start reports last_stop = planned
        pending = outbox.pending_count()
        outbox.close()
        log.info(
            "edge_stop",
            blocks=blocks,
            samples=samples,
            outbox_pending=pending,
            published=publisher.stats.published,
        )
    return EdgeResult(blocks, samples, sink.counters, pending, publisher.stats.published)


def install_signal_handlers(stop: threading.Event) -> None:
    """SIGTERM and SIGINT end the run cleanly (systemd stops services with SIGTERM)."""

    def handler(signum: int, _frame: object) -> None:
        log.info("signal", signal=signal.Signals(signum).name)
        stop.set()

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)
