"""The OpenAPI 3.1 description of the live page's JSON twins (hand-written: the schemas are
the contract scripts rely on; the tests validate every twin against them)."""

from __future__ import annotations

from typing import Any

_NUM_OR_NULL = {"type": ["number", "null"]}
_STR_OR_NULL = {"type": ["string", "null"]}

_VERDICT = {
    "type": "object",
    "description": "agent.verdicts.Verdict.as_dict(): rule, verdict, passed, confidence, basis, "
                   "notes, plus the verdict's own details.",
    "required": ["rule", "verdict", "passed", "confidence", "basis", "notes"],
    "properties": {
        "rule": {"type": "string"}, "verdict": {"type": "string"},
        "passed": {"type": ["boolean", "null"]},
        "confidence": {"enum": ["pub", "mem", "cp"]},
        "basis": {"type": "object"}, "notes": {"type": "array", "items": {"type": "string"}},
    },
}
_STATE = {"enum": ["lost_power", "supply_out", "offline", "out_of_range", "stopped", "ok",
                   "unknown"]}
_UNIT_NOW = {
    "allOf": [{"$ref": "#/components/schemas/Verdict"}],
    "type": "object",
    "required": ["device", "site", "states", "last_seen_utc", "outbox_backlog", "verdict"],
    "properties": {
        "verdict": _STATE, "device": {"type": "string"}, "site": {"type": "string"},
        "states": {"type": "array", "items": {
            "type": "object", "required": ["state", "since", "reason"],
            "properties": {"state": _STATE, "since": _NUM_OR_NULL,
                           "reason": {"type": "string"}}}},
        "last_seen_utc": _NUM_OR_NULL, "silent_s": _NUM_OR_NULL,
        "outbox_backlog": {"type": ["integer", "null"]},
        "last_ten_min": {"type": ["object", "null"]},
        "last_event": {"type": ["object", "null"]},
    },
}
_EVENT = {
    "type": "object",
    "required": ["event_id", "device", "site", "kind", "state", "category", "start_utc",
                 "duration_s", "level_v", "level_pu", "captures"],
    "properties": {
        "event_id": {"type": "string"}, "device": {"type": "string"},
        "site": {"type": "string"}, "kind": _STR_OR_NULL,
        "state": {"enum": ["open", "closed"]},
        "category": {"type": "string", "description": "IEEE 1159 category with duration class"},
        "start_utc": _NUM_OR_NULL, "duration_s": _NUM_OR_NULL, "level_v": _NUM_OR_NULL,
        "level_pu": _NUM_OR_NULL, "itic": _STR_OR_NULL, "semi_f47": _STR_OR_NULL,
        "ended_by": _STR_OR_NULL,
        "captures": {"type": "array", "items": {"type": "string"}},
    },
}
_ERROR = {"type": "object", "required": ["error"], "properties": {"error": {"type": "string"}}}

