"""OpenEventJournal: persist open events, recover them after a simulated crash."""

from __future__ import annotations

import json
import os
from pathlib import Path

import numpy as np
import pytest
from _events_helpers import counter_ids, half_cycle_rms, rows_of, slice_half, window_starts

from agent.acquisition.timebase import ReplayTimebase
from agent.events.detector import EventDetector
from agent.events.persist import OpenEventJournal, event_from_dict, event_to_dict
from agent.events.types import Event, Thresholds

RATE = 7680.0


class FakeClock:
    def __init__(self, t: float = 0.0) -> None:
        self.t = t

    def __call__(self) -> float:
        return self.t


def make_event(**kw: object) -> Event:
    base: dict[str, object] = dict(
        event_id="e1", kind="dip", channels=(0,), start=1000.0, start_utc=1.7e9,
        nominal_v=230.0, thresholds=Thresholds(), level_v=150.0,
        per_channel_level_v=(150.0,), sync_state="synced", time_error_s=0.001,
    )
    base.update(kw)
    return Event(**base)  # type: ignore[arg-type]


def journal(path: Path, mono: FakeClock | None = None) -> OpenEventJournal:
    return OpenEventJournal(path, alive_interval_s=1.0, wall_clock=FakeClock(5.0),
                            monotonic=mono or FakeClock())


def test_event_dict_round_trip() -> None:
    ev = make_event(classification={"itic_region": "no_interruption"}, partial_outage=True)
    back = event_from_dict(json.loads(json.dumps(event_to_dict(ev))))
    assert back == ev


