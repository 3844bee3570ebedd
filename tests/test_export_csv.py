# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""``halfcycle export``: CSV of a real recorder store (SQLite file and PostgreSQL).

Checked against RFC 4180 (section 2: CRLF line ends, a header row, the same number of fields
on every line) with two readers — Python's ``csv`` module and a plain split written here —
and against the values put in: the per-second trend decoded from packed summaries matches the
invented inputs to the wire's 10 mV RMS unit (README "MQTT topics"), row counts match the
store, and bad options give one line and exit status 2.
"""

from __future__ import annotations

import csv
import io
from pathlib import Path
from typing import Any

import numpy as np
import pytest
from _store_helpers import (  # noqa: F401  (pytest fixtures are used by name)
    msg,
    pg_database,
    store,
    store_url,
)

from agent.cli.main import main
from agent.events.classify import classify
from agent.report.csv import COLUMNS, write_csv
from agent.store.recorder import RecorderStore
from agent.wire.records import SummaryBatcher

T0 = 1_700_000_040.0  # a whole minute, so 60-s summaries start on it
N_S = 150
MISSING = 77  # one second without a record


def invented_seconds() -> dict[str, np.ndarray]:
    k = np.arange(N_S, dtype=float)
    mean = np.stack([230.0 + 3.0 * np.sin(k / 9.0), 229.0 - 2.0 * np.cos(k / 7.0)], axis=1)
    return {"t": T0 + k, "mean": mean, "min": mean - 1.234, "max": mean + 0.987,
            "hz": 50.0 + 0.01 * np.sin(k / 5.0), "thd": np.full((N_S, 2), 0.0215)}


def fill(store: RecorderStore) -> dict[str, Any]:
    s = invented_seconds()
    keep = np.arange(N_S) != MISSING
    batcher = SummaryBatcher(["L1", "L2"], k=60)
    bodies = batcher.add_many(s["t"][keep], s["min"][keep], s["mean"][keep], s["max"][keep],
                              s["hz"][keep], s["thd"][keep], np.full(N_S - 1, 0.001),
                              np.zeros(N_S - 1))
    last = batcher.flush()
    bodies += [last] if last else []
    seq = 0
    messages: list[dict[str, Any]] = []

    def add(mtype: str, /, **fields: Any) -> None:
        nonlocal seq
        seq += 1
        messages.append(msg(mtype, seq, device="unit-7", site="invented-block", **fields))

    for body in bodies:
        add("summary", **{k: v for k, v in body.items() if k not in ("v", "type")})
    for i in range(3):
        add("aggregate", kind="10min", t_utc=T0 - 600.0 * (i + 1), duration_s=600.0,
            channels=["L1", "L2"], rms=[230.5 + i, None], thd=[0.02, 0.03], hz=50.0,
            flagged=i == 1, count=3000)
    for i, (kind, level, dur) in enumerate([("dip", 0.55, 0.15), ("swell", 1.15, 0.8),
                                            ("interruption", 0.01, 2.0)]):
        start = T0 + 10.0 * i
        add("event", event_id=f"ev-{i}", kind=kind, channels=["L1"], state="closed",
            start_utc=start, end_utc=start + dur, duration_s=dur, level_v=230 * level,
            level_pu=level, thresholds={}, classification=classify(kind, level, dur, 50.0))
    # A restart report: the agent last ran at T0 + 100 and came back at T0 + 130 (one outage).
    add("status", state="online", t=T0 + 130.0, last_ran=T0 + 100.0)
    store.commit_batch(messages)
    return {"seconds": s}


def export(store: RecorderStore, what: str, **kw: Any) -> str:
    out = io.StringIO(newline="")
    write_csv(out, store, what, **kw)
    return out.getvalue()


def plain_split(text: str) -> list[list[str]]:
    """An RFC 4180 reading of files without quoted fields (asserted), independent of csv."""
    assert '"' not in text
    assert text.endswith("\r\n") and "\n" not in text.replace("\r\n", "")
    return [line.split(",") for line in text[:-2].split("\r\n")]


pytestmark = pytest.mark.parametrize("store_url", ["sqlite", "postgresql"], indirect=True)


def test_every_kind_round_trips(store: RecorderStore) -> None:
    fill(store)
    for what in COLUMNS:
        text = export(store, what)
        rows = list(csv.reader(io.StringIO(text, newline="")))
        assert rows == plain_split(text)
        assert tuple(rows[0]) == COLUMNS[what]
        assert all(len(r) == len(COLUMNS[what]) for r in rows)  # RFC 4180 section 2.4
    # Counts match the store.
    ev = list(csv.DictReader(io.StringIO(export(store, "events"), newline="")))
    assert len(ev) == store.count("events") == 3
    assert [e["ieee1159_category"] for e in ev] == ["sag", "swell", "interruption"]
    assert ev[0]["start_utc_iso"] == "2023-11-14T22:14:00.000Z"  # T0, checked by hand
    ag = list(csv.DictReader(io.StringIO(export(store, "aggregates"), newline="")))
    assert len(ag) == 2 * store.count("aggregates")
    assert ag[0]["rms_v"] == "232.5" and ag[1]["rms_v"] == "" and ag[0]["thd_pct"] == "2.0"
    out = list(csv.DictReader(io.StringIO(export(store, "outages"), newline="")))
    assert len(out) == len(store.outage_windows()) == 1
    assert float(out[0]["duration_s"]) == pytest.approx(30.0)


def test_trend_is_the_per_second_values(store: RecorderStore) -> None:
    s = fill(store)["seconds"]
    text = export(store, "trend")
    rows = list(csv.DictReader(io.StringIO(text, newline="")))
    assert len(rows) == 2 * (N_S - 1)  # every second held, per channel; the missing one not
    t = np.array([float(r["t_utc_s"]) for r in rows[::2]])
    want_t = np.delete(s["t"], MISSING)
    np.testing.assert_array_equal(t, want_t)
    # Independent numeric read of the same text (numpy), compared with the inputs to 10 mV.
    table = np.genfromtxt(io.StringIO(text), delimiter=",", names=True, dtype=None,
                          encoding="utf-8")
    for ch, name in enumerate(("L1", "L2")):
        sel = table["channel"] == name
        for col, key in (("rms_v", "mean"), ("rms_min_v", "min"), ("rms_max_v", "max")):
            want = np.delete(s[key][:, ch], MISSING)
            np.testing.assert_allclose(table[col][sel], want, atol=0.005 + 1e-9)
    np.testing.assert_allclose(table["frequency_hz"][::2], np.delete(s["hz"], MISSING),
                               atol=0.0005 + 1e-9)  # 1 mHz unit
    assert set(table["thd_pct"].tolist()) == {2.15}
    # --since/--until cut at the second, inclusive start and exclusive end.
    cut = list(csv.DictReader(io.StringIO(export(store, "trend", since=T0 + 50, until=T0 + 70),
                                          newline="")))
    assert [float(r["t_utc_s"]) for r in cut[::2]] == [T0 + k for k in range(50, 70)]
    assert export(store, "trend", unit="someone-else").count("\r\n") == 1  # header only


def test_cli_writes_a_file_and_refuses_bad_options(store: RecorderStore, tmp_path: Path,
                                                    capsys: pytest.CaptureFixture[str]) -> None:
    fill(store)
    url = store.db.url
    target = tmp_path / "events.csv"
    assert main(["export", "--store", url, "--what", "events", "--out", str(target)]) == 0
    assert target.read_bytes().count(b"\r\n") == 4
    assert "3 events rows" in capsys.readouterr().err
    bad = [["export", "--store", url, "--what", "voltage"],
           ["export", "--what", "events"],
           ["export", "--store", url, "--what", "events", "--since", "last tuesday"],
           ["export", "--store", url, "--what", "events", "--since", "1d", "--until", "2d"],
           ["export", "--store", "sqlite:///" + str(tmp_path / "absent.db"), "--what", "events"],
           ["export", "--store", url, "--what", "events", "--out", str(tmp_path / "no/x.csv")],
           ["export", "--store", url, "--what"]]
    for argv in bad:
        try:
            code = main(argv)
        except SystemExit as exc:
            code = int(exc.code or 0)
        err = capsys.readouterr().err
        assert code == 2, argv
        assert err.count("\n") == 1 and err.startswith("halfcycle export: error: "), err
