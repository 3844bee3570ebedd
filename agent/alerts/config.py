"""The collector's ``[alerts]`` configuration: rules and delivery channels.

Errors name the file and the key (``collector.toml: alerts.rule[2].kind: must be one of ...``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

from agent.alerts.rules import (
    DURATION_CLASSES,
    EVENT_KINDS,
    ITIC_OUTSIDE,
    RULE_KINDS,
    AlertRule,
)
from agent.collect.correlate import SIMULTANEITY_WINDOW_S
from agent.config import Section
from agent.ops.secrets import read_secret_file
from agent.verdicts.now import OFFLINE_AFTER_S
from agent.wire import topics

CHANNELS = ("mqtt", "webhook", "email")


@dataclass(frozen=True)
class WebhookSettings:
    url: str
    timeout_s: float = 10.0
    headers: dict[str, str] = field(default_factory=dict)


@dataclass(frozen=True)
class EmailSettings:
    host: str
    port: int
    sender: str
    to: tuple[str, ...]
    starttls: bool = True
    ssl: bool = False
    username: str | None = None
    password: str | None = None
    timeout_s: float = 20.0


@dataclass(frozen=True)
class AlertSettings:
    rules: tuple[AlertRule, ...]
    mqtt: bool = True
    webhook: WebhookSettings | None = None
    email: EmailSettings | None = None
    tick_s: float = 30.0
    offline_after_s: float = OFFLINE_AFTER_S
    retry_min_s: float = 5.0
    retry_max_s: float = 900.0

    @property
    def channels(self) -> tuple[str, ...]:
        """The configured delivery channels."""
        return tuple(c for c, on in (("mqtt", self.mqtt), ("webhook", self.webhook is not None),
                                     ("email", self.email is not None)) if on)

    def channels_for(self, rule: AlertRule) -> tuple[str, ...]:
        return tuple(c for c in self.channels if not rule.channels or c in rule.channels)


def _positive(sec: Section, name: str, default: float, *, zero: bool = True) -> float:
    value = sec.get(name, float, default)
    if not (value >= 0 if zero else value > 0) or value != value or value == float("inf"):
        raise sec.error(name, f"must be a finite number {'>=' if zero else '>'} 0; got {value}")
    return value


def _strings(sec: Section, name: str, allowed: tuple[str, ...] | None = None) -> tuple[str, ...]:
    value = sec.get(name, list, [])
    if not all(isinstance(v, str) for v in value):
        raise sec.error(name, "expected a list of strings")
    if allowed is not None:
        for v in value:
            if v not in allowed:
                raise sec.error(name, f"{v!r} is not one of {', '.join(allowed)}")
    return tuple(value)


def _rule(sec: Section) -> AlertRule:
    sec.reject_unknown({"name", "kind", "for_s", "clear_after_s", "min_hold_s", "kinds",
                        "min_duration_class", "itic_regions", "min_severity", "min_units",
                        "window_s", "channels", "sites"})
    kind = sec.choice("kind", RULE_KINDS)
    name = sec.get("name", str, kind)
    if not topics.valid_id(name):
        raise sec.error("name", f"{name!r} is not a valid id (letters, digits, _ . -)")
    duration_class = sec.optional("min_duration_class", str)
    if duration_class is not None and duration_class not in DURATION_CLASSES:
        raise sec.error("min_duration_class", f"must be one of {', '.join(DURATION_CLASSES)}")
    severity = sec.optional("min_severity", float)
    if severity is not None and not severity >= 0:
        raise sec.error("min_severity", "must be >= 0")
    min_units = sec.get("min_units", int, 3)
    if min_units < 2:
        raise sec.error("min_units", "must be at least 2 (a fleet event is several units)")
    return AlertRule(
        name=name, kind=kind,
        for_s=_positive(sec, "for_s", 0.0),
        clear_after_s=_positive(sec, "clear_after_s", 300.0),
        min_hold_s=_positive(sec, "min_hold_s", 300.0),
        kinds=_strings(sec, "kinds", EVENT_KINDS),
        min_duration_class=duration_class,
        itic_regions=_strings(sec, "itic_regions", ITIC_OUTSIDE),
        min_severity=severity,
        min_units=min_units,
        window_s=_positive(sec, "window_s", SIMULTANEITY_WINDOW_S),
        channels=_strings(sec, "channels", CHANNELS),
        sites=_strings(sec, "sites"),
    )


def load_alert_settings(sec: Section) -> AlertSettings:
    """``[alerts]`` of a collector configuration (``sec.path`` is the file)."""
    sec.reject_unknown({"rule", "mqtt", "webhook", "email", "tick_s", "offline_after_s",
                        "retry_min_s", "retry_max_s"})
    rules = tuple(_rule(r) for r in sec.sections("rule"))
    names = [r.name for r in rules]
    for i, name in enumerate(names):
        if name in names[:i]:
            raise sec.error(f"rule[{i}].name", f"{name!r} is used by an earlier rule")
    webhook = None
    if sec.has("webhook"):
        w = sec.section("webhook")
        w.reject_unknown({"url", "timeout_s", "headers"})
        url = w.get("url", str, required=True)
        if not url.startswith(("http://", "https://")):
            raise w.error("url", "must start with http:// or https://")
        headers = w.get("headers", dict, {})
        if not all(isinstance(v, str) for v in headers.values()):
            raise w.error("headers", "expected a table of strings")
        webhook = WebhookSettings(url, _positive(w, "timeout_s", 10.0, zero=False),
                                  {str(k): str(v) for k, v in headers.items()})
    email = None
    if sec.has("email"):
        m = sec.section("email")
        m.reject_unknown({"host", "port", "from", "to", "starttls", "ssl", "username",
                          "password_file", "timeout_s"})
        to = _strings(m, "to")
        if not to:
            raise m.error("to", "at least one recipient is required")
        use_ssl = m.get("ssl", bool, False)
        starttls = m.get("starttls", bool, not use_ssl)
        if use_ssl and starttls:
            raise m.error("starttls", "ssl = true already encrypts; set one of them")
        port = m.get("port", int, 465 if use_ssl else 587)
        if not 1 <= port <= 65535:
            raise m.error("port", "must be 1..65535")
        username = m.optional("username", str)
        password = read_secret_file(m, "password_file") if m.has("password_file") else None
        if password is not None and username is None:
            raise m.error("username", "required with password_file")
        email = EmailSettings(host=m.get("host", str, required=True), port=port,
                              sender=m.get("from", str, required=True), to=to,
                              starttls=starttls, ssl=use_ssl, username=username,
                              password=password,
                              timeout_s=_positive(m, "timeout_s", 20.0, zero=False))
    settings = AlertSettings(
        rules=rules, mqtt=sec.get("mqtt", bool, True), webhook=webhook, email=email,
        tick_s=_positive(sec, "tick_s", 30.0, zero=False),
        offline_after_s=_positive(sec, "offline_after_s", OFFLINE_AFTER_S, zero=False),
        retry_min_s=_positive(sec, "retry_min_s", 5.0, zero=False),
        retry_max_s=_positive(sec, "retry_max_s", 900.0, zero=False),
    )
    for i, rule in enumerate(rules):
        if not settings.channels_for(rule):
            raise sec.error(f"rule[{i}].channels", "none of its channels is configured")
    return settings
