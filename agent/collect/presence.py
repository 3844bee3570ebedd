"""The collector's own presence on MQTT, and what it tells about a client-id clash.

Each collector publishes a retained msgpack map on ``hc/v1/_collector/{id}/presence``
(``state`` online on connect; offline as its Last Will and on a clean stop) carrying a random
``instance`` per process. On each connect it first subscribes to that topic, then publishes:
the retained message it receives is the presence of whoever held this collector id last.
When two processes share one client id, each connect takes the session from the other
(Mosquitto 2.0 closes the older connection without the MQTT 5 reason 0x8E "session taken
over", and publishes no Will), so each connect finds the other's ``online``. A crashed
previous run of this collector shows such an ``online`` once; seen twice, it is a clash.
"""

from __future__ import annotations

import uuid
from collections.abc import Callable

import msgpack
import structlog

from agent import __version__
from agent.wire import topics

log = structlog.get_logger("halfcycle.collect")

TOPIC = topics.PREFIX + "/_collector/{id}/presence"
# MQTT 5 DISCONNECT reason 0x8E (MQTT 5.0 cl. 3.14.2.1), sent by brokers that say so.
SESSION_TAKEN_OVER = 0x8E


class Presence:
    def __init__(self, collector_id: str, group: str, client_id: str,
                 clock: Callable[[], float]) -> None:
        self.collector_id = collector_id
        self.group = group
        self.client_id = client_id
        self.topic = TOPIC.format(id=collector_id)
        self.instance = uuid.uuid4().hex
        self._clock = clock
        self.takeovers = 0
        self.others: set[str] = set()

    def body(self, state: str) -> bytes:
        return msgpack.packb({"v": 1, "type": "collector", "collector": self.collector_id,
                              "group": self.group, "state": state, "t": self._clock(),
                              "instance": self.instance, "agent_version": __version__})

    def seen(self, payload: bytes) -> bool:
        """A message on our presence topic; True when it reveals a client-id clash."""
        try:
            body = msgpack.unpackb(payload, raw=False)
        except (ValueError, msgpack.ExtraData, msgpack.FormatError, msgpack.StackError):
            return False
        if not isinstance(body, dict) or body.get("state") != "online":
            return False  # offline: a clean stop or a Will, nobody holds the id now
        other = body.get("instance")
        if not isinstance(other, str) or other == self.instance:
            return False
        self.others.add(other)
        self.takeovers += 1
        return self.takeovers >= 2

    def disconnected(self, reason_value: int | None) -> bool:
        """A disconnect; True when the broker said another client took the session."""
        if reason_value != SESSION_TAKEN_OVER:
            return False
        self.takeovers += 1
        return True

    def report_clash(self) -> None:
        log.error("collector_client_id_in_use", client_id=self.client_id,
                  takeovers=self.takeovers, other_processes=max(1, len(self.others)),
                  hint="another process connects with this collector's client id and the "
                       "broker keeps closing one of the two; give every collector its own "
                       "[collector] id (and [mqtt] client_id, if set)")
