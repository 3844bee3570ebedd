"""CaptureRecorder: the captured counts are compared sample for sample with the fed signal."""

from __future__ import annotations

import numpy as np
import pytest
from _events_helpers import counter_ids

from agent.acquisition.base import Block, SourceInfo
from agent.events.capture import CaptureRecorder
from agent.events.types import Capture

RATE = 7680.0
SPC = 128  # 7680 S/s / 60 Hz
INFO = SourceInfo(RATE, ("L1", "L2"), np.array([0.01, 0.011]))
SCALE = np.array([0.0105, 0.0112])


def signal(n: int) -> np.ndarray:
    """A known int16 signal: sample index (wrapped) on L1, its negative on L2."""
    i = np.arange(n, dtype=np.int64)
    a = ((i % 60000) - 30000).astype(np.int16)
    return np.column_stack([a, -a.astype(np.int32) - 1]).astype(np.int16)


def recorder(**kw: int) -> CaptureRecorder:
    return CaptureRecorder(INFO, SCALE, SPC, id_factory=counter_ids("cap"), **kw)  # type: ignore[arg-type]


def feed_all(rec: CaptureRecorder, sig: np.ndarray, start: int, stop: int,
             block: int = 1000) -> list[Capture]:
    out: list[Capture] = []
    for a in range(start, stop, block):
        b = min(stop, a + block)
        out.extend(rec.feed(Block(a, sig[a:b])))
    return out


def test_late_trigger_finds_pre_cycles_in_ring() -> None:
    sig = signal(20000)
    rec = recorder()
    got = feed_all(rec, sig, 0, 6000)
    assert got == []
    rec.trigger("ev", "start", 5000.4, 123.0)  # trigger arrives after its sample was fed
    got = feed_all(rec, sig, 6000, 20000, block=777)
    assert len(got) == 1
    cap = got[0]
    assert cap.trigger_index == 5000 and cap.trigger_utc == 123.0
    assert cap.first_index == 5000 - 10 * SPC
    assert cap.counts.shape == (30 * SPC, 2)
    assert np.array_equal(cap.counts, sig[cap.first_index: 5000 + 20 * SPC])  # exact copy
    assert cap.pre_cycles == 10 and cap.post_cycles == 20
    assert cap.channel_names == ("L1", "L2") and cap.sample_rate == RATE
    volts = cap.counts * cap.scale
    assert volts[0, 1] == pytest.approx(float(sig[cap.first_index, 1]) * 0.0112)
    assert cap.meta == {}


def test_trigger_before_data_arrives() -> None:
    sig = signal(10000)
    rec = recorder()
    feed_all(rec, sig, 0, 1000)
    rec.trigger("ev", "start", 4000, 0.0)
    got = feed_all(rec, sig, 1000, 10000, block=333)
    assert len(got) == 1
    assert np.array_equal(got[0].counts, sig[4000 - 10 * SPC: 4000 + 20 * SPC])


def test_end_inside_post_window_extends_start_capture() -> None:
    sig = signal(20000)
    rec = recorder()
    feed_all(rec, sig, 0, 3000)
    rec.trigger("ev", "start", 2900, 1.0)
    rec.trigger("ev", "end", 2900 + 5 * SPC, 2.0)  # 5 cycles later: inside the post window
    got = feed_all(rec, sig, 3000, 20000)
    assert len(got) == 1  # one capture holds both edges
    cap = got[0]
    assert cap.meta["end_trigger_index"] == 2900 + 5 * SPC
    assert cap.counts.shape[0] == 10 * SPC + 5 * SPC + 20 * SPC
    assert np.array_equal(cap.counts, sig[cap.first_index: 2900 + 25 * SPC])


def test_end_after_post_window_or_beyond_merge_bound_is_separate() -> None:
    sig = signal(30000)
    rec = recorder()
    feed_all(rec, sig, 0, 3000)
    rec.trigger("a", "start", 2000, 0.0)
    got = feed_all(rec, sig, 3000, 6000)
    rec.trigger("a", "end", 2000 + 25 * SPC, 0.0)  # start capture already complete
    got += feed_all(rec, sig, 6000, 12000)
    assert [c.trigger for c in got] == ["start", "end"]
    rec2 = recorder(post_cycles=20, max_merge_cycles=25)
    feed_all(rec2, sig, 0, 3000)
    rec2.trigger("b", "start", 2900, 0.0)
    rec2.trigger("b", "end", 2900 + 10 * SPC, 0.0)  # merged post would be 30 > 25 cycles
    got2 = feed_all(rec2, sig, 3000, 12000)
    assert sorted(c.trigger for c in got2) == ["end", "start"]
    assert all("end_trigger_index" not in c.meta for c in got2)


def test_ten_minute_event_holds_only_ring_and_two_captures() -> None:
    rec = recorder()
    capture_rows = 30 * SPC
    n_blocks, block = 600, int(RATE)  # 10 minutes of 1-s blocks
    rng = np.random.default_rng(1)
    got: list[Capture] = []
    peak = 0
    for k in range(n_blocks):
        counts = rng.integers(-3000, 3000, size=(block, 2)).astype(np.int16)
        got += rec.feed(Block(k * block, counts))
        if k == 0:
            ring_rows = rec.held_samples()  # the ring, sized for this block length
            assert ring_rows >= 10 * SPC + 2 * block
        if k == 2:
            rec.trigger("long", "start", 2.5 * block, 0.0)
        if k == n_blocks - 3:
            rec.trigger("long", "end", (n_blocks - 2.5) * block, 600.0)
        peak = max(peak, rec.held_samples())
    got += rec.flush()
    # common practice: memory bounded by ring + two capture buffers, whatever the length
    assert peak <= ring_rows + 2 * capture_rows
    assert rec.held_samples() == ring_rows
    assert [c.trigger for c in got] == ["start", "end"]
    assert all(c.counts.shape == (capture_rows, 2) for c in got)


