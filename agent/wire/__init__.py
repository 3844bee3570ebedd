"""The wire format: JSON Schemas (``schemas/*.schema.json``), msgpack codec, topic layout.

- :mod:`agent.wire.codec` — body builders, :class:`~agent.wire.codec.Identity`, ``encode`` /
  ``decode``, readers, capture chunking and :class:`~agent.wire.codec.CaptureAssembler`;
- :mod:`agent.wire.records` — :class:`~agent.wire.records.SummaryBatcher` (per-second
  records -> summary bodies) and ``per_second`` (measurement output -> per-second values);
- :mod:`agent.wire.validate` — the schema-driven validator the codec and the collector use;
- :mod:`agent.wire.topics` — ``hc/v1/{site}/{device}/{kind}`` and the shared subscription;
- :mod:`agent.wire.packing` — delta coding and bit packing of per-second arrays;
- :class:`agent.wire.errors.WireError` — every failure, with ``code`` and ``reason``.

Submodules are imported on use so that ``agent.wire.topics`` stays light.
"""
