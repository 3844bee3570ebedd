"""The recorder store and the exporter carry the edge's newer message fields (event v2: rapid
voltage changes; aggregate v2: individual harmonics, flicker) on a real SQLite file and a
fresh PostgreSQL schema."""

from __future__ import annotations

from pathlib import Path

import pytest
from _store_helpers import pg_database, store, store_url  # noqa: F401  (fixtures by name)

from agent.acquisition.timebase import ReplayTimebase
from agent.events.classify import classify_event
from agent.events.rvc import RvcDetector, RvcSettings
from agent.events.types import Thresholds
from agent.measurement.types import HalfCycleRms
from agent.store.recorder import RecorderStore
from agent.wire.codec import event_body
from agent.wire.validate import validate


def _rvc_messages() -> list[dict[str, object]]:
    import numpy as np

    u = np.full((600, 1), 120.0)
    u[300:] = 124.8                       # invented 4 % step (PV ramp)
    start = np.arange(600) * 64.0
    det = RvcDetector(120.0, 60.0, 1, Thresholds(), RvcSettings(), ReplayTimebase(7680.0,
                      1_700_000_000.0), id_factory=lambda: "rvc-1")
    ups = det.update(HalfCycleRms(start, start + 128.0, u, np.zeros(600, bool)))
    assert len(ups) == 2
    classify_event(ups[1].event, 60.0)
    out = []
    for seq, up in enumerate(ups, 1):
        body = event_body(up.event, up.change) | {"device": "dev-1", "site": "site-1",
                                                    "epoch": "e1", "seq": seq}
        validate(body)
        out.append(body)
    return out


def test_rvc_event_is_stored_and_listed(store: RecorderStore) -> None:  # noqa: F811
    store.commit_batch(_rvc_messages())
    evs = store.events("dev-1")
    assert [e["kind"] for e in evs] == ["rvc"] and evs[0]["state"] == "closed"
    p = evs[0]["payload"]
    assert p["v"] == 2 and p["delta_uss_v"] == pytest.approx(4.8)
    assert evs[0]["classification"]["rvc"]["delta_uss_pu"] == pytest.approx(0.04)


def test_v1_event_from_an_older_device_is_still_stored(store: RecorderStore,  # noqa: F811
                                                      tmp_path: Path) -> None:
    body = _rvc_messages()[1] | {"v": 1, "kind": "dip", "event_id": "old-1"}
    for k in ("delta_umax_v", "delta_uss_v", "rvc_threshold", "rvc_hysteresis"):
        body.pop(k)
    validate(body)
    store.commit_batch([body])
    assert [e["kind"] for e in store.events("dev-1")] == ["dip"]


def test_rvc_event_exports_with_its_deltas() -> None:
    from agent.store.export import event_points

    pts = event_points(_rvc_messages()[1], "s")
    assert len(pts) == 1 and pts[0].measurement == "hc_event"
    tags, fields = dict(pts[0].tags), dict(pts[0].fields)
    assert tags["kind"] == "rvc"
    assert fields["delta_uss_v"] == pytest.approx(4.8)
    assert fields["delta_umax_v"] == pytest.approx(4.8)


def _aggregate_message() -> dict[str, object]:
    import math

    from agent.measurement.types import Aggregate
    from agent.wire.codec import aggregate_body

    h = [0.0] * 39
    h[1], h[3] = 0.0412, 0.0305                  # h3, h5 (invented)
    agg = Aggregate(kind="10min", t_utc=1_700_000_400.0, duration_s=600.0, rms=(120.1, 119.7),
                    thd=(0.052, 0.051), count=3000,
                    harmonics=(tuple(h), tuple([math.nan] * 39)), pst=(0.42, 0.39),
                    plt=(0.40, 0.38), flicker_flagged=False, lamp="120V")
    body = aggregate_body(agg, ["L1", "L2"]) | {"device": "dev-1", "site": "site-1",
                                                 "epoch": "e1", "seq": 7}
    validate(body)
    # Independent check: the general jsonschema validator agrees on the v2 schema.
    import json

    import jsonschema

    from agent.wire.validate import schemas_dir
    schema = json.loads((schemas_dir() / "aggregate.schema.json").read_text())
    jsonschema.Draft202012Validator(schema).validate(body)
    return body


def test_ten_minute_harmonics_are_stored_compact_and_exported() -> None:
    from agent.store.export import aggregate_points
    from agent.wire.codec import aggregate_from_message, decode, encode

    body = _aggregate_message()
    raw = encode(body)
    back = aggregate_from_message(decode(raw))
    assert back.harmonics[0][1] == pytest.approx(0.0412) and back.harmonics[1] == ()
    # Compact: 39 orders of one channel cost well under 2 bytes each on the wire.
    assert len(encode(body)) - len(encode({k: v for k, v in body.items() if k != "harmonics"})
                                    ) < 2 * 39 + 30
    pts = {dict(p.tags)["channel"]: dict(p.fields) for p in aggregate_points(body, "s")}
    assert pts["L1"]["h3"] == pytest.approx(0.0412) and pts["L1"]["h5"] == pytest.approx(0.0305)
    assert "h3" not in pts["L2"]
    assert pts["L1"]["pst"] == pytest.approx(0.42) and pts["L2"]["plt"] == pytest.approx(0.38)
    assert pts["L1"]["flicker_flagged"] == 0
    assert back.pst == (0.42, 0.39) and back.plt == (0.40, 0.38) and back.lamp == ""


def test_ten_minute_harmonics_reach_the_store(store: RecorderStore) -> None:  # noqa: F811
    store.commit_batch([_aggregate_message()])
    (row,) = store.aggregates("dev-1")
    assert row["payload"]["harmonics"]["values"][0][1] == 412
    assert row["payload"]["flicker"]["pst"] == [0.42, 0.39]
