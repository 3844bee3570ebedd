"""Site model: what a device is measuring and what its readings should be compared with."""

from __future__ import annotations

from dataclasses import dataclass, field

from agent.config import ConfigError, Section

SERVICE_TYPES = ("1ph", "120/240", "120/208", "3ph")
MEASUREMENT_POINTS = ("service", "outlet")
# Expected channel count per service type (line-to-neutral voltages measured).
_CHANNELS = {"1ph": 1, "120/240": 2, "120/208": 3, "3ph": 3}


@dataclass(frozen=True)
class Site:
    """One monitored installation.

    ``nominal_v`` is the declared line-to-neutral voltage Udin [V] that every channel is
    compared with (120 V for a 120/240 V split-phase service, 230 V for most of Europe).
    ``measurement_point`` says whether the monitor sees the service entrance (``service``) or a
    receptacle downstream of branch wiring (``outlet``); reports pick ANSI C84.1 service or
    utilization limits from it.
    """

    site_id: str = "site-0"
    device_id: str = "device-0"
    nominal_v: float = 230.0
    nominal_hz: float = 50.0
    service_type: str = "1ph"
    channel_names: tuple[str, ...] = ("L1",)
    measurement_point: str = "service"
    feeder: str | None = None
    transformer: str | None = None
    labels: dict[str, str] = field(default_factory=dict)

    @property
    def channels(self) -> int:
        return len(self.channel_names)

    @property
    def cycles_per_basic_interval(self) -> int:
        """10 cycles at 50 Hz, 12 at 60 Hz (IEC 61000-4-30 Ed.3 clause 5.2)."""
        return 12 if self.nominal_hz == 60.0 else 10

    @classmethod
    def from_section(cls, sec: Section) -> Site:
        sec.reject_unknown(
            {
                "site",
                "device",
                "nominal_v",
                "nominal_hz",
                "service_type",
                "channels",
                "measurement_point",
                "feeder",
                "transformer",
                "labels",
            }
        )
        nominal_v = sec.get("nominal_v", float, 230.0)
        if not 50.0 <= nominal_v <= 1000.0:
            raise sec.error("nominal_v", f"{nominal_v} V is outside 50..1000 V")
        nominal_hz = sec.get("nominal_hz", float, 50.0)
        if nominal_hz not in (50.0, 60.0):
            raise sec.error("nominal_hz", "must be 50 or 60")
        service = sec.choice("service_type", SERVICE_TYPES, "1ph")
        default_names = {"1ph": ["L1"], "120/240": ["L1", "L2"]}.get(service, ["L1", "L2", "L3"])
        names = sec.get("channels", list, default_names)
        if not names or not all(isinstance(n, str) and n for n in names):
            raise sec.error("channels", "must be a non-empty list of channel names")
        if len(names) != _CHANNELS[service]:
            raise sec.error(
                "channels",
                f"service_type {service} has {_CHANNELS[service]} channels, got {len(names)}",
            )
        labels = sec.get("labels", dict, {})
        return cls(
            site_id=sec.get("site", str, "site-0"),
            device_id=sec.get("device", str, "device-0"),
            nominal_v=nominal_v,
            nominal_hz=nominal_hz,
            service_type=service,
            channel_names=tuple(names),
            measurement_point=sec.choice("measurement_point", MEASUREMENT_POINTS, "service"),
            feeder=sec.optional("feeder", str),
            transformer=sec.optional("transformer", str),
            labels={str(k): str(v) for k, v in labels.items()},
        )


def check_identifier(value: str, path: str | None, key: str) -> str:
    """Site and device ids become MQTT topic levels: no wildcards, separators or spaces."""
    if not value or any(c in value for c in "+#/ \t\n\0") or len(value) > 64:
        raise ConfigError(
            path, key, f"{value!r} is not a valid identifier (1-64 chars, no + # / or spaces)"
        )
    return value
