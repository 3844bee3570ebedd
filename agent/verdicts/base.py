"""The plain result every verdict returns."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Literal

#: How sure we are of the rule's numbers (see ``tests/SOURCES.md``):
#: ``pub`` seen in public summaries of the standard, ``mem`` from memory, ``cp`` common practice.
Confidence = Literal["pub", "mem", "cp"]

#: How each confidence mark reads in text and on pages.
CONFIDENCE_WORDS: dict[str, str] = {"pub": "published", "mem": "from memory",
                                    "cp": "common practice"}

#: Said once per report beside the verdicts, in every rendering.
INDICATIVE = ("indicative: a home monitor, not a certified instrument; "
              "not evidence of a utility's compliance")


@dataclass(frozen=True)
class Verdict:
    """One answer with its rule, basis and confidence.

    ``verdict`` is a short machine word (``pass``, ``fail``, ``range_a``, ``provisional`` ...);
    ``passed`` is True, False, or None where there is not enough data to say.  ``basis`` states
    which values were judged (window, count, flagged share ...); ``details`` carries the numbers
    a renderer may show (percentiles, lists of excursions ...).  Both hold plain JSON-able values.
    """

    rule: str
    verdict: str
    passed: bool | None
    confidence: Confidence
    basis: dict[str, Any] = field(default_factory=dict)
    details: dict[str, Any] = field(default_factory=dict)
    notes: tuple[str, ...] = ()

    def as_dict(self) -> dict[str, Any]:
        return {
            "rule": self.rule,
            "verdict": self.verdict,
            "passed": self.passed,
            "confidence": self.confidence,
            "basis": dict(self.basis),
            **dict(self.details),
            "notes": list(self.notes),
        }
