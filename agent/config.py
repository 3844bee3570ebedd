"""TOML configuration loading with errors that name the key and the file."""

from __future__ import annotations

import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any, TypeVar

T = TypeVar("T")


class ConfigError(ValueError):
    """A configuration problem; the message names the file and the dotted key."""

    def __init__(self, path: str | Path | None, key: str, problem: str) -> None:
        self.path = str(path) if path is not None else "<defaults>"
        self.key = key
        self.problem = problem
        super().__init__(f"{self.path}: {key}: {problem}")


def load_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file; a syntax error or a missing file becomes a :class:`ConfigError`."""
    p = Path(path)
    try:
        with p.open("rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(p, "<file>", "file not found") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(p, "<file>", f"not valid TOML: {exc}") from None


class Section:
    """A view of one table of a TOML document that reports bad keys with their full name.

    ``Section(doc, path).get("nominal_v", float, 230.0)`` returns the value, checking its type;
    unknown keys can be rejected with :meth:`reject_unknown`.
    """

    def __init__(self, data: Mapping[str, Any], path: str | Path | None, prefix: str = "") -> None:
        self.data = data
        self.path = path
        self.prefix = prefix

    def key(self, name: str) -> str:
        return f"{self.prefix}.{name}" if self.prefix else name

    def error(self, name: str, problem: str) -> ConfigError:
        return ConfigError(self.path, self.key(name), problem)

    def has(self, name: str) -> bool:
        return name in self.data

    def get(
        self, name: str, kind: type[T], default: T | None = None, *, required: bool = False
    ) -> T:
        if name not in self.data:
            if required or default is None:
                raise self.error(name, "required key is missing")
            return default
        value = self.data[name]
        if kind is float and isinstance(value, int) and not isinstance(value, bool):
            value = float(value)
        if not isinstance(value, kind) or (kind is not bool and isinstance(value, bool)):
            raise self.error(
                name, f"expected {kind.__name__}, got {type(value).__name__} {value!r}"
            )
        return value

    def optional(self, name: str, kind: type[T]) -> T | None:
        if name not in self.data:
            return None
        return self.get(name, kind, required=True)

    def choice(self, name: str, choices: tuple[str, ...], default: str | None = None) -> str:
        value = self.get(name, str, default, required=default is None)
        if value not in choices:
            raise self.error(name, f"must be one of {', '.join(choices)}; got {value!r}")
        return value

    def section(self, name: str, *, required: bool = False) -> Section:
        if name not in self.data:
            if required:
                raise self.error(name, "required table is missing")
            return Section({}, self.path, self.key(name))
        value = self.data[name]
        if not isinstance(value, Mapping):
            raise self.error(name, f"expected a table, got {type(value).__name__}")
        return Section(value, self.path, self.key(name))

    def sections(self, name: str) -> list[Section]:
        """An array of tables (``[[name]]``)."""
        value = self.data.get(name, [])
        if not isinstance(value, list) or not all(isinstance(v, Mapping) for v in value):
            raise self.error(name, "expected an array of tables")
        return [Section(v, self.path, f"{self.key(name)}[{i}]") for i, v in enumerate(value)]

    def reject_unknown(self, allowed: set[str]) -> None:
        for name in self.data:
            if name not in allowed:
                raise self.error(name, f"unknown key (allowed: {', '.join(sorted(allowed))})")
