"""Outage logic: Last Will handling, per-device windows, site-level outages (invented data).

Status and event messages are built with the wire codec, as the collector receives them.
"""

from __future__ import annotations

from typing import Any

import pytest

from agent.store.outages import (
    WILL_DELAY_FACTOR,
    OutageWindow,
    device_outage_windows,
    last_gasp_window,
    planned_stop_window,
    presence_from_status,
    restart_window,
    site_outages,
)
from agent.wire.codec import status_body

T0 = 1764600000.0  # invented
KEEPALIVE = 60.0


def status(device: str, state: str, t: float, *, last_ran: float | None = None,
           uptime_s: float = 0.0, site: str = "block-a",
           last_stop: str | None = None) -> dict[str, Any]:
    body = status_body(state, agent_version="0.1", uptime_s=uptime_s, outbox_depth=0,
                       sync="synced", time_error_s=0.001, last_ran=last_ran, t=t,
                       last_stop=last_stop)
    return {**body, "device": device, "site": site, "epoch": "ep", "seq": 1}


def last_gasp(device: str, start: float, end: float, *, uncertainty: float = 0.5,
              site: str = "block-a") -> dict[str, Any]:
    return {"device": device, "site": site, "event_id": f"{device}-{start}", "kind": "dip",
            "start_utc": start, "end_utc": end, "ended_by": "power_loss",
            "end_uncertainty_s": uncertainty, "level_pu": 0.0}


def restart(device: str, down_at: float, up_at: float, site: str = "block-a") -> dict[str, Any]:
    """The agent's first report after a restart at ``up_at``, sent 5 s later."""
    return status(device, "online", up_at + 5.0, last_ran=down_at, uptime_s=5.0, site=site)


# --- rule 1: Last Will ----------------------------------------------------------------------


def test_last_will_marks_offline_with_its_delay_window() -> None:
    will = status("d1", "offline", T0 - 3600.0)  # a will carries its connection time
    p = presence_from_status(will, received_at=T0, keepalive_s=KEEPALIVE, will=True)
    assert p.state == "offline"
    # MQTT: the broker waits up to 1.5 × keepalive (MQTT 3.1.1 cl. 3.1.2.10)
    assert WILL_DELAY_FACTOR == 1.5
    assert (p.earliest_utc, p.latest_utc) == (T0 - 90.0, T0)


def test_last_will_never_starts_an_outage() -> None:
    wills = [status(f"d{i}", "offline", T0) for i in range(4)]  # every device's will fires
    assert all(restart_window(w) is None for w in wills)
    assert device_outage_windows(wills, []) == []
    assert site_outages(device_outage_windows(wills, []), {"block-a": 4}) == []


def test_own_report_presence_is_exact() -> None:
    p = presence_from_status(status("d1", "heartbeat", T0), received_at=T0 + 3,
                             keepalive_s=KEEPALIVE, will=False)
    assert (p.state, p.earliest_utc, p.latest_utc) == ("online", T0, T0)
    with pytest.raises(ValueError, match="offline"):
        presence_from_status(status("d1", "online", T0), T0, KEEPALIVE, will=True)


# --- rule 2: per-device windows -------------------------------------------------------------


def test_restart_report_gives_the_window() -> None:
    w = restart_window(restart("d1", T0, T0 + 300.0))
    assert w is not None
    # last_ran → t - uptime_s: the agent's own start
    assert (w.start_utc, w.end_utc, w.sources) == (T0, T0 + 300.0, ("restart_report",))
    assert restart_window(status("d1", "online", T0)) is None  # first start ever: no last_ran


def test_planned_restart_is_no_outage() -> None:
    # Issue 7 item 5 (invented): a clean stop at T0, start again 300 s later. The agent says
    # last_stop = planned: no outage window, neither alone nor with the site.
    planned = status("d1", "online", T0 + 305.0, last_ran=T0, uptime_s=5.0,
                     last_stop="planned")
    assert restart_window(planned) is None
    assert device_outage_windows([planned], []) == []
    w = planned_stop_window(planned)
    assert w is not None and (w.start_utc, w.end_utc, w.sources) == (
        T0, T0 + 300.0, ("planned_stop",))
    # The same silence without a planned stop (a crash, a kill, a power cut) is an outage.
    unplanned = status("d1", "online", T0 + 305.0, last_ran=T0, uptime_s=5.0,
                       last_stop="unplanned")
    assert restart_window(unplanned) is not None and planned_stop_window(unplanned) is None
    assert restart_window(restart("d1", T0, T0 + 300.0)) is not None  # v1: no last_stop
    # Two of three homes restarted on purpose, one lost power: no site outage (more than
    # half out at once is needed, rule 3).
    msgs = [status(d, "online", T0 + 305.0, last_ran=T0, uptime_s=5.0, last_stop="planned")
            for d in ("d1", "d2")] + [restart("d3", T0, T0 + 300.0)]
    windows = device_outage_windows(msgs, [])
    assert [w.device for w in windows] == ["d3"]
    assert site_outages(windows, {"block-a": 3}) == []
    # The clean stop's own offline report: offline at its t, marked planned (not out).
    stop = {**status("d1", "offline", T0), "reason": "planned_stop"}
    p = presence_from_status(stop, T0 + 1.0, KEEPALIVE, will=False)
    assert (p.state, p.earliest_utc, p.planned) == ("offline", T0, True)
    assert not presence_from_status(status("d1", "offline", T0), T0, KEEPALIVE,
                                    will=False).planned
    # A planned restart with a power-loss event in it still shows the power loss.
    gasp = last_gasp("d1", T0 - 2.0, T0 - 1.0)
    (lost,) = device_outage_windows([planned], [gasp])
    assert lost.sources == ("last_gasp",)


