"""Broker tooling: render and run a Mosquitto configuration for halfcycle (see setup)."""
