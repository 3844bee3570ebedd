"""A small, fast validator for decoded wire messages, driven by ``schemas/*.schema.json``.

The JSON Schemas are the single source of truth; this module compiles the subset of JSON
Schema draft 2020-12 they use into closures once, then checks each message without a
general-purpose schema engine. Supported keywords: ``type``, ``const``, ``enum``,
``required``, ``properties``, ``additionalProperties``, ``propertyNames``,
``minProperties``, ``maxProperties``, ``items``,
``prefixItems``, ``minItems``, ``maxItems``, ``minLength``, ``maxLength``, ``pattern``,
``minimum``, ``maximum``, ``exclusiveMinimum``, ``exclusiveMaximum``, ``oneOf``, ``not`` and
local ``$ref`` (``#/$defs/...``). A schema using anything else fails at load time, so the
subset cannot silently drift from the files.

Deliberately stricter than a general validator:

- NaN and infinite numbers are rejected wherever a number is allowed (JSON cannot carry
  them; msgpack can).
- ``pattern`` follows ECMA-262: ``$`` matches only at the very end (Python's ``re`` also
  matches before a final newline).
- ``x-msgpack: bin`` nodes must be ``bytes``; ``x-maxBytes`` bounds their length.
- Semantic checks the schema language cannot say: per-second packed arrays are unpacked
  with numpy and checked for length, padding, int32 range and the field's ``x-range``;
  per-channel lists match ``channels``; event and capture fields agree with each other.

Unknown ``v`` is rejected before schema validation with code ``unknown_version``.

Speed (the collector validates every message): each schema compiles twice, to a full check
that names the path and reason of the first problem, and to a yes/no predicate with the
same acceptance that builds no paths and raises nothing (common node shapes fuse into one
closure). A valid message costs one predicate pass; only a rejected one runs the full check
for its reason. Packed per-second arrays get a few scalar header checks; their values are
checked without decoding when ``first`` and the largest possible drift of ``width``-bit
deltas prove them in range, else all arrays of a summary are decoded and checked in one
numpy pass. The array-by-array check runs only to name the array of a rejection.
"""

from __future__ import annotations

import json
import math
import operator
import re
from collections.abc import Callable
from functools import lru_cache
from pathlib import Path
from typing import Any

import numpy as np

from agent.resources import schemas_dir
from agent.wire.errors import WireError
from agent.wire.packing import (
    INT32_MAX,
    INT32_MIN,
    check_header,
    unpack_units,
    unpack_units_many,
    value_span,
)

Check = Callable[[Any, str], None]
# A compiled node as a plain yes/no test: no paths, no exceptions (the fast path).
Pred = Callable[[Any], bool]

# Keywords that only annotate (ignored here as in any 2020-12 validator).
_ANNOTATIONS = frozenset({
    "$schema", "$id", "$defs", "$comment", "title", "description", "default", "examples",
    "x-unit", "x-range", "x-exp", "x-msgpack", "x-maxBytes",
})
_SUPPORTED = frozenset({
    "type", "const", "enum", "required", "properties", "additionalProperties",
    "propertyNames", "minProperties", "maxProperties", "items", "prefixItems", "minItems",
    "maxItems", "minLength", "maxLength",
    "pattern", "minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum", "oneOf", "not",
    "$ref",
})


class SchemaLoadError(RuntimeError):
    """A schema file uses a keyword this validator does not implement, or is malformed."""


def _is_number(x: Any) -> bool:
    return isinstance(x, int | float) and not isinstance(x, bool)


def _type_ok(x: Any, name: str, strict_int: bool = False) -> bool:
    if name == "null":
        return x is None
    if name == "boolean":
        return isinstance(x, bool)
    if name == "integer":
        if isinstance(x, bool):
            return False
        if isinstance(x, int):
            return True
        # JSON Schema counts 5.0 as an integer; on the wire we insist on a msgpack int.
        return not strict_int and isinstance(x, float) and math.isfinite(x) and x.is_integer()
    if name == "number":
        return _is_number(x)
    if name == "string":
        return isinstance(x, str)
    if name == "array":
        return isinstance(x, list)
    if name == "object":
        return isinstance(x, dict)
    raise SchemaLoadError(f"unknown type name {name!r}")


def _always(x: Any) -> bool:
    return True


def _never(x: Any) -> bool:
    return False


def _conjunction(tests: list[Pred]) -> Pred:
    if not tests:
        return _always
    if len(tests) == 1:
        return tests[0]
    if len(tests) == 2:
        a, b = tests
        return lambda x: a(x) and b(x)
    if len(tests) == 3:
        a, b, c = tests
        return lambda x: a(x) and b(x) and c(x)
    return lambda x: all(t(x) for t in tests)


_PLAIN_TYPES: dict[str, type] = {"null": type(None), "boolean": bool, "string": str,
                                 "array": list, "object": dict}


