"""The unit's state now (agent.verdicts.now) and the shared service bands (agent.verdicts.limits).

Bands: ANSI C84.1 Range A service 114–126 V on 120 V (published, tests/SOURCES.md "Service-voltage
ranges"); Range A utilization 108–125 V (from memory); EN 50160 Un ±10 % (published). The
offline and staleness thresholds are the project's own (common practice).
"""

from __future__ import annotations

import pytest

from agent.verdicts.limits import ansi_band, en50160_band, service_band, standard_for
from agent.verdicts.now import OFFLINE_AFTER_S, UnitFacts, unit_now

NOW = 1_800_000_000.0


def facts(**kw: object) -> UnitFacts:
    base: dict[str, object] = {"device": "u1", "site": "s1", "presence": "online",
                               "last_seen": NOW - 30, "nominal_v": 120.0, "standard": "ansi"}
    base.update(kw)
    return UnitFacts(**base)  # type: ignore[arg-type]


def test_ansi_range_a_service_scaled() -> None:
    # ANSI C84.1 Range A service 114–126 V on 120 V (published); 240 V doubles it.
    b = ansi_band(240.0, "A", "service")
    assert (b.low_v, b.high_v, b.confidence) == (228.0, 252.0, "pub")
    assert ansi_band(120.0, "A", "outlet").low_v == 108.0  # utilization, from memory
    assert ansi_band(120.0, "A", "outlet").confidence == "mem"


def test_en50160_bands() -> None:
    # EN 50160: ±10 % (95 % of the week), +10/−15 % (all) (published).
    assert en50160_band(230.0).low_v == pytest.approx(207.0)
    assert en50160_band(230.0, all_values=True).low_v == pytest.approx(195.5)
    assert standard_for(230.0, 50.0) == "en50160" and standard_for(120.0, 60.0) == "ansi"


@pytest.mark.parametrize(("value", "state"), [
    (126.0, "ok"), (126.01, "out_of_range"), (114.0, "ok"), (113.99, "out_of_range")])
def test_out_of_range_boundaries(value: float, state: str) -> None:
    # Inclusive limits: a value equal to 126 V is inside Range A service (ANSI C84.1, published).
    v = unit_now(facts(last_ten_min=(NOW - 60, [120.0, value])), NOW)
    assert v.verdict == state
    assert v.passed is (state == "ok")


def test_stale_ten_minute_mean_is_not_now() -> None:
    v = unit_now(facts(last_ten_min=(NOW - 7200, [130.0])), NOW)
    assert v.verdict == "ok"
    assert v.details["last_ten_min"]["recent"] is False


def test_offline_by_silence_and_by_will() -> None:
    quiet = unit_now(facts(last_seen=NOW - OFFLINE_AFTER_S - 1), NOW)
    assert quiet.verdict == "offline" and quiet.details["states"][0]["since"] == NOW - 901
    assert unit_now(facts(last_seen=NOW - OFFLINE_AFTER_S + 1), NOW).verdict == "ok"
    will = unit_now(facts(presence="offline", presence_since=NOW - 100), NOW)
    assert will.verdict == "offline"


def test_planned_stop_is_not_attention() -> None:
    v = unit_now(facts(presence="offline", presence_since=NOW - 5000, planned_stop=True,
                       last_seen=NOW - 5000), NOW)
    assert v.verdict == "stopped" and v.passed is True


def test_supply_out_while_reporting_and_lost_power_when_silent() -> None:
    ev = ({"kind": "interruption", "start_utc": NOW - 50},)
    assert unit_now(facts(open_events=ev), NOW).verdict == "supply_out"
    lost = unit_now(facts(open_events=ev, presence="offline", presence_since=NOW - 40), NOW)
    assert lost.verdict == "lost_power"
    assert lost.details["states"][0]["since"] == NOW - 50
    # A dip is not a supply interruption.
    assert unit_now(facts(open_events=({"kind": "dip", "start_utc": NOW - 5},)), NOW).verdict \
        == "ok"


def test_power_loss_closed_after_restart_only_while_silent() -> None:
    silent = facts(presence="offline", presence_since=NOW - 3000, last_seen=NOW - 3000,
                   power_loss_utc=NOW - 2990)
    assert unit_now(silent, NOW).verdict == "lost_power"
    back = facts(power_loss_utc=NOW - 2990)  # fresh data since: back online
    assert unit_now(back, NOW).verdict == "ok"


def test_several_states_worst_first() -> None:
    v = unit_now(facts(presence="offline", presence_since=NOW - 100,
                       last_ten_min=(NOW - 300, [100.0])), NOW)
    assert [s["state"] for s in v.details["states"]] == ["offline", "out_of_range"]
    assert v.verdict == "offline"


def test_unknown_unit() -> None:
    assert unit_now(UnitFacts("u9", "s1"), NOW).verdict == "unknown"


def test_service_band_rejects_unknown_standard() -> None:
    with pytest.raises(ValueError, match="standard"):
        service_band(120.0, "iec")
