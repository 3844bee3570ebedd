"""The validator's fast path accepts exactly what its full check accepts.

agent/wire/validate.py runs a yes/no predicate first and the path-naming check only on
rejection; summaries check all packed arrays in one numpy pass and re-run the array-by-array
check only on rejection. These tests hold the fast forms to the full forms (themselves held
to jsonschema in test_wire_schema.py) and the vectorised bit unpacking to an independent
per-bit numpy decoder written out here.
"""

from __future__ import annotations

import copy
import json
import math
from functools import partial
from pathlib import Path
from typing import Any

import msgpack
import numpy as np
import pytest
from _wire_helpers import json_paths, sample_messages, summary_bodies
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

from agent.resources import schemas_dir
from agent.wire.codec import decode, encode
from agent.wire.errors import WireError
from agent.wire.packing import (
    INT32_MAX,
    INT32_MIN,
    pack_units,
    unpack_units,
    unpack_units_many,
)
from agent.wire.validate import (
    _semantic_summary_fast,
    _semantic_summary_slow,
    default_validator,
)

KINDS = ["summary", "aggregate", "event", "capture", "status", "gap", "ack"]


def full_check_accepts(msg: Any, kind: str, strict: bool) -> bool:
    v = default_validator()
    try:
        (v._strict if strict else v._checks)[kind](msg, "$")
    except WireError:
        return False
    return True


def fast_accepts(msg: Any, kind: str, strict: bool) -> bool:
    v = default_validator()
    return bool((v._strict_ok if strict else v._ok)[kind](msg))


# Values aimed at the schema boundaries (bounds, lengths, types, NaN/inf, 5.0 vs 5, bytes).
_edge = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**64), 2**64),
    st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=70),
    st.sampled_from([0, 1, 3, 4, 5, 33, 34, -6, -7, 60, 3600, 3601, 2**31 - 1, 2**31, -(2**31),
                     -(2**31) - 1, 2**53 - 1, 2**53, 0.0, 5.0, 1.5, -0.0, 60.0, 60.5,
                     "L1", "x" * 16, "x" * 17, "dev\n", "a" * 64, "a" * 65, "-a", "heartbeat",
                     "synced", "dip", "ended", "10min", "<i2"]),
    st.binary(max_size=20), st.sampled_from([b"", bytes(1024), bytes(1025)]),
)
_value = st.recursive(_edge, lambda inner: st.one_of(
    st.lists(inner, max_size=6), st.dictionaries(st.text(max_size=8), inner, max_size=3)),
    max_leaves=6)


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(KINDS), st.booleans(), st.data())
def test_fast_predicate_agrees_with_the_full_check(kind: str, strict: bool,
                                                   data: st.DataObject) -> None:
    msg = copy.deepcopy(sample_messages()[kind])
    for _ in range(data.draw(st.sampled_from([0, 1, 1, 1, 2, 3]))):
        path = data.draw(st.sampled_from(json_paths(msg)))
        node = msg
        for p in path[:-1]:
            node = node[p]
        op = data.draw(st.sampled_from(["replace", "replace", "delete", "add"]))
        if op == "replace":
            node[path[-1]] = data.draw(_value)
        elif op == "delete":
            del node[path[-1]]
        elif isinstance(node, dict):
            node[data.draw(st.text(max_size=8))] = data.draw(_value)
        else:
            node.append(data.draw(_value))
    # The full check (held to jsonschema elsewhere) is the oracle for the fast predicate.
    assert fast_accepts(msg, kind, strict) == full_check_accepts(msg, kind, strict), msg


@pytest.mark.parametrize("kind", KINDS)
def test_fast_predicate_accepts_every_sample_and_rejects_type_swaps(kind: str) -> None:
    msg = sample_messages()[kind]
    assert fast_accepts(msg, kind, True) and full_check_accepts(msg, kind, True)
    for key in msg:
        if key in ("v", "type"):
            continue
        for wrong in (object(), math.nan, [[[]]]):
            bad = dict(msg)
            bad[key] = wrong  # never valid anywhere in these schemas (common practice)
            assert not fast_accepts(bad, kind, True), key
            assert not full_check_accepts(bad, kind, True), key


def test_integer_fields_accept_integral_floats_only_when_not_strict() -> None:
    msg = sample_messages()["gap"]
    msg["count"] = 61.0  # JSON Schema 2020-12 counts 61.0 as an integer (spec, "integer")
    assert fast_accepts(msg, "gap", False) and not fast_accepts(msg, "gap", True)
    msg["count"] = 61.5
    assert not fast_accepts(msg, "gap", False)


# --- per-second arrays ------------------------------------------------------------------