def _type_pred(names: list[str], strict_int: bool) -> Pred:
    """The yes/no form of the ``type`` check (finiteness and strict integers included)."""
    for n in names:
        _type_ok(None, n)  # rejects unknown type names at load time
    plain = tuple(_PLAIN_TYPES[n] for n in names if n in _PLAIN_TYPES)
    number = "number" in names
    integer = "integer" in names and not number

    if number:
        def number_ok(x: Any) -> bool:
            if isinstance(x, float):
                return math.isfinite(x)
            return isinstance(x, plain) or (isinstance(x, int) and not isinstance(x, bool))
        return number_ok
    if integer and strict_int:
        return lambda x: isinstance(x, plain) or (isinstance(x, int)
                                                  and not isinstance(x, bool))
    if integer:
        def integer_ok(x: Any) -> bool:
            if isinstance(x, float):
                return math.isfinite(x) and x.is_integer()
            return isinstance(x, plain) or (isinstance(x, int) and not isinstance(x, bool))
        return integer_ok
    if len(plain) == 1:
        only = plain[0]
        return lambda x: isinstance(x, only)
    return lambda x: isinstance(x, plain)


def _bounds_pred(bounds: list[tuple[Callable[[Any, Any], bool], float]]) -> Pred:
    """``minimum`` & co.: they constrain numbers only (booleans are not numbers)."""
    if len(bounds) == 2:
        (op1, lim1), (op2, lim2) = bounds
        return lambda x: (isinstance(x, bool) or not isinstance(x, int | float)
                          or (op1(x, lim1) and op2(x, lim2)))
    return lambda x: (isinstance(x, bool) or not isinstance(x, int | float)
                      or all(op(x, lim) for op, lim in bounds))


def _json_equal(a: Any, b: Any) -> bool:
    """JSON equality: booleans are not numbers, 1 == 1.0."""
    if isinstance(a, bool) or isinstance(b, bool):
        return isinstance(a, bool) and isinstance(b, bool) and a == b
    if isinstance(a, list) and isinstance(b, list):
        return len(a) == len(b) and all(_json_equal(x, y) for x, y in zip(a, b, strict=True))
    if isinstance(a, dict) and isinstance(b, dict):
        return a.keys() == b.keys() and all(_json_equal(a[k], b[k]) for k in a)
    if _is_number(a) and _is_number(b):
        return bool(a == b)
    return type(a) is type(b) and bool(a == b)


def _fail(path: str, problem: str, code: str = "schema") -> WireError:
    return WireError(f"{path}: {problem}", code)


def _ecma_pattern(pattern: str) -> re.Pattern[str]:
    if pattern.endswith("$") and not pattern.endswith("\\$"):
        pattern = pattern[:-1] + r"\Z"
    return re.compile(pattern)


