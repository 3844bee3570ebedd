"""Operator concerns kept apart from the data path: systemd notification and watchdog
(:mod:`.systemd`), Prometheus metrics (:mod:`.metrics`), scheduled retention
(:mod:`.retention`), secrets read from files or systemd credentials (:mod:`.secrets`).

Nothing here knows MQTT messages or SQL; the collector and the edge agent call into it.
"""
