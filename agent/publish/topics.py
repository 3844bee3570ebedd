"""Topic names used by the publisher: a thin layer over :mod:`agent.wire.topics`.

Layout ``hc/v1/{site}/{device}/{kind}``; the collector's commit acknowledgement for a device is
retained on ``hc/v1/{site}/{device}/ack``. Presence ("online" on connect, "offline" as the
Last Will) is a retained ``status`` message with ``seq`` 0: it is sent outside the outbox, so
it takes no place in the contiguous sequence (outbox sequence numbers start at 1).
"""

from __future__ import annotations

from agent.wire import topics as _wire

PREFIX = _wire.PREFIX
ACK_KIND = _wire.ACK_KIND
GAP_KIND = "gap"
PRESENCE_KIND = "status"
PRESENCE_SEQ = 0
DEVICE_KINDS: tuple[str, ...] = tuple(_wire.DEVICE_KINDS)

# Ids the broker ACL gives another meaning to (hc/v1/+/alerts/# is the collector's).
RESERVED_DEVICE_IDS = frozenset({"collector", "alerts"})


def valid_id(value: str) -> bool:
    """True when ``value`` can be a site or device id (one topic level, no wildcards)."""
    return _wire.valid_id(value)


def topic(site: str, device: str, kind: str) -> str:
    """The topic a device publishes ``kind`` messages on (WireError on a bad id or kind)."""
    return _wire.topic(site, device, kind)


def ack_topic(site: str, device: str) -> str:
    """The retained commit-acknowledgement topic of one device."""
    return _wire.ack_topic(site, device)