def test_crash_then_recover_in_fresh_object(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    mono = FakeClock()
    j = journal(path, mono)
    ev = make_event()
    j.opened(ev)
    mono.t = 2.0
    assert j.alive(1000.0 + 7680, 1.7e9 + 1.0)
    mono.t = 2.5
    assert not j.alive(1000.0 + 2 * 7680, 1.7e9 + 2.0)  # rate-limited: stamp not written
    del j  # crash: no close
    fresh = journal(path)
    got = fresh.recover(now_utc=1.7e9 + 60.0)
    assert len(got) == 1
    rec = got[0]
    assert rec.event_id == "e1" and rec.kind == "dip" and rec.level_v == 150.0
    assert rec.ended_by == "power_loss"
    assert rec.end == 1000.0 + 7680 and rec.end_utc == 1.7e9 + 1.0  # last persisted stamp
    assert rec.end_uncertainty_s == pytest.approx(59.0)  # up to the restart
    assert rec.duration_s == pytest.approx(1.0)


def test_recovery_is_stable_until_acknowledged_and_survives_new_events(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    journal(path).opened(make_event())
    second = journal(path)
    first_pass = second.recover(now_utc=1.7e9 + 10)
    second.opened(make_event(event_id="e2", start=5000.0, start_utc=1.7e9 + 20))
    # crash again before acknowledging: nothing lost, same inferred end
    third = journal(path)
    again = third.recover(now_utc=1.7e9 + 99)
    assert [e.event_id for e in again] == ["e1", "e2"]
    assert again[0] == first_pass[0]
    third.acknowledge(["e1", "e2"])
    assert journal(path).recover(now_utc=1.7e9 + 100) == []


def test_closed_event_is_not_recovered(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    j = journal(path)
    ev = make_event()
    j.opened(ev)
    j.closed(ev)
    assert json.loads(path.read_text())["open"] == []
    assert journal(path).recover(now_utc=1.7e9 + 5) == []


def test_interruption_is_persisted_at_once_and_recovered(tmp_path: Path) -> None:
    # Detector + journal as the edge chain uses them; the "crash" comes mid-interruption.
    path = tmp_path / "open.json"
    mono = FakeClock()  # never advances: only kind/start changes may force a write
    j = journal(path, mono)
    tb = ReplayTimebase(RATE, origin=1.7e9)
    det = EventDetector(120.0, 2, Thresholds(), tb, site_service_type="120/240",
                        id_factory=counter_ids())  # type: ignore[arg-type]
    period = 1 / 60
    lvl = rows_of([(1.0, 20), (0.5, 10), (0.0, 200)])
    half = half_cycle_rms(window_starts(len(lvl), period), period, RATE,
                          np.column_stack([lvl, lvl]) * 120.0)
    for a in range(0, len(lvl), 25):
        chunk = slice_half(half, a, a + 25)
        for up in det.update(chunk):
            if up.change == "started":
                j.opened(up.event)
        j.alive(float(chunk.end[-1]), tb.to_utc(float(chunk.end[-1])))
    on_disk = json.loads(path.read_text())
    assert on_disk["open"][0]["kind"] == "interruption"  # written when the kind changed
    stamp = on_disk["last_alive"]
    assert stamp["index"] < half.end[-1]  # later stamps were rate-limited (clock stopped)
    got = journal(path).recover(now_utc=1.7e9 + 3600)
    assert len(got) == 1
    ev = got[0]
    assert ev.kind == "interruption" and ev.ended_by == "power_loss"
    assert ev.start == pytest.approx(half.start[30])
    assert ev.end_utc == pytest.approx(stamp["utc"])
    assert ev.enclosing_start_utc == pytest.approx(tb.to_utc(half.start[20]))
    assert ev.enclosing_duration_s == pytest.approx(stamp["utc"] - tb.to_utc(half.start[20]))
    assert ev.end_uncertainty_s == pytest.approx(1.7e9 + 3600 - stamp["utc"])


def test_failed_write_leaves_previous_state(tmp_path: Path,
                                            monkeypatch: pytest.MonkeyPatch) -> None:
    path = tmp_path / "open.json"
    j = journal(path)
    j.opened(make_event())
    before = path.read_bytes()

    def boom(src: object, dst: object) -> None:
        raise OSError("disk full")

    monkeypatch.setattr(os, "replace", boom)
    with pytest.raises(OSError):
        j.opened(make_event(event_id="e2"))
    monkeypatch.undo()
    assert path.read_bytes() == before  # the rename is the commit point (POSIX rename)
    (tmp_path / "open.json.tmp").write_bytes(b"{torn")  # a torn temp file is ignored
    assert [e.event_id for e in journal(path).recover(now_utc=1.7e9 + 1)] == ["e1"]


def test_corrupt_journal_is_kept_aside_not_fatal(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    path.write_bytes(b"not json at all")
    j = journal(path)
    assert j.recover(now_utc=0.0) == []
    aside = tmp_path / "open.json.corrupt-0"
    assert aside.read_bytes() == b"not json at all"
    assert j.problems and "corrupt-0" in j.problems[0]


def test_alive_without_utc_uses_the_timebase(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    tb = ReplayTimebase(RATE, origin=1.7e9)
    mono = FakeClock()
    j = OpenEventJournal(path, timebase=tb, monotonic=mono, wall_clock=FakeClock(-1.0))
    j.opened(make_event(start=0.0, start_utc=1.7e9))
    mono.t = 1.5  # the rewrite interval (1 s) has passed
    assert j.alive(2 * RATE)
    rec = OpenEventJournal(path).recover(now_utc=1.7e9 + 10)[0]
    assert rec.end_utc == pytest.approx(1.7e9 + 2.0)  # timebase UTC of the stamp, not wall
    assert rec.end_uncertainty_s == pytest.approx(8.0)


def test_non_finite_time_error_survives_the_journal(tmp_path: Path) -> None:
    path = tmp_path / "open.json"
    journal(path).opened(make_event(time_error_s=float("inf"), sync_state="unsynced"))
    rec = journal(path).recover(now_utc=1.7e9 + 1)[0]
    assert rec.time_error_s == float("inf") and rec.sync_state == "unsynced"
