"""Durable publishing from the edge.

- :mod:`agent.publish.outbox` -- :class:`~agent.publish.outbox.Outbox`: SQLite outbox, two
  lanes, (device, epoch, seq) identity, rows leave only on the collector's ack.
- :mod:`agent.publish.mqtt` -- :class:`~agent.publish.mqtt.Publisher`: drains an outbox over
  MQTT 5 (or 3.1.1) with paho-mqtt, QoS 1, persistent session, resend until acknowledged.
- :mod:`agent.publish.topics` -- topic names (defers to :mod:`agent.wire.topics`).
- :mod:`agent.publish.edge` -- the edge runner behind ``halfcycle edge run``.
"""
