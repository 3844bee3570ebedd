"""The one exception every wire decode or validation failure raises."""

from __future__ import annotations


class WireError(ValueError):
    """A message that cannot be encoded, decoded or accepted.

    ``code`` is a short category for counting and dead-letter tables (``not_msgpack``,
    ``oversized``, ``unknown_version``, ``unknown_type``, ``schema``, ``non_finite``,
    ``array``, ``semantic``, ``capture``, ``encode``, ``topic``); ``reason`` is the full
    human-readable text, naming the JSON path of the offending value where there is one.
    """

    def __init__(self, reason: str, code: str = "schema") -> None:
        self.reason = reason
        self.code = code
        super().__init__(f"{code}: {reason}")
