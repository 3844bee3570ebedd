# ruff: noqa: F811  (pytest fixtures imported from _store_helpers shadow their name)
"""The fleet now read from a real recorder store (SQLite file and PostgreSQL).

The states are the project's own rules (common practice, agent.verdicts.now); the band is ANSI
C84.1 Range A service 114–126 V on 120 V (published, tests/SOURCES.md "Service-voltage ranges").
"""

from __future__ import annotations

import pytest
from _store_helpers import (  # noqa: F401  (pytest fixtures are used by name)
    event,
    msg,
    pg_database,
    store,
    store_url,
)

from agent.report.now import fleet_now
from agent.store.recorder import RecorderStore

T0 = 1_700_000_000.0


def ten_min(seq: int, device: str, rms: list[float], count: int) -> dict[str, object]:
    return msg("aggregate", seq, device=device, kind="10min", t_utc=T0, duration_s=600.0,
               rms=rms, flagged=False, count=count)
pytestmark = pytest.mark.parametrize("store_url", ["sqlite", "postgresql"], indirect=True)


def test_fleet_now_from_store(store: RecorderStore) -> None:
    model = {"nominal_v": 120.0, "nominal_hz": 60.0, "measurement_point": "service"}
    store.commit_batch([
        # hot: last complete 10-min mean 127.2 V > 126 V (Range A service upper limit).
        msg("status", 1, device="hot", state="online", t=T0, site_model=model),
        ten_min(2, "hot", [127.2, 121.0], 3000),
        # fine: inside the band.
        msg("status", 1, device="fine", state="online", t=T0, site_model=model),
        ten_min(2, "fine", [120.5, 121.0], 3000),
        # dark: an interruption still open.
        msg("status", 1, device="dark", state="online", t=T0, site_model=model),
        {**event(2, "ev-dark", "open", device="dark", level_v=2.0), "kind": "interruption"},
        # short: a partial 10-min aggregate is no 10-min mean and is not judged.
        msg("status", 1, device="short", state="online", t=T0, site_model=model),
        ten_min(2, "short", [90.0], 100),
    ])
    for dev in ("hot", "fine", "dark", "short"):
        store.set_device_status(dev, "site-1", "online", T0 + 600.0)
    now = T0 + 700.0
    verdicts = {v.details["device"]: v for v in fleet_now(store, now)}
    assert verdicts["hot"].verdict == "out_of_range"
    assert verdicts["hot"].details["last_ten_min"]["band"]["high_v"] == pytest.approx(126.0)
    assert verdicts["fine"].verdict == "ok"
    assert verdicts["dark"].verdict == "supply_out"
    assert verdicts["short"].verdict == "ok"
    # Worst first.
    assert [v.details["device"] for v in fleet_now(store, now)][:2] == ["dark", "hot"]
    # Later, silence turns every unit offline; the open interruption makes it lost power.
    # (last_seen is when the collector committed the unit's last message.)
    seen = max(float(d["last_seen"]) for d in store.devices())
    later = {v.details["device"]: v.verdict for v in fleet_now(store, seen + 3600.0)}
    assert later == {"dark": "lost_power", "hot": "offline", "fine": "offline",
                     "short": "offline"}
