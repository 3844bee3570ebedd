"""The one data path from samples to events, composed in one visible place.

A pipeline is a chain of small stages in the manner of structlog's processors: each stage
takes a :class:`Frame` (one block of samples and everything derived from it so far) and
returns it, adding its own results. The standalone recorder (``halfcycle analyze``), the
edge agent (``halfcycle edge run``) and the benchmarks all build their chain with
:func:`edge_stages`, then append their own sink stage.

    source ─ block ─▶ measure ─▶ detect ─▶ detect RVC ─▶ classify ─▶ journal ─▶ capture ─▶ sinks
           ─▶ forget closed
"""

from __future__ import annotations

from collections.abc import Callable, Iterable, Sequence
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from agent.acquisition.base import Block, Source, SourceInfo
from agent.acquisition.timebase import Timebase
from agent.events.capture import CaptureRecorder
from agent.events.classify import classify_event
from agent.events.detector import EventDetector
from agent.events.persist import OpenEventJournal
from agent.events.rvc import RvcDetector, RvcSettings
from agent.events.types import Capture, EventUpdate, Thresholds
from agent.measurement.engine import MeasurementEngine
from agent.measurement.types import MeasurementOutput
from agent.site import Site


@dataclass
class Frame:
    """What flows between stages. ``block`` is None for the final flush at end of data."""

    block: Block | None
    measurement: MeasurementOutput | None = None
    updates: list[EventUpdate] = field(default_factory=list)
    captures: list[Capture] = field(default_factory=list)

    @property
    def final(self) -> bool:
        return self.block is None


Stage = Callable[[Frame], Frame]


@dataclass
class CaptureSettings:
    pre_cycles: int = 10
    post_cycles: int = 20


def samples_per_cycle(info: SourceInfo, site: Site) -> int:
    return round(info.sample_rate / site.nominal_hz)


class Measure:
    """Block → Urms(1/2), 10/12-cycle values, aggregates, quality flags."""

    def __init__(self, engine: MeasurementEngine) -> None:
        self.engine = engine

    def __call__(self, frame: Frame) -> Frame:
        frame.measurement = (
            self.engine.finish() if frame.block is None else self.engine.process(frame.block)
        )
        return frame


class Detect:
    """Urms(1/2) → event starts and ends."""

    def __init__(self, detector: EventDetector) -> None:
        self.detector = detector
        self.last_index = 0.0

    def __call__(self, frame: Frame) -> Frame:
        assert frame.measurement is not None
        half = frame.measurement.half_cycles
        if len(half):
            frame.updates.extend(self.detector.update(half))
            self.last_index = float(half.end[-1])
        if frame.final:
            frame.updates.extend(self.detector.finish(self.last_index))
        return frame


class DetectRvc:
    """Urms(1/2) → rapid voltage changes, reported whole once their new steady state is seen
    (a started and an ended update in the same frame; no journal entry, no capture)."""

    def __init__(self, detector: RvcDetector) -> None:
        self.detector = detector

    def __call__(self, frame: Frame) -> Frame:
        assert frame.measurement is not None
        half = frame.measurement.half_cycles
        if len(half):
            frame.updates.extend(self.detector.update(half))
        if frame.final:
            frame.updates.extend(self.detector.finish())
        return frame


class Classify:
    """Tag each ended event with its IEEE 1159 / ITIC / SEMI F47 / EN 50160 / IEEE 1564 class."""

    def __init__(self, nominal_hz: float) -> None:
        self.nominal_hz = nominal_hz

    def __call__(self, frame: Frame) -> Frame:
        for update in frame.updates:
            if update.change == "ended":
                classify_event(update.event, self.nominal_hz)
        return frame


class Journal:
    """Persist open events at once, so a power loss can be closed after restart."""

    def __init__(self, journal: OpenEventJournal, timebase: Timebase) -> None:
        self.journal = journal
        self.timebase = timebase

    def __call__(self, frame: Frame) -> Frame:
        for update in frame.updates:
            if update.change == "started" and update.event.kind != "rvc":
                self.journal.opened(update.event)
        if frame.block is not None and frame.measurement is not None:
            half = frame.measurement.half_cycles
            if len(half):
                last = float(half.end[-1])
                self.journal.alive(last, self.timebase.to_utc(last))
        return frame