class _Compiler:
    def __init__(self, root: dict[str, Any], name: str, strict_int: bool) -> None:
        self.root = root
        self.name = name
        self.strict_int = strict_int
        self.refs: dict[str, Check] = {}
        self.pred_refs: dict[str, Pred] = {}
        # $ref targets that are plain msgpack bin nodes, with their x-maxBytes (or None).
        self.bin_refs: dict[str, float] = {}

    def _lookup(self, ref: str) -> Any:
        if not ref.startswith("#/"):
            raise SchemaLoadError(f"{self.name}: only local $ref is supported, got {ref!r}")
        node: Any = self.root
        for part in ref[2:].split("/"):
            if not isinstance(node, dict) or part not in node:
                raise SchemaLoadError(f"{self.name}: $ref {ref!r} does not resolve")
            node = node[part]
        return node

    def resolve(self, ref: str) -> Check:
        if ref in self.refs:
            return self.refs[ref]
        node = self._lookup(ref)
        holder: list[Check] = []
        # Placeholder first so a recursive reference compiles to a late-bound call.
        self.refs[ref] = lambda x, p: holder[0](x, p)
        holder.append(self.compile(node))
        self.refs[ref] = holder[0]
        return holder[0]

    def compile(self, node: Any) -> Check:
        if node is True:
            return lambda x, p: None
        if node is False:
            def never(x: Any, p: str) -> None:
                raise _fail(p, "no value is allowed here")
            return never
        if not isinstance(node, dict):
            raise SchemaLoadError(f"{self.name}: schema node must be an object or boolean")
        unknown = set(node) - _ANNOTATIONS - _SUPPORTED
        if unknown:
            raise SchemaLoadError(f"{self.name}: unsupported keyword(s) {sorted(unknown)}")
        checks: list[Check] = []

        if node.get("x-msgpack") == "bin":
            max_bytes = node.get("x-maxBytes")

            def bin_check(x: Any, p: str) -> None:
                if not isinstance(x, bytes):
                    raise _fail(p, f"expected bytes (msgpack bin), got {type(x).__name__}")
                if max_bytes is not None and len(x) > max_bytes:
                    raise _fail(p, f"{len(x)} bytes exceed {max_bytes}", "oversized")
            checks.append(bin_check)
        elif "x-maxBytes" in node:
            limit = int(node["x-maxBytes"])

            def bytes_limit(x: Any, p: str) -> None:
                if isinstance(x, bytes) and len(x) > limit:
                    raise _fail(p, f"{len(x)} bytes exceed {limit}", "oversized")
            checks.append(bytes_limit)

        if "$ref" in node:
            checks.append(self.resolve(node["$ref"]))

        if "type" in node:
            names = node["type"] if isinstance(node["type"], list) else [node["type"]]
            for n in names:
                _type_ok(None, n)  # rejects unknown type names at load time
            allows_number = "number" in names or "integer" in names
            label = "/".join(names)
            strict = self.strict_int

            def type_check(x: Any, p: str) -> None:
                if isinstance(x, float) and not math.isfinite(x) and allows_number:
                    raise _fail(p, f"{x} is not a finite number", "non_finite")
                if not any(_type_ok(x, n, strict) for n in names):
                    raise _fail(p, f"expected {label}, got {_describe(x)}")
            checks.append(type_check)

        if "const" in node:
            const = node["const"]

            def const_check(x: Any, p: str) -> None:
                if not _json_equal(x, const):
                    raise _fail(p, f"must be {const!r}, got {_describe(x)}")
            checks.append(const_check)

        if "enum" in node:
            options = list(node["enum"])

            def enum_check(x: Any, p: str) -> None:
                if not any(_json_equal(x, o) for o in options):
                    raise _fail(p, f"{_describe(x)} is not one of {options}")
            checks.append(enum_check)

        for key, op, text in (("minimum", lambda a, b: a >= b, ">="),
                              ("maximum", lambda a, b: a <= b, "<="),
                              ("exclusiveMinimum", lambda a, b: a > b, ">"),
                              ("exclusiveMaximum", lambda a, b: a < b, "<")):
            if key in node:
                checks.append(self._bound(node[key], op, text))

        if "minLength" in node or "maxLength" in node or "pattern" in node:
            lo = int(node.get("minLength", 0))
            hi = node.get("maxLength")
            rx = _ecma_pattern(node["pattern"]) if "pattern" in node else None

            def string_check(x: Any, p: str) -> None:
                if not isinstance(x, str):
                    return
                if len(x) < lo:
                    raise _fail(p, f"string shorter than {lo}")
                if hi is not None and len(x) > hi:
                    raise _fail(p, f"string longer than {hi}")
                if rx is not None and not rx.search(x):
                    raise _fail(p, f"{x[:80]!r} does not match {rx.pattern!r}")
            checks.append(string_check)

        if any(k in node for k in ("items", "prefixItems", "minItems", "maxItems")):
            checks.append(self._array(node))

        if any(k in node for k in ("required", "properties", "additionalProperties",
                                   "propertyNames")):
            checks.append(self._object(node))

        if "minProperties" in node or "maxProperties" in node:
            fewest = int(node.get("minProperties", 0))
            most = node.get("maxProperties")

            def size_check(x: Any, p: str) -> None:
                if not isinstance(x, dict):
                    return
                if len(x) < fewest:
                    raise _fail(p, f"{len(x)} properties, at least {fewest} required")
                if most is not None and len(x) > most:
                    raise _fail(p, f"{len(x)} properties, at most {most} allowed", "oversized")
            checks.append(size_check)

        if "oneOf" in node:
            branches = [self.compile(b) for b in node["oneOf"]]

            def one_of(x: Any, p: str) -> None:
                passed = 0
                errors: list[WireError] = []
                for b in branches:
                    try:
                        b(x, p)
                        passed += 1
                    except WireError as exc:
                        errors.append(exc)
                if passed == 1:
                    return
                if passed == 0 and errors:
                    # The deepest failure names the most specific problem (e.g. inside the
                    # packed array rather than "expected null").
                    best = max(errors, key=lambda e: len(e.reason.split(":", 1)[0]))
                    if best.code != "schema":
                        raise best  # non-finite or oversized: keep the precise code
                    raise _fail(p, f"matches none of the oneOf alternatives; closest: "
                                   f"{best.reason}")
                raise _fail(p, f"matches {passed} of the oneOf alternatives, not exactly 1")
            checks.append(one_of)

        if "not" in node:
            inner = self.compile(node["not"])

            def not_check(x: Any, p: str) -> None:
                try:
                    inner(x, p)
                except WireError:
                    return
                raise _fail(p, f"{_describe(x)} is not allowed here")
            # A bin node already gave a precise reason; 'not' runs after it.
            checks.append(not_check)

        if len(checks) == 1:
            return checks[0]

        def all_checks(x: Any, p: str) -> None:
            for c in checks:
                c(x, p)
        return all_checks

    @staticmethod
    def _bound(limit: float, op: Callable[[float, float], bool], text: str) -> Check:
        def bound(x: Any, p: str) -> None:
            if _is_number(x) and not op(x, limit):
                raise _fail(p, f"{x} is not {text} {limit}")
        return bound

    def _array(self, node: dict[str, Any]) -> Check:
        prefix = [self.compile(s) for s in node.get("prefixItems", [])]
        rest = self.compile(node["items"]) if "items" in node else None
        lo = int(node.get("minItems", 0))
        hi = node.get("maxItems")

        def array_check(x: Any, p: str) -> None:
            if not isinstance(x, list):
                return
            if len(x) < lo:
                raise _fail(p, f"{len(x)} items, at least {lo} required")
            if hi is not None and len(x) > hi:
                raise _fail(p, f"{len(x)} items, at most {hi} allowed", "oversized")
            for i, item in enumerate(x):
                if i < len(prefix):
                    prefix[i](item, f"{p}[{i}]")
                elif rest is not None:
                    rest(item, f"{p}[{i}]")
        return array_check

    def _object(self, node: dict[str, Any]) -> Check:
        required = list(node.get("required", []))
        props = {k: self.compile(v) for k, v in node.get("properties", {}).items()}
        extra = node.get("additionalProperties", True)
        extra_check = None if extra is True else self.compile(extra)
        names = self.compile(node["propertyNames"]) if "propertyNames" in node else None

        def object_check(x: Any, p: str) -> None:
            if not isinstance(x, dict):
                return
            for k in required:
                if k not in x:
                    raise _fail(p, f"missing required property {k!r}")
            for k, value in x.items():
                sub = f"{p}.{k}"
                if names is not None:
                    names(k, f"{p}{{key {k!r}}}")
                check = props.get(k)
                if check is not None:
                    check(value, sub)
                elif extra is False:
                    raise _fail(p, f"unexpected property {k!r}")
                elif extra_check is not None:
                    extra_check(value, sub)
        return object_check


    # --- the fast path ------------------------------------------------------------------
    # predicate() compiles a node to a yes/no test that accepts exactly what compile()'s
    # check accepts, without building paths or raising: a valid message costs one pass of
    # cheap calls; only a rejected one runs the check again to say where and why.

    def resolve_pred(self, ref: str) -> Pred:
        if ref in self.pred_refs:
            return self.pred_refs[ref]
        node = self._lookup(ref)
        holder: list[Pred] = []
        self.pred_refs[ref] = lambda x: holder[0](x)
        holder.append(self.predicate(node))
        self.pred_refs[ref] = holder[0]
        return holder[0]

    def _bin_limit(self, node: dict[str, Any]) -> float | None:
        """x-maxBytes (inf if none) of a node that only says "msgpack bin, not any JSON
        type"; None for any other node. For such a node the ``not`` can never fail on
        bytes (bytes are none of the JSON types) and anything else fails the bin check."""
        keys = set(node) - _ANNOTATIONS
        if node.get("x-msgpack") != "bin" or not keys <= {"not"}:
            return None
        if keys:
            inner = node["not"]
            if not (isinstance(inner, dict) and set(inner) - _ANNOTATIONS == {"type"}):
                return None
            names = inner["type"] if isinstance(inner["type"], list) else [inner["type"]]
            _type_pred(names, self.strict_int)  # unknown names still fail at load time
        return float(node.get("x-maxBytes", math.inf))

    def _fused(self, node: dict[str, Any]) -> Pred | None:
        """One closure for the common scalar node shapes (no chain of small tests)."""
        keys = set(node) - _ANNOTATIONS
        bin_limit = self._bin_limit(node)
        if bin_limit is None and keys == {"$ref"} and "x-maxBytes" in node:
            target = self._lookup(node["$ref"])
            inner_limit = self._bin_limit(target) if isinstance(target, dict) else None
            if inner_limit is not None:
                bin_limit = min(inner_limit, float(node["x-maxBytes"]))
        if bin_limit is not None:
            top = bin_limit
            return lambda x: isinstance(x, bytes) and len(x) <= top

        kind = node.get("type")
        bound_keys = {"minimum", "maximum", "exclusiveMinimum", "exclusiveMaximum"}
        if kind in ("integer", "number") and keys <= {"type"} | bound_keys:
            lo = node.get("minimum", -math.inf)
            hi = node.get("maximum", math.inf)
            xlo = node.get("exclusiveMinimum", -math.inf)
            xhi = node.get("exclusiveMaximum", math.inf)
            if kind == "number":
                def number_in_range(x: Any) -> bool:
                    if isinstance(x, float):
                        return math.isfinite(x) and lo <= x <= hi and xlo < x < xhi
                    return (isinstance(x, int) and not isinstance(x, bool)
                            and lo <= x <= hi and xlo < x < xhi)
                return number_in_range
            if self.strict_int and xlo == -math.inf and xhi == math.inf:
                def strict_integer_in_range(x: Any) -> bool:
                    if type(x) is int:  # the common case, before the subclass rules
                        return lo <= x <= hi
                    return isinstance(x, int) and not isinstance(x, bool) and lo <= x <= hi
                return strict_integer_in_range
            if self.strict_int:
                return lambda x: (isinstance(x, int) and not isinstance(x, bool)
                                  and lo <= x <= hi and xlo < x < xhi)

            def integer_in_range(x: Any) -> bool:
                if isinstance(x, float):
                    return (math.isfinite(x) and x.is_integer() and lo <= x <= hi
                            and xlo < x < xhi)
                return (isinstance(x, int) and not isinstance(x, bool)
                        and lo <= x <= hi and xlo < x < xhi)
            return integer_in_range

        if kind == "string" and keys <= {"type", "minLength", "maxLength", "pattern"}:
            min_len = int(node.get("minLength", 0))
            max_len = node.get("maxLength", math.inf)
            if "pattern" not in node:
                return lambda x: isinstance(x, str) and min_len <= len(x) <= max_len
            search = _ecma_pattern(node["pattern"]).search
            return lambda x: (isinstance(x, str) and min_len <= len(x) <= max_len
                              and search(x) is not None)
        # A typed array or object: the container test folds into the item walk.
        if kind == "array" and keys <= {"type", "items", "prefixItems", "minItems", "maxItems"}:
            return self._array_pred(node, must_be_list=True)
        if kind == "object" and keys <= {"type", "required", "properties",
                                         "additionalProperties", "propertyNames"}:
            return self._object_pred(node, must_be_dict=True)
        return None

    def predicate(self, node: Any) -> Pred:
        if node is True:
            return _always
        if node is False:
            return _never
        if not isinstance(node, dict):
            raise SchemaLoadError(f"{self.name}: schema node must be an object or boolean")
        unknown = set(node) - _ANNOTATIONS - _SUPPORTED
        if unknown:
            raise SchemaLoadError(f"{self.name}: unsupported keyword(s) {sorted(unknown)}")
        fused = self._fused(node)
        if fused is not None:
            return fused
        tests: list[Pred] = []

        if node.get("x-msgpack") == "bin":
            max_bytes = node.get("x-maxBytes")
            if max_bytes is None:
                tests.append(lambda x: isinstance(x, bytes))
            else:
                tests.append(lambda x: isinstance(x, bytes) and len(x) <= max_bytes)
        elif "x-maxBytes" in node:
            limit = int(node["x-maxBytes"])
            tests.append(lambda x: not isinstance(x, bytes) or len(x) <= limit)

        if "$ref" in node:
            tests.append(self.resolve_pred(node["$ref"]))

        if "type" in node:
            names = node["type"] if isinstance(node["type"], list) else [node["type"]]
            tests.append(_type_pred(names, self.strict_int))

        if "const" in node:
            const = node["const"]
            if type(const) is str:
                tests.append(lambda x: type(x) is str and x == const)
            else:
                tests.append(lambda x: _json_equal(x, const))

        if "enum" in node:
            options = list(node["enum"])
            if all(type(o) is str for o in options):
                allowed = frozenset(options)
                tests.append(lambda x: type(x) is str and x in allowed)
            else:
                tests.append(lambda x: any(_json_equal(x, o) for o in options))

        bounds = [(op, node[key]) for key, op in (("minimum", operator.ge),
                                                  ("maximum", operator.le),
                                                  ("exclusiveMinimum", operator.gt),
                                                  ("exclusiveMaximum", operator.lt))
                  if key in node]
        if bounds:
            tests.append(_bounds_pred(bounds))

        if "minLength" in node or "maxLength" in node or "pattern" in node:
            lo = int(node.get("minLength", 0))
            hi = node.get("maxLength")
            top = math.inf if hi is None else hi
            rx = _ecma_pattern(node["pattern"]) if "pattern" in node else None
            if rx is None:
                tests.append(lambda x: not isinstance(x, str) or lo <= len(x) <= top)
            else:
                search = rx.search
                tests.append(lambda x: not isinstance(x, str)
                             or (lo <= len(x) <= top and search(x) is not None))

        if any(k in node for k in ("items", "prefixItems", "minItems", "maxItems")):
            tests.append(self._array_pred(node))

        if any(k in node for k in ("required", "properties", "additionalProperties",
                                   "propertyNames")):
            tests.append(self._object_pred(node))

        if "minProperties" in node or "maxProperties" in node:
            fewest = int(node.get("minProperties", 0))
            most = node.get("maxProperties", math.inf)
            tests.append(lambda x: not isinstance(x, dict) or fewest <= len(x) <= most)

        if "oneOf" in node:
            branches = [self.predicate(b) for b in node["oneOf"]]
            if len(branches) == 2:
                first, second = branches
                tests.append(lambda x: first(x) != second(x))  # exactly one of two
            else:
                tests.append(lambda x: sum(1 for b in branches if b(x)) == 1)

        if "not" in node:
            inner = self.predicate(node["not"])
            tests.append(lambda x: not inner(x))

        return _conjunction(tests)

    def _array_pred(self, node: dict[str, Any], must_be_list: bool = False) -> Pred:
        prefix = [self.predicate(s) for s in node.get("prefixItems", [])]
        rest = self.predicate(node["items"]) if "items" in node else None
        lo = int(node.get("minItems", 0))
        hi = node.get("maxItems")
        top = math.inf if hi is None else hi
        k = len(prefix)

        def array_ok(x: Any) -> bool:
            if not isinstance(x, list):
                return not must_be_list
            if not lo <= len(x) <= top:
                return False
            for test, item in zip(prefix, x, strict=False):  # prefix may be longer
                if not test(item):
                    return False
            if rest is not None:
                for item in (x[k:] if k else x):
                    if not rest(item):
                        return False
            return True
        return array_ok

    def _object_pred(self, node: dict[str, Any], must_be_dict: bool = False) -> Pred:
        required = frozenset(node.get("required", []))
        props = {k: self.predicate(v) for k, v in node.get("properties", {}).items()}
        extra = node.get("additionalProperties", True)
        extra_test = None if extra is True or extra is False else self.predicate(extra)
        names = self.predicate(node["propertyNames"]) if "propertyNames" in node else None
        closed = extra is False and names is None

        def closed_object_ok(x: Any) -> bool:
            if not isinstance(x, dict):
                return not must_be_dict
            if not required <= x.keys():
                return False
            get = props.get
            for k, value in x.items():
                test = get(k)
                if test is None or not test(value):
                    return False
            return True

        def object_ok(x: Any) -> bool:
            if not isinstance(x, dict):
                return not must_be_dict
            if not required <= x.keys():
                return False
            for k, value in x.items():
                if names is not None and not names(k):
                    return False
                test = props.get(k)
                if test is not None:
                    if not test(value):
                        return False
                elif extra is False or (extra_test is not None and not extra_test(value)):
                    return False
            return True
        return closed_object_ok if closed else object_ok


