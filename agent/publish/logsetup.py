"""JSON logs for the edge agent (structlog), one object per line.

Secrets never reach the log: the publisher logs no credentials, and this processor chain
also blanks any key that looks like one, as a second line of defence.
"""

from __future__ import annotations

import logging
import sys
from collections.abc import MutableMapping
from typing import Any, TextIO

import structlog

_SECRET_KEYS = ("password", "passwd", "secret", "token", "key")


def _redact(logger: Any, name: str, event: MutableMapping[str, Any]) -> MutableMapping[str, Any]:
    for k in list(event):
        if any(s in k.lower() for s in _SECRET_KEYS) and k != "event":
            event[k] = "<redacted>"
    return event


def configure_json_logging(stream: TextIO | None = None, level: int = logging.INFO) -> None:
    """Route structlog to ``stream`` (default stderr) as JSON lines with UTC timestamps."""
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            _redact,
            structlog.processors.format_exc_info,
            structlog.processors.JSONRenderer(sort_keys=True),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(level),
        logger_factory=structlog.PrintLoggerFactory(stream or sys.stderr),
        cache_logger_on_first_use=False,
    )
