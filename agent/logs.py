"""Structured JSON logs (structlog) for the long-running commands, one object per line.

Secrets never reach the log: no component logs credentials, and this processor chain also
blanks any key that looks like one, as a second line of defence.
"""

from __future__ import annotations

import logging
import sys
from collections.abc import MutableMapping
from typing import Any, TextIO

import structlog

# A log key containing one of these is replaced before the line is rendered.
SECRET_MARKERS = ("password", "passwd", "secret", "token", "key")


def redact_secrets(
    _logger: Any, _name: str, event: MutableMapping[str, Any]
) -> MutableMapping[str, Any]:
    for key in list(event):
        if key != "event" and any(m in key.lower() for m in SECRET_MARKERS):
            event[key] = "<redacted>"
    return event


def configure(level: str | int = "info", stream: TextIO | None = None) -> None:
    """Route structlog to ``stream`` (default stderr) as JSON lines with UTC timestamps;
    journald keeps them as they are."""
    if isinstance(level, str):
        level = logging.getLevelNamesMapping()[level.upper()]
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            redact_secrets,
            structlog.processors.format_exc_info,
            structlog.processors.JSONRenderer(sort_keys=True),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(level),
        logger_factory=structlog.PrintLoggerFactory(stream or sys.stderr),
        cache_logger_on_first_use=False,
    )
