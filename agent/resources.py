"""Locate the top-level ``schemas/`` and ``broker-config/`` folders.

In a source checkout (editable install) they sit beside the ``agent`` package; an installed
wheel carries copies under ``agent/_bundled/`` (see ``[tool.hatch.build...force-include]``).
"""

from __future__ import annotations

from pathlib import Path

_PKG = Path(__file__).resolve().parent


def _find(name: str) -> Path:
    for candidate in (_PKG / "_bundled" / name, _PKG.parent / name):
        if candidate.is_dir():
            return candidate
    raise FileNotFoundError(f"halfcycle resource folder {name!r} not found beside {_PKG}")


def schemas_dir() -> Path:
    """Folder holding the JSON Schemas and the serial frame spec."""
    return _find("schemas")


def broker_config_dir() -> Path:
    """Folder holding the Mosquitto configuration templates."""
    return _find("broker-config")


def examples_dir() -> Path:
    """Folder holding the bundled, invented example scenarios and recordings."""
    return _PKG / "examples"
