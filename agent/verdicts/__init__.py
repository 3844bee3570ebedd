"""Verdicts: answers as data.

Every verdict is a pure function over plain values (numpy arrays, floats, dicts of event
records) that returns a :class:`Verdict`.  It knows nothing of MQTT, SQL, HTTP or files; the
report, the CLI text, JSON, CSV, HTML and the live page only *render* these results, so every
view shows the same answer.

Layering: ``agent.verdicts`` may import ``agent.measurement`` and ``agent.events`` (pure
libraries) and nothing above them (not ``agent.store``, ``agent.collect``, ``agent.report``,
``agent.cli``).
"""

from __future__ import annotations

from agent.verdicts.base import INDICATIVE, Confidence, Verdict

__all__ = ["INDICATIVE", "Confidence", "Verdict"]
