"""The schemas are the source of truth: jsonschema (an independent validator) checks every
encoded message, and our fast validator agrees with it."""

from __future__ import annotations

import copy
import json
import math
from pathlib import Path
from typing import Any

import jsonschema
import msgpack
import pytest
from _wire_helpers import IDENT, T0, json_paths, sample_capture, sample_event, sample_messages
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from agent.resources import schemas_dir
from agent.wire.codec import SCHEMA_VERSIONS, capture_bodies, encode, event_body
from agent.wire.errors import WireError
from agent.wire.topics import topic
from agent.wire.validate import SchemaLoadError, Validator, default_validator

SCHEMA_FILES = sorted(schemas_dir().glob("*.schema.json"))
KINDS = ["summary", "aggregate", "event", "capture", "status", "gap", "ack"]


def _schema(kind: str) -> dict[str, Any]:
    return json.loads((schemas_dir() / f"{kind}.schema.json").read_text())


_JS = {k: jsonschema.Draft202012Validator(_schema(k)) for k in KINDS}


def js_valid(msg: Any, kind: str) -> bool:
    return bool(_JS[kind].is_valid(msg))


def ours_valid(msg: Any) -> bool:
    try:
        default_validator().validate(msg, semantic=False)
    except WireError:
        return False
    return True


def test_schema_files_are_valid_draft_2020_12() -> None:
    assert {p.name.removesuffix(".schema.json") for p in SCHEMA_FILES} == set(KINDS)
    for path in SCHEMA_FILES:
        schema = json.loads(path.read_text())
        assert schema["$schema"] == "https://json-schema.org/draft/2020-12/schema"
        jsonschema.Draft202012Validator.check_schema(schema)  # JSON Schema 2020-12 metaschema
        # v: a const, or an enum when a newer version only added optional fields (older
        # messages stay valid); the codec writes the newest.
        vnode = schema["properties"]["v"]
        versions = [vnode["const"]] if "const" in vnode else vnode["enum"]
        assert versions[0] == 1
        kind = path.name.removesuffix(".schema.json")
        assert max(versions) == SCHEMA_VERSIONS.get(kind, 1)


def test_shared_definitions_are_identical_in_every_file() -> None:
    defs = [json.loads(p.read_text())["$defs"] for p in SCHEMA_FILES]
    assert all(d == defs[0] for d in defs)


@pytest.mark.parametrize("kind", KINDS)
def test_jsonschema_accepts_every_encoded_message(kind: str) -> None:
    msg = sample_messages()[kind]
    generic = msgpack.unpackb(encode(msg), raw=False)  # generic decoder, not ours
    jsonschema.validate(generic, _schema(kind), cls=jsonschema.Draft202012Validator)
    assert ours_valid(generic)


def test_jsonschema_accepts_every_capture_chunk() -> None:
    chunks = capture_bodies(sample_capture(), topic=topic("site-7", "dev-0042", "capture"),
                            max_packet=2048)
    assert len(chunks) > 5
    for i, body in enumerate(chunks):
        generic = msgpack.unpackb(encode(IDENT.stamp(body, seq=i)), raw=False)
        assert js_valid(generic, "capture")


def _get_parent(msg: Any, path: tuple[Any, ...]) -> Any:
    node = msg
    for p in path[:-1]:
        node = node[p]
    return node


# JSON-like values, plus small bytes; no NaN/inf (JSON has none: tested separately) and no
# strings ending in a newline (Python's re lets '$' match before one; ECMA-262 does not:
# tested separately).
_text = st.text(max_size=12).filter(lambda s: not s.endswith("\n"))
_scalar = st.one_of(
    st.none(), st.booleans(), st.integers(-(2**63), 2**64 - 1),
    st.floats(allow_nan=False, allow_infinity=False), _text,
    st.sampled_from(["L1", "dip", "started", "synced", "heartbeat", "<i2", "a" * 64, "a" * 65,
                     "0" * 64, "summary", "10min", "outbox_full", "", "a b", "x/y", "-dev",
                     "dev+1", "Dip", "A" * 64, "0" * 63]),
    st.sampled_from([0, 1, 2, 3, 4, 33, 34, -6, -7, 60, 3600, 3601, 2000, 2001, 1.0, 0.5]),
    st.binary(max_size=24),
)
_value = st.recursive(_scalar, lambda inner: st.one_of(
    st.lists(inner, max_size=6), st.dictionaries(_text, inner, max_size=4)), max_leaves=8)