class ForgetClosed:
    """Drop ended events from the journal, after the sinks have stored their end.

    It runs last: were the journal to forget an event before the outbox commit of its end,
    a crash in between would lose that end for good.
    """

    def __init__(self, journal: OpenEventJournal) -> None:
        self.journal = journal

    def __call__(self, frame: Frame) -> Frame:
        for update in frame.updates:
            if update.change == "ended" and update.event.kind != "rvc":
                self.journal.closed(update.event)
        return frame


class TakeCaptures:
    """Keep the ring buffer fed; take pre/post-trigger captures at event starts and ends."""

    def __init__(self, recorder: CaptureRecorder, timebase: Timebase) -> None:
        self.recorder = recorder
        self.timebase = timebase

    def __call__(self, frame: Frame) -> Frame:
        if frame.block is not None:
            frame.captures.extend(self.recorder.feed(frame.block))
        for update in frame.updates:
            ev = update.event
            if ev.kind == "rvc":          # known a second late: the ring has moved on
                continue
            # The update's own index/utc: the event object may change later (a dip that
            # becomes an interruption moves its start).
            if update.change == "started":
                index = ev.start if update.index is None else update.index
                utc = ev.start_utc if update.utc is None else update.utc
                self.recorder.trigger(ev.event_id, "start", index, utc)
            elif ev.end is not None and ev.ended_by == "recovery":
                end_index = ev.end if update.index is None else update.index
                end_utc = update.utc if update.utc is not None else ev.end_utc
                assert end_utc is not None
                self.recorder.trigger(ev.event_id, "end", end_index, end_utc)
        if frame.final:
            frame.captures.extend(self.recorder.flush())
        return frame


@dataclass
class EdgeParts:
    """The stateful parts behind the stages, kept for inspection (tests, status reports)."""

    engine: MeasurementEngine
    detector: EventDetector
    recorder: CaptureRecorder
    journal: OpenEventJournal | None
    rvc: RvcDetector | None = None


def edge_stages(
    info: SourceInfo,
    site: Site,
    timebase: Timebase,
    *,
    thresholds: Thresholds | None = None,
    gains: np.ndarray | None = None,
    capture: CaptureSettings | None = None,
    journal_path: str | Path | None = None,
    rvc: RvcSettings | None = None,
    sinks: Sequence[Stage] = (),
) -> tuple[list[Stage], EdgeParts]:
    """Build the edge chain: measure → detect → detect RVC → classify → journal → capture →
    sinks → forget closed events. ``rvc`` defaults to :class:`RvcSettings` (on)."""
    thresholds = thresholds or Thresholds()
    rvc = rvc or RvcSettings()
    capture = capture or CaptureSettings()
    engine = MeasurementEngine(info, site, thresholds, timebase, gains)
    detector = EventDetector(
        site.nominal_v, info.channels, thresholds, timebase, site_service_type=site.service_type
    )
    recorder = CaptureRecorder(
        info,
        engine.scale,
        samples_per_cycle(info, site),
        pre_cycles=capture.pre_cycles,
        post_cycles=capture.post_cycles,
    )
    journal = (
        OpenEventJournal(journal_path, timebase=timebase) if journal_path is not None else None
    )
    rvc_detector = (RvcDetector(site.nominal_v, site.nominal_hz, info.channels, thresholds, rvc,
                                timebase) if rvc.enabled else None)
    stages: list[Stage] = [Measure(engine), Detect(detector)]
    if rvc_detector is not None:
        stages.append(DetectRvc(rvc_detector))
    stages.append(Classify(site.nominal_hz))
    if journal is not None:
        stages.append(Journal(journal, timebase))
    stages.append(TakeCaptures(recorder, timebase))
    stages.extend(sinks)
    if journal is not None:
        stages.append(ForgetClosed(journal))
    return stages, EdgeParts(engine, detector, recorder, journal, rvc_detector)


def push(stages: Sequence[Stage], frame: Frame) -> Frame:
    """Pass one frame through every stage in order."""
    for stage in stages:
        frame = stage(frame)
    return frame


def run(source: Source | Iterable[Block], stages: Sequence[Stage]) -> None:
    """Push every block through the chain, then one final flush frame."""
    blocks = source.blocks() if hasattr(source, "blocks") else source
    for block in blocks:
        push(stages, Frame(block))
    push(stages, Frame(None))
