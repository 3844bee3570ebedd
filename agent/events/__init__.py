"""The events stage: Urms(1/2) → dips, swells and interruptions, waveform captures around
them, an on-disk journal of open events, and their classification.

- :mod:`agent.events.detector` — :class:`EventDetector`, the IEC 61000-4-30 state machine;
- :mod:`agent.events.capture` — :class:`CaptureRecorder`, pre/post-trigger raw captures;
- :mod:`agent.events.persist` — :class:`OpenEventJournal`, power-loss recovery;
- :mod:`agent.events.classify` — IEEE 1159 / ITIC / SEMI F47 / EN 50160 / IEEE 1564 tables.
"""
