"""Delta coding and bit packing of per-second arrays (agent/wire/packing.py)."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from agent.wire.errors import WireError
from agent.wire.packing import (
    INT32_MAX,
    INT32_MIN,
    pack_bits,
    pack_units,
    pack_values,
    unpack_bits,
    unpack_units,
    unpack_values,
    unzigzag,
    zigzag,
)

int32_arrays = hnp.arrays(np.int64, st.integers(1, 400),
                          elements=st.integers(INT32_MIN, INT32_MAX))


@settings(max_examples=200, deadline=None)
@given(int32_arrays, st.data())
def test_delta_coding_round_trip_is_exact(units: np.ndarray, data: st.DataObject) -> None:
    # Exact identity for any int32 array, with and without a missing mask (common practice:
    # lossless coding must invert exactly).
    missing = data.draw(hnp.arrays(np.bool_, units.shape[0]))
    packed = pack_units(units, missing, exp=0)
    got, got_missing = unpack_units(packed, units.shape[0])
    np.testing.assert_array_equal(got_missing, missing)
    np.testing.assert_array_equal(got[~missing], units[~missing])
    width = packed[2]
    assert isinstance(width, int) and 0 <= width <= 33


@settings(max_examples=100, deadline=None)
@given(int32_arrays)
def test_width_is_minimal_and_matches_numpy_diff(units: np.ndarray) -> None:
    packed = pack_units(units, None, exp=0)
    d = np.diff(units)  # numpy as the independent oracle for the deltas
    # zigzag(d) = 2|d| - (d < 0): the protobuf definition, written out here independently.
    z = np.where(d >= 0, 2 * d, -2 * d - 1)
    need = int(z.max()).bit_length() if z.size else 0
    assert packed[2] == need
    assert packed[1] == units[0]
    assert len(packed[3]) == (d.size * need + 7) // 8  # type: ignore[arg-type]


def test_zigzag_first_values() -> None:
    # Protobuf encoding guide, "signed integers": 0,-1,1,-2,2 -> 0,1,2,3,4 (from memory).
    d = np.array([0, -1, 1, -2, 2, 2147483647, -2147483648], dtype=np.int64)
    np.testing.assert_array_equal(zigzag(d), [0, 1, 2, 3, 4, 4294967294, 4294967295])
    np.testing.assert_array_equal(unzigzag(zigzag(d)), d)


def test_bit_layout_is_lsb_first() -> None:
    # Two 4-bit values 0x3, 0xA pack into one byte 0xA3 (LSB-first, stated in the schema).
    z = np.array([3, 10], dtype=np.uint64)
    assert pack_bits(z, 4) == bytes([0xA3])
    np.testing.assert_array_equal(unpack_bits(bytes([0xA3]), 2, 4), z)


@settings(max_examples=100, deadline=None)
@given(hnp.arrays(np.float64, st.integers(1, 120),
                  elements=st.one_of(st.floats(0, 2000), st.just(np.nan))),
       st.sampled_from([-4, -3, -2, 0]))
def test_quantisation_error_is_at_most_half_a_unit(values: np.ndarray, exp: int) -> None:
    got = unpack_values(pack_values(values, exp), values.shape[0])
    nan = np.isnan(values)
    np.testing.assert_array_equal(np.isnan(got), nan)
    # Rounding to the nearest unit: |error| <= unit/2 (plus float64 rounding slack).
    unit = 10.0 ** exp
    assert np.all(np.abs(got[~nan] - values[~nan]) <= unit / 2 + 1e-9 * np.abs(values[~nan]))
    # Re-encoding the decoded values reproduces the same packed form (idempotent).
    assert pack_values(got, exp) == pack_values(values, exp)


def test_constant_and_all_missing_arrays_take_no_delta_bytes() -> None:
    packed = pack_values(np.full(60, 230.0), -2)
    assert packed[2] == 0 and packed[3] == b""
    packed = pack_values(np.full(60, np.nan), -2)
    assert packed[2] == 0 and packed[3] == b"" and len(packed[4]) == 8  # type: ignore[arg-type]


@pytest.mark.parametrize("data,count,width,why", [
    (b"\x00", 2, 8, "hold 1 bytes"),
    (b"\xff", 1, 4, "padding"),
])
def test_malformed_bit_streams_are_rejected(data: bytes, count: int, width: int, why: str) -> None:
    with pytest.raises(WireError, match=why):
        unpack_bits(data, count, width)


def test_infinite_and_out_of_range_values_are_refused_at_encode() -> None:
    with pytest.raises(WireError, match="infinite"):
        pack_values(np.array([1.0, np.inf]), -2)
    with pytest.raises(WireError, match="int32"):
        pack_values(np.array([3e7]), -2)  # 3e9 units of 10 mV > 2^31 - 1


def test_decoded_overflow_beyond_int32_is_rejected() -> None:
    # first = INT32_MAX and one delta of +1 (zigzag 2): the sum leaves int32.
    packed = [0, INT32_MAX, 2, pack_bits(np.array([2], dtype=np.uint64), 2)]
    with pytest.raises(WireError, match="int32"):
        unpack_units(packed, 2)