def test_restart_before_last_ran_is_a_clear_error_or_skipped() -> None:
    bad = status("d1", "online", T0, last_ran=T0 + 10, uptime_s=1.0)
    with pytest.raises(ValueError, match="before last_ran"):
        restart_window(bad)
    errors: list[str] = []
    good = restart("d2", T0, T0 + 60)
    assert len(device_outage_windows([bad, good], [], errors=errors)) == 1
    assert len(errors) == 1 and "d1" in errors[0]


def test_last_gasp_merges_with_the_restart_window() -> None:
    # the dip that became the power loss starts at T0, the journal's inferred end 0.8 s later
    # (± 0.5 s); the agent last ran at T0 + 1.2 and restarted at T0 + 240
    windows = device_outage_windows([restart("d1", T0 + 1.2, T0 + 240.0)],
                                    [last_gasp("d1", T0, T0 + 0.8)], merge_gap_s=0.0)
    assert windows == [OutageWindow("d1", "block-a", T0, T0 + 240.0,
                                    ("last_gasp", "restart_report"))]


def test_separate_outages_of_one_device_stay_separate() -> None:
    windows = device_outage_windows([restart("d1", T0, T0 + 60), restart("d1", T0 + 600,
                                                                         T0 + 660)], [])
    assert [(w.start_utc, w.end_utc) for w in windows] == [(T0, T0 + 60), (T0 + 600, T0 + 660)]


def test_last_gasp_without_restart_is_its_own_window() -> None:
    (w,) = device_outage_windows([], [last_gasp("d1", T0, T0 + 2.0)])
    assert (w.start_utc, w.end_utc, w.sources) == (T0, T0 + 2.0, ("last_gasp",))
    recovered = dict(last_gasp("d2", T0, T0 + 2.0), ended_by="recovery")
    assert last_gasp_window(recovered) is None


# --- rule 3: site outages -------------------------------------------------------------------


def test_most_devices_out_together_is_one_site_outage_median_times() -> None:
    # 6 of 8 units lose power at ~T0 and come back between T0+290 and T0+330 (invented)
    downs = [0.0, 0.5, 1.0, 1.5, 2.0, 40.0]
    ups = [300.0, 310.0, 290.0, 320.0, 330.0, 305.0]
    statuses = [restart(f"u{i}", T0 + d, T0 + u) for i, (d, u) in enumerate(zip(downs, ups,
                                                                                strict=True))]
    windows = device_outage_windows(statuses, [])
    (outage,) = site_outages(windows, {"block-a": [f"u{i}" for i in range(8)]})
    assert outage.devices == tuple(f"u{i}" for i in range(6))
    assert outage.peak_out == 6 and outage.fraction_affected == 0.75
    # median of the 6 starts (1.0, 1.5 → 1.25) and ends (305, 310 → 307.5)
    assert (outage.start_utc, outage.end_utc) == (T0 + 1.25, T0 + 307.5)
    (env,) = site_outages(windows, {"block-a": 8}, rule="earliest")
    assert (env.start_utc, env.end_utc) == (T0, T0 + 330.0)


def test_half_is_not_most() -> None:
    windows = device_outage_windows([restart(f"u{i}", T0, T0 + 100) for i in range(4)], [])
    assert site_outages(windows, {"block-a": 8}) == []  # 4/8 is not > 50 %
    assert len(site_outages(windows, {"block-a": 7})) == 1  # 4/7 is
    assert len(site_outages(windows, {"block-a": 8}, fraction=0.4)) == 1  # configurable


def test_non_overlapping_windows_are_not_a_site_outage() -> None:
    # 5 of 6 devices restart on the same day but never out at the same time
    windows = device_outage_windows(
        [restart(f"u{i}", T0 + 1000 * i, T0 + 1000 * i + 60) for i in range(5)], [])
    assert site_outages(windows, {"block-a": 6}) == []


def test_two_sites_are_judged_separately() -> None:
    statuses = [restart(f"a{i}", T0, T0 + 100, site="block-a") for i in range(3)]
    statuses += [restart("b0", T0, T0 + 100, site="block-b")]
    outages = site_outages(device_outage_windows(statuses, []),
                           {"block-a": 4, "block-b": 5})
    assert [(o.site, len(o.devices)) for o in outages] == [("block-a", 3)]


def test_site_outage_inputs_checked() -> None:
    windows = device_outage_windows([restart("x", T0, T0 + 1)], [])
    with pytest.raises(ValueError, match="no device count"):
        site_outages(windows, {})
    with pytest.raises(ValueError, match="not in its list"):
        site_outages(windows, {"block-a": ["u1", "u2"]})
    with pytest.raises(ValueError, match="fraction"):
        site_outages(windows, {"block-a": 2}, fraction=1.0)