@settings(max_examples=500, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.sampled_from(KINDS), st.data())
def test_our_validator_agrees_with_jsonschema_on_mutations(kind: str, data: st.DataObject) -> None:
    msg = copy.deepcopy(sample_messages()[kind])
    # Mostly one mutation, so a single broken rule decides the outcome.
    for _ in range(data.draw(st.sampled_from([0, 1, 1, 1, 1, 2, 3]))):
        paths = json_paths(msg)
        op = data.draw(st.sampled_from(["replace", "delete", "add", "dup", "grow"]))
        path = data.draw(st.sampled_from(paths))
        parent = _get_parent(msg, path)
        key = path[-1]
        if op == "replace":
            parent[key] = data.draw(_value)
        elif op == "delete":
            del parent[key]
        elif op == "add" and isinstance(parent, dict):
            parent[data.draw(_text)] = data.draw(_value)
        elif op == "add" and isinstance(parent, list):
            parent.append(data.draw(_value))
        elif op == "dup" and isinstance(parent, list):
            parent.insert(key, copy.deepcopy(parent[key]))
        elif op == "grow" and isinstance(parent, list):  # past maxItems
            parent.extend(copy.deepcopy(parent[key]) for _ in range(data.draw(st.integers(1, 4))))
    assert ours_valid(msg) == js_valid(msg, kind), msg


def _set(msg: dict[str, Any], path: str, value: Any) -> dict[str, Any]:
    node: Any = msg
    parts = [int(p) if p.isdigit() else p for p in path.split(".")]
    for p in parts[:-1]:
        node = node[p]
    if value is _DELETE:
        del node[parts[-1]]
    else:
        node[parts[-1]] = value
    return msg


_DELETE = object()
# One invalid sample per keyword the schemas use (type, const, enum, required, properties,
# additionalProperties, propertyNames, items, prefixItems, minItems, maxItems, minLength,
# maxLength, pattern, minimum, maximum, exclusiveMinimum, oneOf, not).
INVALID = [
    ("status", "uptime_s", "12"), ("status", "v", 1.5), ("status", "type", "gap"),
    ("status", "state", "sleeping"), ("status", "clock", _DELETE), ("status", "clock.sync", 3),
    ("status", "clock.extra", 1), ("event", "classification.a b", "x"),
    ("event", "channels.0", -1), ("summary", "hz.0", 4), ("summary", "hz.3", "ab"),
    ("event", "channels", []), ("event", "channels", [0, 1, 2, 3, 0]),
    ("aggregate", "channels.0", ""), ("status", "agent_version", "x" * 33),
    ("gap", "lane", "Trend"), ("gap", "first_seq", -1), ("gap", "first_seq", 2**53),
    ("summary", "period_s", 0), ("summary", "hz", "ab"), ("capture", "data", "text"),
    ("summary", "thd.0", False), ("event", "classification.k", {"n": {"deep": 1}}),
    ("event", "ended_by", "timeout"), ("ack", "collector", "c/1"), ("ack", "seq", True),
]


@pytest.mark.parametrize("kind,path,value", INVALID)
def test_both_validators_reject_each_keyword(kind: str, path: str, value: Any) -> None:
    msg = _set(sample_messages()[kind], path, value)
    assert not js_valid(msg, kind)
    assert not ours_valid(msg)


