"""The live page: a read-only ASGI app (Starlette) over the recorder store.

Every HTML page has a JSON twin under ``/api/v1/`` and the API is described by an OpenAPI
document at ``/api/v1/openapi.json``. Pages render what :mod:`agent.render` and the verdicts
produce; nothing here writes to the store.
"""