def _describe(x: Any) -> str:
    if isinstance(x, bytes):
        return f"bytes[{len(x)}]"
    if isinstance(x, str):
        return repr(x[:40])
    if isinstance(x, list | dict):
        return type(x).__name__
    return repr(x)


class Validator:
    """Validates decoded messages against the schemas in ``folder`` (default: the package's
    ``schemas/``). One instance compiles every schema once; :func:`default_validator` shares
    one per process."""

    def __init__(self, folder: Path | None = None) -> None:
        folder = folder or schemas_dir()
        self.schemas: dict[str, dict[str, Any]] = {}
        self.versions: dict[str, int] = {}
        """The version this build writes, per message type (the highest it reads)."""
        self.accepted_versions: dict[str, frozenset[int]] = {}
        self._checks: dict[str, Check] = {}
        self._strict: dict[str, Check] = {}
        self._ok: dict[str, Pred] = {}
        self._strict_ok: dict[str, Pred] = {}
        files = sorted(folder.glob("*.schema.json"))
        if not files:
            raise SchemaLoadError(f"no *.schema.json files in {folder}")
        for f in files:
            kind = f.name.removesuffix(".schema.json")
            try:
                schema = json.loads(f.read_text(encoding="utf-8"))
            except json.JSONDecodeError as exc:
                raise SchemaLoadError(f"{f}: not valid JSON: {exc}") from None
            vspec = schema.get("properties", {}).get("v", {})
            # One version (const), or several this build still reads (enum; it writes the
            # highest): an older device's messages stay valid after a schema gains fields.
            accepted = [vspec["const"]] if "const" in vspec else list(vspec.get("enum", []))
            t = schema.get("properties", {}).get("type", {}).get("const")
            if (not accepted or not all(isinstance(v, int) and not isinstance(v, bool)
                                        for v in accepted) or t != kind):
                raise SchemaLoadError(
                    f"{f}: needs properties.v.const or .enum (ints) and type.const {kind!r}")
            self.schemas[kind] = schema
            self.versions[kind] = max(accepted)
            self.accepted_versions[kind] = frozenset(accepted)
            self._checks[kind] = _Compiler(schema, f.name, strict_int=False).compile(schema)
            self._strict[kind] = _Compiler(schema, f.name, strict_int=True).compile(schema)
            self._ok[kind] = _Compiler(schema, f.name, strict_int=False).predicate(schema)
            self._strict_ok[kind] = _Compiler(schema, f.name, strict_int=True).predicate(schema)

    @property
    def kinds(self) -> tuple[str, ...]:
        return tuple(self.schemas)

    def validate(self, msg: Any, *, semantic: bool = True) -> str:
        """Check ``msg``; return its ``type``. Raises :class:`WireError` with the reason.

        ``semantic=False`` applies only what the JSON Schema says (plus the finiteness and
        bytes rules above), for comparison with a general validator. With ``semantic`` (the
        default) integer fields must also be integers on the wire (JSON Schema lets 5.0
        pass as an integer).
        """
        if not isinstance(msg, dict):
            raise WireError(f"$: a message is a map, got {_describe(msg)}", "schema")
        kind = msg.get("type")
        if not isinstance(kind, str) or kind not in self._checks:
            raise WireError(f"$.type: unknown message type {_describe(kind)}", "unknown_type")
        v = msg.get("v")
        if "v" not in msg:
            raise WireError("$: missing required property 'v'", "schema")
        if isinstance(v, bool) or not isinstance(v, int) or v not in self.accepted_versions[kind]:
            reads = ", ".join(map(str, sorted(self.accepted_versions[kind])))
            raise WireError(f"$.v: unsupported schema version {_describe(v)} for {kind} "
                            f"(this build reads v={reads})", "unknown_version")
        try:
            ok = (self._strict_ok if semantic else self._ok)[kind](msg)
            if not ok:
                # Rejected: run the full check for the path and reason of the first problem.
                (self._strict if semantic else self._checks)[kind](msg, "$")
        except RecursionError:
            raise WireError("$: nested too deeply to validate", "schema") from None
        if not ok:  # the fast test and the full check disagree: still a rejection
            raise WireError(f"$: does not match the {kind} schema", "schema")
        if semantic:
            _SEMANTIC.get(kind, _no_semantic)(msg, self.schemas[kind])
        return kind