@settings(max_examples=60, deadline=None)
@given(level=st.floats(0, 1999.0), nominal=st.floats(50, 1000), dur=st.floats(0, 1e6),
       err=st.one_of(st.none(), st.floats(0, 10)), ended=st.booleans(),
       sync=st.sampled_from([None, "synced", "unsynced", "holdover", "replay"]))
def test_random_valid_events_pass_both(level: float, nominal: float, dur: float,
                                       err: float | None, ended: bool, sync: str | None) -> None:
    ev = sample_event(ended)
    ev.level_v, ev.nominal_v, ev.time_error_s, ev.sync_state = level, nominal, err, sync
    if ended:
        ev.end_utc = ev.start_utc + dur
    if level / nominal > 20:
        return  # outside the schema's level_pu range by design
    msg = msgpack.unpackb(encode(IDENT.stamp(event_body(ev, "ended" if ended else "started"),
                                             seq=1)), raw=False)
    assert js_valid(msg, "event") and ours_valid(msg)


def test_known_stricter_points_where_jsonschema_accepts() -> None:
    # JSON has no NaN, so JSON Schema cannot reject it; msgpack can carry it: we do.
    msg = sample_messages()["status"]
    msg["uptime_s"] = math.nan
    assert js_valid(msg, "status") and not ours_valid(msg)
    # On the wire an integer field needs a msgpack int; JSON Schema lets 5.0 pass.
    msg = sample_messages()["status"]
    msg["outbox_depth"] = 3.0
    assert js_valid(msg, "status") and ours_valid(msg)
    with pytest.raises(WireError, match=r"\$\.outbox_depth"):
        default_validator().validate(msg)
    # ECMA-262 '$' is end of input; Python's re (used by jsonschema) also matches before "\n".
    msg = sample_messages()["status"]
    msg["device"] = "dev\n"
    assert js_valid(msg, "status") and not ours_valid(msg)


def test_unsupported_schema_keyword_fails_at_load(tmp_path: Path) -> None:
    schema = _schema("gap")
    schema["properties"]["lane"]["if"] = {"const": "x"}
    (tmp_path / "gap.schema.json").write_text(json.dumps(schema))
    with pytest.raises(SchemaLoadError, match="unsupported keyword"):
        Validator(tmp_path)


def test_validator_loads_a_new_version_from_the_folder(tmp_path: Path) -> None:
    # Reject unknown v: a folder with gap v2 rejects v1 messages and says which it reads.
    schema = _schema("gap")
    schema["properties"]["v"]["const"] = 2
    (tmp_path / "gap.schema.json").write_text(json.dumps(schema))
    with pytest.raises(WireError) as err:
        Validator(tmp_path).validate(sample_messages()["gap"])
    assert err.value.code == "unknown_version" and "v=2" in err.value.reason


def test_event_v1_and_v2_are_both_read_and_v2_is_written() -> None:
    # A v1 dip from a device not yet upgraded stays valid; an RVC needs v2's kind.
    v1 = sample_messages()["event"] | {"v": 1}
    assert default_validator().validate(v1) == "event" and js_valid(v1, "event")
    assert default_validator().versions["event"] == 2
    with pytest.raises(WireError) as err:
        default_validator().validate(v1 | {"v": 3})
    assert err.value.code == "unknown_version" and "v=1, 2" in err.value.reason


def test_times_are_documented_as_utc_seconds() -> None:
    desc = _schema("summary")["$defs"]["utc"]["description"]
    assert "UTC seconds" in desc and "float64" in desc
    assert T0 == 1_796_083_200.0  # 2026-12-01T00:00:00Z (calendar arithmetic, invented data)


def test_flag_bits_in_code_match_the_schema_description() -> None:
    from agent.wire.records import FLAG_BITS

    desc = _schema("summary")["properties"]["flags"]["description"]
    for name, bit in FLAG_BITS.items():
        assert f"{bit} {name}" in desc, name
    assert sorted(FLAG_BITS.values()) == [1 << i for i in range(len(FLAG_BITS))]