SCHEMAS: dict[str, Any] = {
    "Verdict": _VERDICT,
    "UnitNow": _UNIT_NOW,
    "Event": _EVENT,
    "Error": _ERROR,
    "Fleet": {
        "type": "object", "required": ["generated_utc", "indicative", "time_zone", "units"],
        "properties": {
            "generated_utc": {"type": "number"}, "indicative": {"type": "string"},
            "time_zone": {"type": "string"},
            "units": {"type": "array", "items": {"$ref": "#/components/schemas/UnitNow"}}},
    },
    "Unit": {
        "type": "object",
        "required": ["device", "site", "model", "nominal_v", "nominal_hz", "bands", "period",
                     "indicative", "now", "report", "figures", "events", "captures"],
        "properties": {
            "device": {"type": "string"}, "site": {"type": "string"},
            "model": {"type": "object"}, "nominal_v": _NUM_OR_NULL,
            "nominal_hz": _NUM_OR_NULL, "measurement_point": {"type": "string"},
            "bands": {"type": "array", "items": {
                "type": "object", "required": ["rule", "low_v", "high_v", "confidence"],
                "properties": {"rule": {"type": "string"}, "low_v": {"type": "number"},
                               "high_v": {"type": "number"},
                               "confidence": {"enum": ["pub", "mem", "cp"]}}}},
            "period": {"type": "object", "required": ["start_utc", "end_utc"],
                       "properties": {"start_utc": {"type": "number"},
                                      "end_utc": {"type": "number"}}},
            "indicative": {"type": "string"},
            "now": {"oneOf": [{"$ref": "#/components/schemas/UnitNow"}, {"type": "null"}]},
            "report": {"type": "object",
                       "description": "the unit's section of the fleet report; verdicts inside "
                                      "are Verdict objects"},
            "figures": {"type": "array", "items": {
                "type": "object", "required": ["name", "caption", "url"],
                "properties": {"name": {"type": "string"}, "caption": {"type": "string"},
                               "url": {"type": "string"}}}},
            "events": {"type": "array", "items": {"$ref": "#/components/schemas/Event"}},
            "captures": {"type": "array", "items": {
                "type": "object",
                "required": ["capture_id", "event_id", "figure_url", "comtrade_url"],
                "properties": {k: {"type": "string"} for k in (
                    "capture_id", "event_id", "figure_url", "comtrade_url")}}},
        },
    },
    "Events": {
        "type": "object", "required": ["filters", "choices", "count", "events"],
        "properties": {
            "filters": {"type": "object", "required": ["site", "unit", "category", "since_utc",
                                                       "until_utc"],
                        "properties": {"site": _STR_OR_NULL, "unit": _STR_OR_NULL,
                                       "category": _STR_OR_NULL, "since_utc": _NUM_OR_NULL,
                                       "until_utc": _NUM_OR_NULL}},
            "choices": {"type": "object", "required": ["sites", "units"],
                        "properties": {"sites": {"type": "array", "items": {"type": "string"}},
                                       "units": {"type": "array", "items": {"type": "string"}}}},
            "count": {"type": "integer", "minimum": 0},
            "events": {"type": "array", "items": {"$ref": "#/components/schemas/Event"}},
        },
    },
}


def _json(schema: str) -> dict[str, Any]:
    return {"application/json": {"schema": {"$ref": f"#/components/schemas/{schema}"}}}


def _errors(*codes: int) -> dict[str, Any]:
    words = {400: "bad query", 401: "authentication required", 404: "not found",
             503: "store unavailable"}
    return {str(c): {"description": words[c], "content": _json("Error")} for c in codes}


_TIME = {"type": "string", "description": "UTC seconds or ISO 8601 (UTC unless stated)"}


def openapi_document() -> dict[str, Any]:
    """The OpenAPI 3.1 document served at ``/api/v1/openapi.json``."""
    from agent import __version__

    return {
        "openapi": "3.1.0",
        "info": {"title": "halfcycle live page", "version": __version__,
                 "description": "Read-only JSON twins of the live pages. Verdicts are "
                                "indicative: a home monitor, not a certified instrument."},
        "components": {
            "schemas": SCHEMAS,
            "securitySchemes": {"bearer": {"type": "http", "scheme": "bearer"},
                                "basic": {"type": "http", "scheme": "basic"}},
        },
        "security": [{}, {"bearer": []}, {"basic": []}],
        "paths": {
            "/api/v1/fleet": {"get": {
                "summary": "Every unit's state now (twin of /)", "operationId": "fleet",
                "responses": {"200": {"description": "units, worst first",
                                      "content": _json("Fleet")}, **_errors(401, 503)}}},
            "/api/v1/units/{device}": {"get": {
                "summary": "One unit: state, verdicts, figures, events (twin of /units/{device})",
                "operationId": "unit",
                "parameters": [{"name": "device", "in": "path", "required": True,
                                "schema": {"type": "string"}}],
                "responses": {"200": {"description": "the unit", "content": _json("Unit")},
                              **_errors(401, 404, 503)}}},
            "/api/v1/events": {"get": {
                "summary": "Events, newest first, filtered (twin of /events)",
                "operationId": "events",
                "parameters": [
                    {"name": "site", "in": "query", "schema": {"type": "string"}},
                    {"name": "unit", "in": "query", "schema": {"type": "string"}},
                    {"name": "category", "in": "query", "schema": {"type": "string"},
                     "description": "IEEE 1159 category or event kind (substring)"},
                    {"name": "since", "in": "query", "schema": _TIME},
                    {"name": "until", "in": "query", "schema": _TIME}],
                "responses": {"200": {"description": "matching events",
                                      "content": _json("Events")},
                              **_errors(400, 401, 503)}}},
            "/api/v1/openapi.json": {"get": {
                "summary": "This document", "operationId": "openapi",
                "responses": {"200": {"description": "OpenAPI 3.1",
                                      "content": {"application/json": {}}}}}},
        },
    }