@lru_cache(maxsize=1)
def default_validator() -> Validator:
    return Validator()


def validate(msg: Any, *, semantic: bool = True) -> str:
    """Validate with the package schemas; return the message type or raise WireError."""
    return default_validator().validate(msg, semantic=semantic)


# --- semantic checks --------------------------------------------------------------------

def _packed_check(packed: list[Any], n: int, prop: dict[str, Any], path: str) -> None:
    try:
        units, missing = unpack_units(packed, n)
    except WireError as exc:
        raise WireError(f"{path}: {exc.reason}", exc.code) from None
    exp = int(packed[0])
    if "x-exp" in prop and exp != prop["x-exp"]:
        raise WireError(f"{path}: exp must be {prop['x-exp']}, got {exp}", "array")
    if "x-range" in prop:
        lo, hi = prop["x-range"]
        present = units[~missing]
        if present.size:
            scale = 10.0 ** exp
            vmin, vmax = float(present.min()) * scale, float(present.max()) * scale
            # Half a unit of slack: the bounds are physical, the stream is quantised.
            if vmin < lo - scale / 2 or vmax > hi + scale / 2:
                raise WireError(f"{path}: values {vmin:g}..{vmax:g} outside {lo}..{hi} "
                                f"{prop.get('x-unit', '')}".rstrip(), "array")


