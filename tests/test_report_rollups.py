"""The fleet report read from 10-min rollups gives the answers it gives from every second.

Three invented homes (made up here, not measurements): a split-phase 120 V / 60 Hz home with
a rooftop-solar midday rise, a short high swell, Urms(1/2) peaks, a gap and a frequency
excursion, started at an odd second; a 230 V / 50 Hz three-phase home whose nominal is
inferred, with imbalance values and a sag; a home whose edge sends no 10-min aggregates.
Their messages go through the wire encoder and decoder and ``RecorderStore.commit_batch``.

Checks, on SQLite and PostgreSQL:

* the report from rollups equals the report from every second (``every_second=True``), for
  the whole store and for a period whose ends cut 10-min intervals, while reading a small
  share of the seconds;
* the same report however the messages were batched at commit, and after the schema
  migration that adds the unit rollups to an existing store (no row lost);
* figures against plain numpy over the generated seconds (common practice), with the limits
  named: ANSI C84.1 Range A service 114-126 V, IEEE 1547-2018 category II OV1 1.10 pu / 2 s,
  EN 50160 frequency +-1 % on 10-s means (tests/SOURCES.md).
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from _store_helpers import pg_database, schema_url, store_url

from agent.measurement.types import Aggregate
from agent.report.fleet import fleet_report
from agent.store.recorder import Item, RecorderStore
from agent.wire import codec
from agent.wire.records import FLAG_EVENT, SummaryBatcher

__all__ = ["pg_database", "store_url"]

SITE = "invented-row"
DAY = 86400.0
T0 = 1_779_840_000.0 - 3 * DAY  # a UTC midnight (a multiple of 86400)
HOURS = 30
NOW = T0 + 2 * DAY


def solar_home() -> dict[str, Any]:
    """Invented split-phase home: starts 5 s past the hour, a 3-h midday rise to 126.5 V on
    L2 (one second back inside at 12:30), a 5-s swell to 1.12 pu, half-cycle peaks above
    1.10 pu while the means stay inside, 37 s unmeasured, a 10-s frequency excursion to
    60.8 Hz, flagged seconds."""
    rng = np.random.default_rng(11)
    t = T0 + 5.0 + np.arange(HOURS * 3600 - 5, dtype=float)
    n = t.size
    mean = 120.0 + rng.normal(0.0, 0.8, (n, 2))
    hour = (t - T0) / 3600.0 % 24
    mean[(hour >= 11) & (hour < 14), 1] = 126.5 + rng.normal(0.0, 0.1, int(np.count_nonzero(
        (hour >= 11) & (hour < 14))))
    mean[45_000 - 5, 1] = 125.0  # one second back inside Range A at 12:30 splits the rise
    mean[10_000:10_005, 0] = 134.4  # 1.12 pu for 5 s
    peak = mean + 0.6
    peak[50_000:50_003, 1] = 133.5  # Urms(1/2) above 1.10 pu, means inside
    low = mean - 0.6
    hz = 60.0 + rng.normal(0.0, 0.01, n)
    hz[60_000:60_010] = 60.8  # outside EN 50160 +-1 % for one 10-s mean
    flags = np.zeros(n)
    flags[10_000:10_008] = FLAG_EVENT
    keep = np.ones(n, bool)
    keep[70_003:70_040] = False  # 37 s not measured
    return {"device": "solar-1", "channels": ["L1", "L2"], "t": t[keep], "mean": mean[keep],
            "peak": peak[keep], "low": low[keep], "hz": hz[keep],
            "imbalance": np.full(int(keep.sum()), np.nan), "flags": flags[keep],
            "model": {"nominal_v": 120.0, "nominal_hz": 60.0, "service_type": "120/240",
                      "measurement_point": "service"}, "aggregates": True}


def three_phase_home() -> dict[str, Any]:
    """Invented 230 V / 50 Hz three-phase home, nominal not declared, with imbalance values
    and a 90-s sag to 0.85 pu on L3."""
    rng = np.random.default_rng(12)
    t = T0 + np.arange(HOURS * 3600, dtype=float)
    n = t.size
    mean = 231.0 + rng.normal(0.0, 1.5, (n, 3))
    mean[20_000:20_090, 2] = 0.85 * 230.0
    imbalance = np.abs(0.006 + rng.normal(0.0, 0.001, n))
    return {"device": "three-1", "channels": ["L1", "L2", "L3"], "t": t, "mean": mean,
            "peak": mean + 1.0, "low": mean - 1.0, "hz": 50.0 + rng.normal(0.0, 0.01, n),
            "imbalance": imbalance, "flags": np.zeros(n), "model": {},
            "aggregates": True}


def old_edge_home() -> dict[str, Any]:
    """Invented 120 V home whose edge sends per-second summaries but no 10-min aggregates."""
    rng = np.random.default_rng(13)
    t = T0 + np.arange(HOURS * 3600, dtype=float)
    n = t.size
    mean = 121.0 + rng.normal(0.0, 1.0, (n, 1))
    mean[30_000:30_200, 0] = 112.0  # below Range A for 200 s
    return {"device": "old-1", "channels": ["L1"], "t": t, "mean": mean, "peak": mean + 0.5,
            "low": mean - 0.5, "hz": 60.0 + rng.normal(0.0, 0.01, n),
            "imbalance": np.full(n, np.nan), "flags": np.zeros(n),
            "model": {"nominal_v": 120.0, "nominal_hz": 60.0}, "aggregates": False}


def messages(home: dict[str, Any]) -> list[dict[str, Any]]:
    """The home's wire messages, encoded and decoded: summaries of 60 s and, where its edge
    sends them, complete 10-min aggregates (RMS of the per-second means, mean frequency)."""
    ident = codec.Identity(SITE, home["device"], "e1")
    out: list[dict[str, Any]] = []

    def add(body: dict[str, Any]) -> None:
        out.append(codec.decode(codec.encode(ident.stamp(body, len(out) + 1))))

    batcher = SummaryBatcher(home["channels"], k=60)
    t, mean = home["t"], home["mean"]
    bodies = batcher.add_many(t, home["low"], mean, home["peak"], home["hz"],
                              np.full(mean.shape, 0.02), home["imbalance"], home["flags"])
    last = batcher.flush()
    for body in [*bodies, *([last] if last else [])]:
        add(body)
    if home["aggregates"]:
        slot = np.floor(t / 600.0)
        for s in np.unique(slot):
            sel = slot == s
            if sel.sum() < 600:
                continue
            rms = tuple(float(x) for x in np.sqrt(np.mean(mean[sel] ** 2, axis=0)))
            add(codec.aggregate_body(Aggregate(
                kind="10min", t_utc=float(s * 600.0), duration_s=600.0, rms=rms,
                thd=(0.02,) * len(rms), hz=float(np.mean(home["hz"][sel])),
                flagged=bool((home["flags"][sel] != 0).any()), count=3000),
                home["channels"]))
    return out


HOMES = (solar_home, three_phase_home, old_edge_home)


def fill(url: str, captures: Path, batch: int) -> None:
    with RecorderStore(url, captures) as store:
        for make in HOMES:
            home = make()
            msgs = messages(home)
            for a in range(0, len(msgs), batch):
                store.commit_batch([Item(message=m, received_at=NOW - 60.0)
                                    for m in msgs[a:a + batch]])
            if home["model"]:
                store.update_device_model(home["device"], SITE, home["model"])


def report(url: str, captures: Path, **kw: Any) -> dict[str, Any]:
    with RecorderStore(url, captures, migrate=False) as store:
        got = fleet_report(store, now=NOW, **kw)
    return json.loads(json.dumps(got))  # the JSON a renderer gets


def without_read_counts(rep: dict[str, Any]) -> dict[str, Any]:
    for section in rep["devices"]:
        section.pop("trend_seconds_read")
    return rep


def section(rep: dict[str, Any], device: str) -> dict[str, Any]:
    return next(s for s in rep["devices"] if s["device"] == device)


def test_rollups_give_the_every_second_answers(store_url: str, tmp_path: Path) -> None:
    captures = tmp_path / "captures"
    fill(store_url, captures, batch=200)
    fast = report(store_url, captures)
    full = report(store_url, captures, every_second=True)
    read = sum(s["trend_seconds_read"] for s in fast["devices"]
               if s["device"] != "old-1")
    total = sum(s["trend_seconds"] for s in fast["devices"] if s["device"] != "old-1")
    # The rollups point to the few intervals with something to count (common practice:
    # the point of rolling up); the home without aggregates is read whole.
    assert 0 < read < 0.25 * total
    # The midday rise's whole intervals beyond Range A are not read second by second (they
    # cannot end a run): only its first and last, and the one it dips back inside in.
    assert section(fast, "solar-1")["trend_seconds_read"] < 3 * 3600
    assert section(fast, "old-1")["trend_seconds_read"] == section(fast, "old-1")["trend_seconds"]
    assert without_read_counts(fast) == without_read_counts(full)

    # A period whose ends cut 10-min intervals (and a summary): the same again.
    period = {"start_utc": T0 + 3 * 3600 + 17, "end_utc": T0 + 26 * 3600 + 5}
    fast_p = report(store_url, captures, **period)
    full_p = report(store_url, captures, every_second=True, **period)
    assert without_read_counts(fast_p) == without_read_counts(full_p)
    assert section(fast_p, "solar-1")["trend_seconds"] < section(fast, "solar-1")["trend_seconds"]

    # The answers against plain numpy over the generated seconds.
    solar = solar_home()
    s = section(fast, "solar-1")
    assert s["trend_seconds"] == solar["t"].size
    assert s["overvoltage"]["seconds_above"] == int(
        np.count_nonzero(solar["mean"].max(axis=1) > 1.10 * 120.0))
    assert s["overvoltage"]["seconds_peak_above"] == int(
        np.count_nonzero(solar["peak"].max(axis=1) > 1.10 * 120.0))
    assert s["overvoltage"]["flagged_seconds"] == int(np.count_nonzero(solar["flags"]))
    assert s["overvoltage"]["max_v"] == pytest.approx(float(np.max(solar["peak"])))
    # IEEE 1547-2018 category II OV1: 1.10 pu for 2 s (pub): the 5-s swell trips.
    ov1 = [e for e in s["inverter"]["sustained"] if e["setting"] == "OV1"]
    assert [e["duration_s"] for e in ov1] == [5.0]
    # ANSI C84.1 Range A service 114-126 V (pub), Range B 110-127 V (from memory): the 3-h
    # midday rise is one excursion outside A, inside B (the 5-s swell, hours before, is too short).
    runs = s["compliance"]["excursions"]["longer_than_600s"]
    assert [(r["side"], r["duration_s"]) for r in runs] == [("high", 5400.0), ("high", 5399.0)]
    first = (solar["t"] >= T0 + 11 * 3600) & (solar["t"] < T0 + 12.5 * 3600)
    # (values travel in 0.01-V units: agent.wire.records.DEFAULT_EXPONENTS)
    assert runs[0]["extreme_v"] == pytest.approx(float(solar["mean"][first, 1].max()), abs=0.006)
    assert s["compliance"]["verdict"] == "range_b"
    # EN 50160 frequency: 10-s means within +-1 % (pub); numpy's own 10-s means.
    slot = np.floor(solar["t"] / 10.0)
    _, inv = np.unique(slot, return_inverse=True)
    cnt = np.bincount(inv)
    f10 = (np.bincount(inv, weights=solar["hz"]) / cnt)[cnt >= 9]
    freq = s["supply"]["frequency"]
    assert freq["basis"]["count"] == f10.size
    assert freq["outside_4_6pct"] == 0
    assert freq["fraction_within_1pct"] == round(
        float(np.mean((f10 >= 59.4) & (f10 <= 60.6))), 6)
    assert freq["max_hz"] == round(float(f10.max()), 4)
    # Three-phase imbalance (IEC 61000-4-30 10-min RMS aggregation, from memory): numpy.
    three = three_phase_home()
    u2 = section(fast, "three-1")["supply"]["unbalance"]
    slot = np.floor(three["t"] / 600.0)
    means = [math.sqrt(float(np.mean(three["imbalance"][slot == x] ** 2)))
             for x in np.unique(slot)]
    assert u2["basis"]["count"] == len(means)
    assert section(fast, "three-1")["nominal_source"] == "inferred"
    assert section(fast, "three-1")["nominal_v"] == 230.0


def test_same_report_however_batched_and_after_migration(store_url: str, tmp_path: Path,
                                                        request: pytest.FixtureRequest) -> None:
    captures = tmp_path / "captures"
    fill(store_url, captures, batch=500)
    once = report(store_url, captures)
    if store_url.startswith("sqlite"):
        other = f"sqlite:///{tmp_path / 'batched.db'}"
    else:
        other = schema_url(request.getfixturevalue("pg_database"))
    fill(other, captures, batch=7)
    assert report(other, captures) == once

    # A store from before the unit rollups (schema 5): the migration adds and fills them
    # from the stored seconds and loses no row.
    with RecorderStore(store_url, captures) as store:
        counts = {t: store.count(t) for t in ("trend", "trend_rollup", "aggregates", "events",
                                              "received", "devices")}
        store.db.run_in_transaction(lambda db: (db.execute("DROP TABLE trend_unit"),
                                                db.execute("DELETE FROM schema_version"
                                                           " WHERE version >= 6")))
    with RecorderStore(store_url, captures) as store:
        assert store.db.schema_version() == RecorderStore.latest_schema_version()
        assert {t: store.count(t) for t in counts} == counts
        assert store.count("trend_unit") > 0
    assert report(store_url, captures) == once


def test_long_summaries_reaching_into_several_intervals(tmp_path: Path) -> None:
    """Summaries of 1800 s (the edge allows up to 3600) each span three 10-min intervals:
    two swells 20 min apart inside one summary are read once each, not twice."""
    rng = np.random.default_rng(14)
    t = T0 + np.arange(6 * 3600, dtype=float)
    mean = 120.0 + rng.normal(0.0, 0.5, (t.size, 1))
    mean[30:40, 0] = 133.0  # 1.108 pu, 10 s, in the first 10-min interval of a summary
    mean[1500:1504, 0] = 133.0  # and in its third: two ranges, one stored row
    home = {"device": "long-1", "channels": ["L1"], "t": t, "mean": mean, "peak": mean + 0.3,
            "low": mean - 0.3, "hz": np.full(t.size, 60.0), "imbalance": np.full(t.size, np.nan),
            "flags": np.zeros(t.size), "aggregates": True}
    ident = codec.Identity(SITE, "long-1", "e1")
    batcher = SummaryBatcher(["L1"], k=1800)
    bodies = batcher.add_many(t, home["low"], mean, home["peak"], home["hz"],
                              np.full(mean.shape, 0.02), home["imbalance"], home["flags"])
    last = batcher.flush()
    msgs = [codec.decode(codec.encode(ident.stamp(b, i + 1)))
            for i, b in enumerate([*bodies, *([last] if last else [])])]
    msgs += [m for m in messages(home) if m["type"] == "aggregate"]
    for i, m in enumerate(msgs):
        m["seq"] = i + 1
    url = f"sqlite:///{tmp_path / 'long.db'}"
    with RecorderStore(url, tmp_path / "captures") as store:
        store.commit_batch([Item(message=m, received_at=NOW - 60.0) for m in msgs])
        store.update_device_model("long-1", SITE, {"nominal_v": 120.0, "nominal_hz": 60.0})
    fast = report(url, tmp_path / "captures")
    full = report(url, tmp_path / "captures", every_second=True)
    read = section(fast, "long-1")["trend_seconds_read"]
    assert 0 < read <= 2 * 600  # the two intervals, each read once
    assert without_read_counts(fast) == without_read_counts(full)
    s = section(fast, "long-1")
    # IEEE 1547-2018 category II OV1 1.10 pu / 2 s (pub): both swells, 10 s and 4 s.
    assert [e["duration_s"] for e in s["inverter"]["sustained"]] == [10.0, 4.0]
    assert s["overvoltage"]["seconds_above"] == 14
