"""MQTT topic layout: ``hc/v1/{site}/{device}/{kind}``.

Devices publish on their own ``summary``, ``aggregate``, ``event``, ``capture``, ``status`` and
``gap`` topics; the collector writes the retained commit acknowledgement on ``ack``. The
``v1`` level versions the layout itself (message schemas carry their own ``v``).
"""

from __future__ import annotations

import re

from agent.wire.errors import WireError

PREFIX = "hc/v1"
DEVICE_KINDS = ("summary", "aggregate", "event", "capture", "status", "gap")
ACK_KIND = "ack"
KINDS = (*DEVICE_KINDS, ACK_KIND)

# Same rule as the schemas' $defs/id: one topic level, no MQTT wildcards, separators or spaces.
ID_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}\Z")
_GROUP_PATTERN = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,63}\Z")

_DESCRIPTIONS = {
    "summary": ("device", "1", "no", "K seconds (default 60) of per-second records"),
    "aggregate": ("device", "1", "no", "one 10-min (or 150/180-cycle) aggregate"),
    "event": ("device", "1", "no", "dip, swell or interruption: once at start, once at end"),
    "capture": ("device", "1", "no", "one chunk of a waveform capture"),
    "status": ("device", "1", "presence only",
               "online / offline presence (offline is the will; seq 0, outside the outbox) "
               "and heartbeats"),
    "gap": ("device", "1", "no", "sequence numbers dropped at the edge"),
    "ack": ("collector", "1", "yes", "highest contiguous committed seq for (device, epoch)"),
}


def valid_id(value: object) -> bool:
    """True when ``value`` can be a site, device, epoch or collector id."""
    return isinstance(value, str) and bool(ID_PATTERN.match(value))


def check_id(value: object, what: str) -> str:
    if not valid_id(value):
        raise WireError(f"{what} id {value!r} is not a valid topic level (1-64 of letters, "
                        "digits, '_', '.', '-', starting with a letter or digit)", "topic")
    assert isinstance(value, str)
    return value


def topic(site: str, device: str, kind: str) -> str:
    """The topic for ``kind`` messages of one device."""
    if kind not in KINDS:
        raise WireError(f"unknown topic kind {kind!r} (one of {', '.join(KINDS)})", "topic")
    return f"{PREFIX}/{check_id(site, 'site')}/{check_id(device, 'device')}/{kind}"


def ack_topic(site: str, device: str) -> str:
    """The retained acknowledgement topic the collector writes and the device reads."""
    return topic(site, device, ACK_KIND)


def device_filter(site: str, device: str) -> str:
    """Everything one device publishes (for debugging tools): ``hc/v1/{site}/{device}/+``."""
    return f"{PREFIX}/{check_id(site, 'site')}/{check_id(device, 'device')}/+"


def shared_filter(group: str, kind: str) -> str:
    """The collector's shared subscription for one kind across the fleet:
    ``$share/{group}/hc/v1/+/+/{kind}`` (MQTT 5.0 cl. 4.8.2)."""
    if kind not in DEVICE_KINDS:
        raise WireError(f"collectors subscribe to device kinds only, not {kind!r}", "topic")
    if not _GROUP_PATTERN.match(group):
        raise WireError(f"share group {group!r} is not a valid topic level", "topic")
    return f"$share/{group}/{PREFIX}/+/+/{kind}"


def parse_topic(value: str) -> tuple[str, str, str]:
    """``hc/v1/{site}/{device}/{kind}`` -> ``(site, device, kind)``; WireError otherwise."""
    parts = value.split("/")
    if len(parts) != 5 or f"{parts[0]}/{parts[1]}" != PREFIX:
        raise WireError(f"topic {value!r} is not {PREFIX}/{{site}}/{{device}}/{{kind}}", "topic")
    site, device, kind = parts[2], parts[3], parts[4]
    check_id(site, "site")
    check_id(device, "device")
    if kind not in KINDS:
        raise WireError(f"topic {value!r} has unknown kind {kind!r}", "topic")
    return site, device, kind


def topic_table_markdown() -> str:
    """The layout as a markdown table for the README."""
    rows = ["| topic | written by | QoS | retained | carries |", "|---|---|---|---|---|"]
    for kind in KINDS:
        who, qos, retained, what = _DESCRIPTIONS[kind]
        rows.append(f"| `{PREFIX}/{{site}}/{{device}}/{kind}` | {who} | {qos} | {retained} "
                    f"| {what} (schema `schemas/{kind}.schema.json`) |")
    rows.append(f"| `$share/{{group}}/{PREFIX}/+/+/{{kind}}` | (collector subscription) | 1 | "
                "— | shared subscription, one per kind |")
    return "\n".join(rows)