_PER_CHANNEL = ("rms_min", "rms_mean", "rms_max", "thd")
_SINGLE = ("hz", "imbalance", "flags")
_FIELDS = _PER_CHANNEL + _SINGLE
_PER_CHANNEL_SET = frozenset(_PER_CHANNEL)


def _semantic_summary_slow(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    """Array by array, in field order: names the first bad array (the error path)."""
    n = int(msg["n"])
    nch = len(msg["channels"])
    props = schema["properties"]
    for name in _PER_CHANNEL:
        arrays = msg[name]
        if len(arrays) != nch:
            raise WireError(f"$.{name}: {len(arrays)} entries for {nch} channels", "semantic")
        for i, packed in enumerate(arrays):
            if packed is not None:
                _packed_check(packed, n, props[name], f"$.{name}[{i}]")
    for name in _SINGLE:
        if msg[name] is not None:
            _packed_check(msg[name], n, props[name], f"$.{name}")


# Per (field schema, exp): (scale, lowest, highest) accepted value [field unit]. Bounded by
# the schema: a handful of fields times 10 exponents.
_LIMITS: dict[tuple[int, int], tuple[dict[str, Any], float, float, float]] = {}


def _limits(prop: dict[str, Any], exp: int) -> tuple[float, float, float]:
    key = (id(prop), exp)
    hit = _LIMITS.get(key)
    if hit is not None and hit[0] is prop:
        return hit[1], hit[2], hit[3]
    scale = 10.0 ** exp
    lo, hi = prop.get("x-range", (-math.inf, math.inf))
    # The same half unit of slack as _packed_check.
    entry = (prop, scale, lo - scale / 2, hi + scale / 2)
    if len(_LIMITS) > 1024:
        _LIMITS.clear()
    _LIMITS[key] = entry
    return entry[1], entry[2], entry[3]


def _semantic_summary_fast(msg: dict[str, Any], schema: dict[str, Any], *,
                           shortcut: bool = True) -> None:
    """All packed arrays of a summary at once: sizes, padding, int32, x-exp and x-range;
    raises WireError on the first problem found (not necessarily the first in field order).

    Each header gets a few scalar checks. Values need no decoding when their bound proves
    them in range: ``first`` plus or minus :func:`value_span` (a delta of ``width`` bits is
    at most 2^(width-1) units) inside int32 and the field's x-range. Otherwise (or with
    ``shortcut=False``) one numpy pass decodes every array and checks every value.
    """
    n = msg["n"]
    nch = len(msg["channels"])
    props = schema["properties"]
    arrays: list[list[Any]] = []
    bounds: list[tuple[float, float, float]] = []  # (scale, lowest, highest) per array
    proven = shortcut
    for name in _FIELDS:
        value = msg[name]
        prop = props[name]
        if name in _PER_CHANNEL_SET:
            if len(value) != nch:
                raise WireError(f"$.{name}: {len(value)} entries for {nch} channels",
                                "semantic")
            group = value
        else:
            group = (value,)
        for packed in group:
            if packed is None:
                continue
            exp = packed[0]
            want = prop.get("x-exp")
            if want is not None and exp != want:
                raise WireError(f"exp must be {want}, got {exp}", "array")
            first, width = check_header(packed, n)
            limits = _limits(prop, exp)
            if proven:
                span = value_span(n, width)
                lo, hi = first - span, first + span
                # Float rounding is monotonic, so the bound's products bound every value's.
                proven = (lo >= INT32_MIN and hi <= INT32_MAX and lo * limits[0] >= limits[1]
                          and hi * limits[0] <= limits[2])
            arrays.append(packed)
            bounds.append(limits)
    if proven or not arrays:
        return
    units, missing = unpack_units_many(arrays, n)
    table = np.array(bounds).T[:, :, None]
    values = units * table[0]
    outside = (values < table[1]) | (values > table[2])
    if outside.any() and (outside & ~missing).any():
        raise WireError("values outside the field's x-range", "array")


def _semantic_summary(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    try:
        _semantic_summary_fast(msg, schema)
    except WireError as fast:
        _semantic_summary_slow(msg, schema)  # raises, naming the array and the problem
        raise fast from None  # (the two always agree; never accept on a disagreement)


def _close(a: float, b: float) -> bool:
    return abs(a - b) <= 1e-6 + 1e-9 * max(abs(a), abs(b))


def _semantic_event(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    start, end, dur = msg["start_utc"], msg["end_utc"], msg["duration_s"]
    if msg["change"] == "ended" and end is None:
        raise WireError("$.end_utc: an 'ended' event needs end_utc", "semantic")
    if end is not None:
        if end < start:
            raise WireError(f"$.end_utc: {end} is before start_utc {start}", "semantic")
        if dur is None or not _close(dur, end - start):
            raise WireError(f"$.duration_s: {dur} is not end_utc - start_utc", "semantic")
    elif dur is not None:
        raise WireError("$.duration_s: set while end_utc is null", "semantic")
    if not math.isclose(msg["level_pu"], msg["level_v"] / msg["nominal_v"], rel_tol=1e-9,
                        abs_tol=1e-12):
        raise WireError("$.level_pu: is not level_v / nominal_v", "semantic")
    names = msg.get("channel_names")
    if names is not None and len(names) != len(msg["channels"]):
        raise WireError("$.channel_names: length differs from channels", "semantic")
    if msg["v"] >= 2 and "dip_duration_s" not in msg:  # v2 always sends it (null if unknown)
        raise WireError("$.dip_duration_s: required from event v2 on", "semantic")


def _semantic_aggregate(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    nch = len(msg["channels"])
    for name in ("rms", "thd"):
        if len(msg[name]) not in (0, nch):
            raise WireError(f"$.{name}: {len(msg[name])} entries for {nch} channels", "semantic")


def _semantic_capture(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    meta = msg["meta"]
    if msg["index"] >= msg["total"]:
        raise WireError(f"$.index: {msg['index']} is not below total {msg['total']}", "semantic")
    nch = len(meta["channels"])
    if len(meta["scale"]) != nch:
        raise WireError("$.meta.scale: one scale per channel required", "semantic")
    if msg["size"] != meta["samples"] * nch * 2:
        raise WireError("$.size: is not samples x channels x 2 bytes", "semantic")
    if len(msg["data"]) > msg["size"]:
        raise WireError("$.data: chunk longer than the whole payload", "semantic")
    first, trig = meta["first_index"], meta["trigger_index"]
    if not first <= trig <= first + meta["samples"]:
        raise WireError("$.meta.trigger_index: outside the captured samples", "semantic")


def _semantic_gap(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    if msg["last_seq"] < msg["first_seq"]:
        raise WireError("$.last_seq: before first_seq", "semantic")
    if msg["count"] > msg["last_seq"] - msg["first_seq"] + 1:
        raise WireError("$.count: more than the range holds", "semantic")


def _no_semantic(msg: dict[str, Any], schema: dict[str, Any]) -> None:
    return None


_SEMANTIC: dict[str, Callable[[dict[str, Any], dict[str, Any]], None]] = {
    "summary": _semantic_summary,
    "event": _semantic_event,
    "aggregate": _semantic_aggregate,
    "capture": _semantic_capture,
    "gap": _semantic_gap,
    "status": _no_semantic,
    "ack": _no_semantic,
}

__all__ = ["SchemaLoadError", "Validator", "WireError", "default_validator", "validate"]