def _reference_unpack(packed: list[Any], n: int) -> tuple[np.ndarray, np.ndarray]:
    """Independent decoder: numpy unpackbits, one bit at a time, zigzag by its definition
    (protobuf encoding guide: even z -> z/2, odd z -> -(z+1)/2), numpy cumsum."""
    first, width, data = packed[1], packed[2], packed[3]
    bits = np.unpackbits(np.frombuffer(data, dtype=np.uint8), bitorder="little").astype(np.int64)
    z = np.array([sum(int(bits[i * width + j]) << j for j in range(width))
                  for i in range(n - 1)], dtype=np.int64)
    d = np.where(z % 2 == 0, z // 2, -(z + 1) // 2)
    units = first + np.concatenate([[0], np.cumsum(d)])
    if len(packed) > 4:
        m = np.unpackbits(np.frombuffer(packed[4], dtype=np.uint8), bitorder="little")[:n]
        missing = m.astype(bool)
    else:
        missing = np.zeros(n, dtype=bool)
    return units, missing


@settings(max_examples=150, deadline=None)
@given(st.integers(1, 90), st.integers(1, 6), st.data())
def test_many_arrays_at_once_match_an_independent_decoder(n: int, count: int,
                                                          data: st.DataObject) -> None:
    arrays = []
    for _ in range(count):
        span = data.draw(st.sampled_from([0, 1, 300, 2**20, 2**31]))
        units = data.draw(hnp.arrays(np.int64, n, elements=st.integers(
            max(INT32_MIN, -span), min(INT32_MAX, span))))
        missing = data.draw(st.one_of(st.none(), hnp.arrays(np.bool_, n)))
        arrays.append(pack_units(units, missing, exp=0))
    got, got_missing = unpack_units_many(arrays, n)
    assert got.shape == (count, n) and got_missing.shape == (count, n)
    for row, packed in enumerate(arrays):
        want, want_missing = _reference_unpack(packed, n)
        np.testing.assert_array_equal(got[row], want)
        np.testing.assert_array_equal(got_missing[row], want_missing)


def test_many_arrays_name_the_bad_array() -> None:
    good = pack_units(np.arange(10), None, exp=0)
    bad = list(good)
    bad[3] = good[3] + b"\x00"  # type: ignore[operator]  # one byte too many
    with pytest.raises(WireError, match="array 1: deltas hold"):
        unpack_units_many([good, bad, good], 10)
    # Padding bits: 9 deltas of 2 bits use 18 of 24 bits; a set bit 23 is not canonical.
    ones = pack_units(np.arange(10), None, exp=0)
    assert ones[2] == 2 and len(ones[3]) == 3  # type: ignore[arg-type]  # zigzag(1) = 2: 2 bits
    padded = list(ones)
    padded[3] = ones[3][:2] + bytes([ones[3][2] | 0x80])  # type: ignore[index]
    with pytest.raises(WireError, match="array 0: nonzero padding"):
        unpack_units_many([padded, good], 10)
    with pytest.raises(WireError, match="nonzero padding"):
        unpack_units(padded, 10)
    # The sum leaving int32 is found in whichever array it happens.
    over = [0, INT32_MAX, 2, bytes([0b10])]  # one delta of +1 (zigzag 2)
    with pytest.raises(WireError, match="array 1: decoded value outside int32"):
        unpack_units_many([pack_units(np.arange(2), None, 0), over], 2)


def _const(units: int, exp: int, n: int = 60) -> list[object]:
    return pack_units(np.full(n, units), None, exp)


def _spike(masked: bool) -> list[object]:
    """2000.00 V everywhere but 3000.00 V at second 30, which the mask may mark missing."""
    units = np.full(60, 200_000)
    units[30] = 300_000
    packed = pack_units(units, None, -2)
    if masked:
        missing = np.zeros(60, dtype=bool)
        missing[30] = True
        packed.append(np.packbits(missing, bitorder="little").tobytes())
    return packed


def _summary_mutations() -> list[tuple[str, Any, bool]]:
    """(path, new value, valid?) with the x-range bounds of summary.schema.json and half a
    unit of quantisation slack (so 2000.00 V passes, 2000.01 V does not)."""
    return [
        ("rms_mean.0", _const(200_000, -2), True),     # 2000.00 V: the bound itself
        ("rms_mean.0", _const(200_001, -2), False),    # 2000.01 V
        ("rms_min.1", _const(0, -2), True),            # 0 V
        ("rms_min.1", _const(-1, -2), False),          # -0.01 V
        ("hz", _const(100_000, -3), True),             # 100.000 Hz
        ("hz", _const(100_001, -3), False),            # 100.001 Hz
        ("flags", _const(65_535, 0), True),            # all 16 flag bits
        ("flags", _const(65_536, 0), False),           # a 17th bit
        ("flags", _const(1, -1), False),               # flags must use exp 0
        ("thd.1", _const(100_000, -4), True),          # THD 10 (fraction): the bound
        ("thd.1", _const(100_001, -4), False),
        ("rms_max.0", _spike(masked=True), True),      # out-of-range value marked missing
        ("rms_max.0", _spike(masked=False), False),
        ("imbalance", [-4, INT32_MAX, *_const(0, -4)[2:]], False),  # 214748.3647: outside 0..2
        ("imbalance", [-4, 0, 2, bytes(14)], False),   # 59 deltas x 2 bits need 15 bytes
        ("rms_max.1.3", b"", False),                   # deltas too short
        ("n", 59, False),                              # arrays hold 60
        ("thd.1", None, True),                         # a null channel
        ("thd", [None, None], True),
    ]


@pytest.mark.parametrize("path,value,valid", _summary_mutations())
def test_vectorised_summary_check_agrees_with_array_by_array(path: str, value: Any,
                                                             valid: bool) -> None:
    msg = copy.deepcopy(sample_messages()["summary"])
    node: Any = msg
    parts = [int(p) if p.isdigit() else p for p in path.split(".")]
    for p in parts[:-1]:
        node = node[p]
    node[parts[-1]] = value
    schema = default_validator().schemas["summary"]
    outcomes: list[str | None] = []
    checks: list[Any] = [partial(_semantic_summary_fast, shortcut=True),
                         partial(_semantic_summary_fast, shortcut=False), _semantic_summary_slow]
    for check in checks:
        try:
            check(msg, schema)
            outcomes.append(None)
        except WireError as exc:
            outcomes.append(exc.code)
    assert outcomes[0] == outcomes[1] == outcomes[2], outcomes
    assert (outcomes[2] is None) == valid, outcomes
    # Through decode: the error (if any) is the array-by-array one, naming the array.
    raw = msgpack.packb(msg, use_bin_type=True)
    if outcomes[1] is None:
        assert decode(raw)["n"] == msg["n"]
    else:
        with pytest.raises(WireError) as err:
            decode(raw)
        assert err.value.code in ("array", "semantic", "schema")
        assert err.value.reason.startswith("$")


@settings(max_examples=60, deadline=None)
@given(st.integers(0, 2**32), st.data())
def test_random_byte_flips_in_summaries_agree(seed: int, data: st.DataObject) -> None:
    msg = summary_bodies(120, 3, seed=seed % 1000, k=60)[0]
    msg.update(device="d", site="s", epoch="e", seq=1)
    names = [("rms_min", 0), ("rms_max", 2), ("thd", 1), ("hz", None), ("flags", None)]
    name, ch = data.draw(st.sampled_from(names))
    packed = msg[name] if ch is None else msg[name][ch]
    field = data.draw(st.sampled_from([1, 2, 3]))
    if field == 3 and packed[3]:
        buf = bytearray(packed[3])
        buf[data.draw(st.integers(0, len(buf) - 1))] ^= 1 << data.draw(st.integers(0, 7))
        packed[3] = bytes(buf)
    elif field == 1:
        packed[1] = data.draw(st.integers(INT32_MIN, INT32_MAX))
    else:
        packed[2] = data.draw(st.integers(0, 33))
    schema = default_validator().schemas["summary"]
    outcomes = []
    for check in (partial(_semantic_summary_fast, shortcut=True),
                  partial(_semantic_summary_fast, shortcut=False), _semantic_summary_slow):
        try:
            check(msg, schema)
            outcomes.append(True)
        except WireError:
            outcomes.append(False)
    assert outcomes[0] == outcomes[1] == outcomes[2], outcomes


def test_encoded_summaries_still_round_trip_through_decode() -> None:
    for body in summary_bodies(600, 4, seed=9, k=120):
        msg = dict(body, device="d", site="s", epoch="e", seq=1)
        assert decode(encode(msg)) == msg


def test_property_count_keywords_agree_with_jsonschema(tmp_path: Path) -> None:
    import jsonschema

    from agent.wire.validate import Validator

    schema = json.loads((schemas_dir() / "status.schema.json").read_text())
    schema["properties"]["outbox_lanes"]["maxProperties"] = 2
    schema["properties"]["outbox_lanes"]["minProperties"] = 1
    (tmp_path / "status.schema.json").write_text(json.dumps(schema))
    ours = Validator(tmp_path)
    oracle = jsonschema.Draft202012Validator(schema)  # JSON Schema 2020-12, "maxProperties"
    for lanes in ({}, {"a": 1}, {"a": 1, "b": 2}, {"a": 1, "b": 2, "c": 3}):
        msg = sample_messages()["status"]
        msg["outbox_lanes"] = lanes
        try:
            ours.validate(msg)
            accepted = True
        except WireError as exc:
            accepted = False
            assert "$.outbox_lanes" in exc.reason
        assert accepted == oracle.is_valid(msg) == (1 <= len(lanes) <= 2)
