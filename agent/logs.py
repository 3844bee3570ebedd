"""Structured JSON logs (structlog) for the long-running commands; secrets never logged."""

from __future__ import annotations

import logging
import sys
from collections.abc import MutableMapping
from typing import Any

import structlog

# Keys whose values are replaced before a log line is rendered.
SECRET_KEYS = frozenset({"password", "passwd", "secret", "token", "key_password", "auth"})


def redact_secrets(
    _logger: Any, _name: str, event: MutableMapping[str, Any]
) -> MutableMapping[str, Any]:
    for key in list(event):
        if key.lower() in SECRET_KEYS:
            event[key] = "***"
    return event


def configure(level: str = "info") -> None:
    """One JSON object per line on stderr (journald keeps them as they are)."""
    structlog.configure(
        processors=[
            structlog.contextvars.merge_contextvars,
            structlog.processors.add_log_level,
            structlog.processors.TimeStamper(fmt="iso", utc=True),
            redact_secrets,
            structlog.processors.format_exc_info,
            structlog.processors.JSONRenderer(sort_keys=True),
        ],
        wrapper_class=structlog.make_filtering_bound_logger(
            logging.getLevelNamesMapping()[level.upper()]
        ),
        logger_factory=structlog.PrintLoggerFactory(file=sys.stderr),
        cache_logger_on_first_use=True,
    )
