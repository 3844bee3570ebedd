"""Topic layout (agent/wire/topics.py)."""

from __future__ import annotations

import pytest

from agent.publish import topics as publish_topics
from agent.wire.errors import WireError
from agent.wire.topics import (
    DEVICE_KINDS,
    KINDS,
    ack_topic,
    parse_topic,
    shared_filter,
    topic,
    topic_table_markdown,
    valid_id,
)


def test_topic_round_trip_for_every_kind() -> None:
    for kind in KINDS:
        t = topic("site-7", "dev-0042", kind)
        assert t == f"hc/v1/site-7/dev-0042/{kind}"
        assert parse_topic(t) == ("site-7", "dev-0042", kind)
    assert ack_topic("s", "d") == "hc/v1/s/d/ack"


@pytest.mark.parametrize("bad", ["", "a b", "a/b", "a+b", "a#", "-a", "a" * 65, "dev\n", "é"])
def test_ids_with_wildcards_separators_or_spaces_are_refused(bad: str) -> None:
    # MQTT 5.0 cl. 4.7.1: '/' separates levels, '+' and '#' are wildcards.
    assert not valid_id(bad)
    with pytest.raises(WireError):
        topic(bad, "d", "summary")
    with pytest.raises(WireError):
        topic("s", bad, "summary")


def test_ids_agree_with_the_publisher_rule() -> None:
    # The publisher engineer's agent/publish/topics.py has its own id rule: they must agree.
    for value in ["site-7", "a.b_c-d", "A" * 64, "a" * 65, "a b", "-x", "x/y", "x+", ""]:
        assert valid_id(value) == publish_topics.valid_id(value), value


@pytest.mark.parametrize("bad", [
    "hc/v1/s/d", "hc/v1/s/d/summary/x", "hc/v2/s/d/summary", "xx/v1/s/d/summary",
    "hc/v1/s/d/weather", "hc/v1/s+/d/summary", "hc/v1//d/summary",
])
def test_parse_topic_rejects_malformed(bad: str) -> None:
    with pytest.raises(WireError) as err:
        parse_topic(bad)
    assert err.value.code == "topic"


def test_shared_subscription_filter() -> None:
    # MQTT 5.0 cl. 4.8.2: $share/{ShareName}/{filter}
    assert shared_filter("collectors", "event") == "$share/collectors/hc/v1/+/+/event"
    with pytest.raises(WireError):
        shared_filter("collectors", "ack")  # the collector writes ack, it does not read it
    with pytest.raises(WireError):
        shared_filter("a/b", "event")


def test_markdown_table_lists_every_kind() -> None:
    table = topic_table_markdown()
    for kind in KINDS:
        assert f"`hc/v1/{{site}}/{{device}}/{kind}`" in table
    assert table.count("\n") == len(KINDS) + 2
    assert set(DEVICE_KINDS) | {"ack"} == set(KINDS)
