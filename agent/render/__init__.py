"""Renderers: figures (matplotlib SVG) and HTML pages over the store and the verdicts.

Renderers only render: the answers come from ``agent.verdicts`` and the fleet report dict;
the figures draw data read from the store by :mod:`agent.render.data`. The static report
(:mod:`agent.render.static`) and the live page (:mod:`agent.web`) share every function here.
"""
