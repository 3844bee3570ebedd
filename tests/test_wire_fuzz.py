"""Decode never fails with anything but WireError; summaries survive random content."""

from __future__ import annotations

import numpy as np
from _wire_helpers import IDENT, T0, sample_messages
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from agent.wire.codec import decode, encode, summary_arrays
from agent.wire.errors import WireError
from agent.wire.records import SummaryBatcher

ENCODED = [encode(m) for m in sample_messages().values()]


def _decode_or_wire_error(data: bytes) -> None:
    try:
        decode(data)
    except WireError as exc:
        assert exc.reason and exc.code  # a reason for the dead-letter table
    # Any other exception type propagates and fails the test.


@settings(max_examples=300, deadline=None)
@given(st.binary(max_size=300))
def test_random_bytes_only_raise_wire_error(data: bytes) -> None:
    _decode_or_wire_error(data)


@settings(max_examples=300, deadline=None)
@given(st.sampled_from(ENCODED), st.data())
def test_corrupted_messages_only_raise_wire_error(data: bytes, draw: st.DataObject) -> None:
    buf = bytearray(data)
    for _ in range(draw.draw(st.integers(1, 4))):
        i = draw.draw(st.integers(0, len(buf) - 1))
        buf[i] = draw.draw(st.integers(0, 255))
    if draw.draw(st.booleans()):
        buf = buf[: draw.draw(st.integers(1, len(buf)))]
    _decode_or_wire_error(bytes(buf))


values = st.one_of(st.floats(0.0, 1999.0), st.just(np.nan))


@settings(max_examples=60, deadline=None)
@given(k=st.integers(1, 120), channels=st.integers(1, 4), data=st.data())
def test_random_summaries_round_trip(k: int, channels: int, data: st.DataObject) -> None:
    n = data.draw(st.integers(1, 2 * k))
    shape = (n, channels)
    rms = data.draw(hnp.arrays(np.float64, shape, elements=values))
    hz = data.draw(hnp.arrays(np.float64, n, elements=st.one_of(st.floats(40, 70),
                                                                  st.just(np.nan))))
    thd = data.draw(hnp.arrays(np.float64, shape, elements=st.one_of(st.floats(0, 1),
                                                                      st.just(np.nan))))
    imb = data.draw(hnp.arrays(np.float64, n, elements=st.one_of(st.floats(0, 1),
                                                                  st.just(np.nan))))
    flags = data.draw(hnp.arrays(np.int64, n, elements=st.integers(0, 255)))
    batcher = SummaryBatcher([f"L{i + 1}" for i in range(channels)], k=k)
    t = T0 + np.arange(n, dtype=np.float64)
    bodies = batcher.add_many(t, rms, rms, rms, hz, thd, imb, flags)
    last = batcher.flush()
    bodies += [last] if last is not None else []
    assert sum(b["n"] for b in bodies) == n  # type: ignore[misc]  # every second accounted for, no loss
    row = 0
    for i, body in enumerate(bodies):
        s = summary_arrays(decode(encode(IDENT.stamp(body, seq=i))))
        m = s.t.shape[0]
        np.testing.assert_array_equal(s.t, t[row:row + m])
        for got, want, unit in ((s.rms_mean, rms, 0.01), (s.hz, hz, 0.001),
                                (s.thd, thd, 1e-4), (s.imbalance, imb, 1e-4)):
            w = want[row:row + m]
            np.testing.assert_array_equal(np.isnan(got), np.isnan(w))
            ok = ~np.isnan(w)
            # Rounding to the stated unit: |error| <= unit / 2 (analytic bound).
            assert np.all(np.abs(got[ok] - w[ok]) <= unit / 2 + 1e-9 * np.abs(w[ok]))
        np.testing.assert_array_equal(s.flags, flags[row:row + m])
        row += m
