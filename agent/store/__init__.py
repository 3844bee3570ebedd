"""The collector's recorder store (SQLite or PostgreSQL), its time-series export and the
COMTRADE export of stored captures: :mod:`agent.store.recorder`, :mod:`agent.store.db`,
:mod:`agent.store.export`, :mod:`agent.store.comtrade`."""
