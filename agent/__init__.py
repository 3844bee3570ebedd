"""halfcycle: MQTT edge agent and event recorder for fleets of home voltage monitors."""

__version__ = "0.1.0"
