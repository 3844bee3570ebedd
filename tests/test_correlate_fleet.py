"""Fleet correlation: simultaneity grouping and IEEE 1564 temporal aggregation (invented data)."""

from __future__ import annotations

import itertools

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.collect.correlate import (
    EventRecord,
    FleetEvent,
    aggregate_temporal,
    event_record,
    group_simultaneous,
)
from agent.events.types import Event, Thresholds
from agent.wire.codec import event_body

T0 = 1764600000.0  # invented


def dip(device: str, start: float, level: float = 0.7, duration: float = 0.12,
        te: float | None = 0.001, feeder: str | None = None, site: str = "pilot",
        transformer: str | None = None) -> EventRecord:
    return EventRecord(device=device, site=site, start_utc=start, end_utc=start + duration,
                       kind="dip", level_pu=level, time_error_s=te, feeder=feeder,
                       transformer=transformer)


def test_feeder_sag_on_30_homes_is_one_fleet_event_local_dip_separate() -> None:
    rng = np.random.default_rng(7)
    # starts jittered over 0-90 ms: inside the 100 ms window (common practice)
    jitter = rng.uniform(0.0, 0.090, 30)
    events = [dip(f"home{i:02d}", T0 + 5.0 + float(j), level=0.6 + 0.01 * (i % 5))
              for i, j in enumerate(jitter)]
    events.append(dip("home99", T0 + 25.0, level=0.85))  # a local dip 20 s later
    rng.shuffle(events)  # order of arrival must not matter
    fleet = group_simultaneous(events)
    assert [f.homes for f in fleet] == [30, 1]
    feeder_sag, local = fleet
    assert feeder_sag.devices == tuple(f"home{i:02d}" for i in range(30))
    assert feeder_sag.start_utc == T0 + 5.0 + float(jitter.min())
    assert feeder_sag.level_pu == pytest.approx(0.6)  # deepest member
    assert local.devices == ("home99",)


def test_time_errors_widen_the_window_just_inside_and_just_outside() -> None:
    # window = 100 ms + 20 ms + 20 ms = 140 ms (the rule under test)
    inside = group_simultaneous([dip("a", T0, te=0.020), dip("b", T0 + 0.139, te=0.020)])
    outside = group_simultaneous([dip("a", T0, te=0.020), dip("b", T0 + 0.141, te=0.020)])
    assert [f.homes for f in inside] == [2]
    assert [f.homes for f in outside] == [1, 1]
    # without the time errors 139 ms is outside the bare 100 ms window
    bare = group_simultaneous([dip("a", T0, te=0.0), dip("b", T0 + 0.139, te=0.0)])
    assert [f.homes for f in bare] == [1, 1]


def test_unknown_time_error_uses_the_default() -> None:
    events = [dip("a", T0, te=None), dip("b", T0 + 0.130, te=None)]
    assert [f.homes for f in group_simultaneous(events)] == [1, 1]
    assert [f.homes for f in group_simultaneous(events, default_time_error_s=0.020)] == [2]


def test_window_measured_from_the_first_event_not_chained() -> None:
    # 0, 60, 120, 180 ms: each within 100 ms of its neighbour, not of the first
    events = [dip(f"h{i}", T0 + 0.060 * i, te=0.0) for i in range(4)]
    fleet = group_simultaneous(events)
    assert [f.devices for f in fleet] == [("h0", "h1"), ("h2", "h3")]


def test_feeder_labels_narrow_groups() -> None:
    events = [dip("a1", T0, feeder="F1"), dip("a2", T0 + 0.01, feeder="F1"),
              dip("b1", T0 + 0.02, feeder="F2"), dip("b2", T0 + 0.03, feeder="F2"),
              dip("u", T0 + 0.04)]  # unlabelled: joins the earliest compatible group
    fleet = group_simultaneous(events)
    assert [(f.feeder, f.devices) for f in fleet] == [("F1", ("a1", "a2", "u")),
                                                      ("F2", ("b1", "b2"))]


def test_transformer_labels_narrow_groups() -> None:
    events = [dip("a", T0, feeder="F1", transformer="T1"),
              dip("b", T0 + 0.01, feeder="F1", transformer="T2")]
    assert [f.homes for f in group_simultaneous(events)] == [1, 1]


def test_same_device_twice_counts_one_home() -> None:
    events = [dip("a", T0), dip("a", T0 + 0.05), dip("b", T0 + 0.02)]
    (fleet,) = group_simultaneous(events)
    assert fleet.homes == 2 and len(fleet.events) == 3


def test_mapping_records_and_errors() -> None:
    rec = event_record({"device": "a", "site": "s", "start_utc": T0, "duration_s": 0.5,
                        "kind": "interruption", "level_pu": 0.01, "extra": 1})
    assert rec.end_utc == T0 + 0.5
    with pytest.raises(ValueError, match="missing 'level_pu'"):
        event_record({"device": "a", "site": "s", "start_utc": T0, "kind": "dip"})
    with pytest.raises(ValueError, match="kind"):
        event_record({"device": "a", "site": "s", "start_utc": T0, "kind": "sag",
                      "level_pu": 0.5})
    with pytest.raises(ValueError, match="finite"):
        EventRecord("a", "s", float("nan"), None, "dip", 0.5)
    with pytest.raises(ValueError, match="before"):
        EventRecord("a", "s", T0, T0 - 1, "dip", 0.5)


