"""Lower layers never import higher ones (the project's architecture rule, DEVELOPERS.md):
the math knows nothing of MQTT, SQL or HTTP, and the store knows nothing of the collector."""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

AGENT = Path(__file__).resolve().parents[1] / "agent"

#: package → packages of ``agent`` it must never import.
FORBIDDEN = {
    "measurement": {"wire", "publish", "store", "collect", "alerts", "report", "render", "web",
                    "cli", "ops", "broker"},
    "events": {"wire", "publish", "store", "collect", "alerts", "report", "render", "web",
               "cli", "ops", "broker"},
    "verdicts": {"wire", "publish", "store", "collect", "alerts", "report", "render", "web",
                 "cli", "ops", "broker"},
    "wire": {"publish", "store", "collect", "alerts", "report", "render", "web", "cli"},
    "store": {"collect", "alerts", "report", "render", "web", "cli", "publish"},
    "report": {"render", "web", "cli"},
    "render": {"web", "cli"},
}


def _imports(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    found: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names = [node.module]
        elif isinstance(node, ast.Import):
            names = [a.name for a in node.names]
        else:
            continue
        for name in names:
            parts = name.split(".")
            if parts[0] == "agent" and len(parts) > 1:
                found.add(parts[1])
    return found


@pytest.mark.parametrize("package", sorted(FORBIDDEN))
def test_package_imports_no_higher_layer(package: str) -> None:
    bad = [f"{p.relative_to(AGENT.parent)} imports agent.{name}"
           for p in sorted((AGENT / package).rglob("*.py"))
           for name in sorted(_imports(p) & FORBIDDEN[package])]
    assert bad == []