def test_sequence_gap_inside_capture_is_listed_as_missing() -> None:
    sig = signal(20000)
    rec = recorder()
    feed_all(rec, sig, 0, 3000)
    rec.trigger("ev", "start", 2500, 0.0)
    got = rec.feed(Block(3000, sig[3000:3500]))
    got += rec.feed(Block(3800, sig[3800:8000], flags={"sequence_gap": 1}))
    assert len(got) == 1
    cap = got[0]
    assert cap.meta["missing"] == [[3500, 3800]]
    rel = slice(3500 - cap.first_index, 3800 - cap.first_index)
    assert not cap.counts[rel].any()
    ok = np.r_[0:3500 - cap.first_index, 3800 - cap.first_index: cap.counts.shape[0]]
    assert np.array_equal(cap.counts[ok], sig[cap.first_index + ok])


def test_flush_returns_partial_and_pre_truncated_near_data_start() -> None:
    sig = signal(5000)
    rec = recorder()
    feed_all(rec, sig, 0, 600)
    rec.trigger("ev", "start", 500, 0.0)  # only 500 samples exist before the trigger
    feed_all(rec, sig, 600, 1500)
    out = rec.flush()
    assert len(out) == 1
    cap = out[0]
    assert cap.meta == {"pre_truncated": True, "truncated": True}
    assert cap.first_index == 0
    assert np.array_equal(cap.counts, sig[0:1500])
    assert rec.flush() == []


def test_bad_blocks_are_clear_errors() -> None:
    rec = recorder()
    with pytest.raises(ValueError, match="int16"):
        rec.feed(Block(0, np.zeros((10, 2), dtype=np.int32)))
    with pytest.raises(ValueError, match="int16"):
        rec.feed(Block(0, np.zeros((10, 3), dtype=np.int16)))
    rec.feed(Block(0, np.zeros((10, 2), dtype=np.int16)))
    with pytest.raises(ValueError, match="in order"):
        rec.feed(Block(5, np.zeros((10, 2), dtype=np.int16)))
    with pytest.raises(ValueError, match="trigger kind"):
        rec.trigger("x", "middle", 0, 0)  # type: ignore[arg-type]


def test_merge_also_when_start_capture_already_complete() -> None:
    # Pipeline order: a whole 1-s block is fed, then the detector's start and end triggers for
    # a short event inside it arrive together; the finished start capture is extended.
    sig = signal(40000)
    rec = recorder()
    assert rec.feed(Block(0, sig[0:7680])) == []
    rec.trigger("ev", "start", 3000, 1.0)
    rec.trigger("ev", "end", 3000 + 3 * SPC, 1.05)
    got = rec.feed(Block(7680, sig[7680:15360]))
    assert len(got) == 1
    cap = got[0]
    assert cap.meta["end_trigger_index"] == 3000 + 3 * SPC
    assert cap.first_index == 3000 - 10 * SPC
    assert np.array_equal(cap.counts, sig[cap.first_index: 3000 + 23 * SPC])
    # an end trigger beyond the ring-held post window is still merged, filled from new data
    rec.trigger("ev2", "start", 15000, 2.0)
    rec.trigger("ev2", "end", 15000 + 15 * SPC, 2.25)
    got = rec.feed(Block(15360, sig[15360:30000]))
    assert len(got) == 1
    assert np.array_equal(got[0].counts, sig[15000 - 10 * SPC: 15000 + 35 * SPC])


def test_pre_cycles_complete_when_trigger_comes_one_long_block_late() -> None:
    # The crossing is in block k but its Urms(1/2) window ends in block k+1: the trigger
    # arrives after block k+1 has been fed, one whole block late.
    block = 7680
    sig = signal(6 * block)
    rec = recorder()
    got: list[Capture] = []
    for k in range(3):
        got += rec.feed(Block(k * block, sig[k * block:(k + 1) * block]))
    rec.trigger("ev", "start", 2 * block - 20, 0.0)  # near the end of block 1
    for k in range(3, 6):
        got += rec.feed(Block(k * block, sig[k * block:(k + 1) * block]))
    assert len(got) == 1 and "pre_truncated" not in got[0].meta
    assert got[0].first_index == 2 * block - 20 - 10 * SPC
    assert np.array_equal(got[0].counts, sig[got[0].first_index: 2 * block - 20 + 20 * SPC])


def test_trigger_before_any_data_near_index_zero() -> None:
    sig = signal(6000)
    rec = recorder()
    rec.trigger("ev", "start", 100, 0.0)
    got = feed_all(rec, sig, 0, 6000)
    assert len(got) == 1
    assert got[0].first_index == 0 and got[0].meta == {"pre_truncated": True}
    assert np.array_equal(got[0].counts, sig[0: 100 + 20 * SPC])