def test_wire_event_message_becomes_a_record() -> None:
    ev = Event(event_id="e1", kind="dip", channels=(0,), start=0.0, start_utc=T0,
               nominal_v=230.0, thresholds=Thresholds(), level_v=161.0, end=1.0,
               end_utc=T0 + 0.25, time_error_s=0.004, sync_state="synced")
    body = {**event_body(ev, "ended"), "device": "d1", "site": "s1", "epoch": "e", "seq": 3}
    rec = event_record(body, feeder="F7")
    assert (rec.device, rec.site, rec.kind, rec.start_utc, rec.end_utc) == (
        "d1", "s1", "dip", T0, T0 + 0.25)
    assert rec.level_pu == 161.0 / 230.0 and rec.time_error_s == 0.004  # from sync.error_s
    assert rec.feeder == "F7"


def test_reclosing_sequence_of_three_dips_is_one_aggregate() -> None:
    # a recloser trying three times within 40 s (invented); IEEE 1564: events within 1 min
    # of the first count as one (from memory)
    seq = [dip("a", T0, level=0.55), dip("a", T0 + 15.0, level=0.30),
           dip("a", T0 + 38.0, level=0.60)]
    (agg,) = aggregate_temporal(seq, key=lambda e: e.device)
    assert agg.count == 3 and agg.key == "a"
    assert agg.representative.level_pu == 0.30  # the most severe stands for the aggregate
    assert agg.start_utc == T0


def test_temporal_window_counts_from_the_first_event() -> None:
    events = [dip("a", T0), dip("a", T0 + 50.0), dip("a", T0 + 100.0), dip("a", T0 + 160.5)]
    aggs = aggregate_temporal(events, key=lambda e: e.device)
    # 0 and 50 s together; 100 s is 100 s after the first → new; 160.5 s is > 60 s after 100
    assert [a.count for a in aggs] == [2, 1, 1]
    boundary = aggregate_temporal([dip("a", T0), dip("a", T0 + 60.0)])
    assert [a.count for a in boundary] == [2]  # "within 1 min": 60 s inclusive


def test_aggregation_is_per_key() -> None:
    events = [dip("a", T0), dip("b", T0 + 10.0), dip("a", T0 + 20.0)]
    aggs = aggregate_temporal(events, key=lambda e: e.device)
    assert sorted((a.key, a.count) for a in aggs) == [("a", 2), ("b", 1)]
    assert [a.count for a in aggregate_temporal(events)] == [3]  # no key: one system series


def test_fleet_reclosing_aggregates_fleet_events() -> None:
    homes = [f"h{i}" for i in range(30)]
    shots = [T0, T0 + 12.0, T0 + 35.0]  # three feeder-wide dips of one reclosing sequence
    events = [dip(h, t + 0.001 * i) for t in shots for i, h in enumerate(homes)]
    fleet = group_simultaneous(events)
    assert [f.homes for f in fleet] == [30, 30, 30]
    (agg,) = aggregate_temporal(fleet)
    assert agg.count == 3 and isinstance(agg.representative, FleetEvent)
    assert agg.representative.homes == 30


_events = st.lists(
    st.tuples(st.integers(0, 9), st.floats(0.0, 5.0), st.sampled_from([None, 0.0, 0.005, 0.03]),
              st.sampled_from([None, "F1", "F2"])),
    min_size=1, max_size=40)


@settings(max_examples=200, deadline=None)
@given(raw=_events, seed=st.integers(0, 2**32 - 1))
def test_grouping_properties(raw: list[tuple[int, float, float | None, str | None]],
                             seed: int) -> None:
    events = [dip(f"h{d}", 1000.0 + t, te=te, feeder=f) for d, t, te, f in raw]
    fleet = group_simultaneous(events)
    # a partition: every event in exactly one fleet event
    assert sorted(id(e) for f in fleet for e in f.events) == sorted(id(e) for e in events)
    for f in fleet:
        first = f.events[0]
        te0 = first.time_error_s or 0.0
        for e in f.events:  # the rule under test, checked member by member
            assert e.start_utc - first.start_utc <= 0.1 + te0 + (e.time_error_s or 0.0) + 1e-12
        labels = {e.feeder for e in f.events} - {None}
        assert len(labels) <= 1  # labelled members never mix feeders
    # arrival order does not matter
    shuffled = list(events)
    np.random.default_rng(seed).shuffle(shuffled)
    again = group_simultaneous(shuffled)
    assert [sorted(id(e) for e in f.events) for f in again] == \
        [sorted(id(e) for e in f.events) for f in fleet]


@settings(max_examples=200, deadline=None)
@given(starts=st.lists(st.floats(0.0, 600.0), min_size=1, max_size=30))
def test_temporal_aggregation_properties(starts: list[float]) -> None:
    events = [dip("a", 1000.0 + t) for t in starts]
    aggs = aggregate_temporal(events)
    assert sum(a.count for a in aggs) == len(events)
    for a in aggs:  # every member within 60 s of the aggregate's first event (IEEE 1564)
        assert all(0 <= m.start_utc - a.start_utc <= 60.0 for m in a.members)
    for prev, nxt in itertools.pairwise(aggs):  # the next one opens after the window
        assert nxt.start_utc - prev.start_utc > 60.0
