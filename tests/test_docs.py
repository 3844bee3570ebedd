"""Documentation checks: the contributor guide's boundary table is the code's table; every
Markdown file and every CLI help text says "Class A" only in a sentence that denies
certification; the calibration steps say how to take the reference reading safely; nothing
points to a list of sources outside the repository (tests/SOURCES.md is the one list)."""

from __future__ import annotations

import argparse
import re
from collections.abc import Iterator
from pathlib import Path

from agent.cli.main import build_parser
from agent.events.classify import boundary_table_markdown

ROOT = Path(__file__).resolve().parents[1]
# Markdown files of the project (not of tools or caches).
MARKDOWN = sorted(p for p in ROOT.rglob("*.md")
                  if not any(part.startswith(".") or part in ("node_modules", "build", "dist")
                             for part in p.relative_to(ROOT).parts))


def test_developers_guide_boundary_table_is_current() -> None:
    text = (ROOT / "DEVELOPERS.md").read_text()
    start = text.index("<!-- boundary-table:start -->") + len("<!-- boundary-table:start -->")
    end = text.index("<!-- boundary-table:end -->")
    assert text[start:end].strip() == boundary_table_markdown().strip()


def _flat(text: str) -> str:
    return " ".join(text.replace(">", " ").split())


def test_readme_states_the_safety_caution() -> None:
    flat = _flat((ROOT / "README.md").read_text())
    assert "Mains voltage can kill" in flat and "licensed electrician" in flat
    assert "local electrical code" in flat


def _sentences(text: str) -> Iterator[str]:
    """Sentences of Markdown or help text: blocks split at blank lines and table cells, line
    prefixes (quote, heading, list marks) dropped, then split after . ! ? before a capital."""
    for block in re.split(r"\n\s*\n|\|", text):
        flat = " ".join(re.sub(r"^\s*(?:[>#*+-]\s*)+", "", line) for line in block.splitlines())
        for sentence in re.split(r"(?<=[.!?])\s+(?=[A-Z`*\[(\"])", flat):
            if sentence.strip():
                yield sentence.strip()


def _denies_certification(sentence: str) -> bool:
    return "certif" in sentence.lower() and re.search(r"\b(not|never|no)\b", sentence) is not None


def _help_texts() -> Iterator[tuple[str, str]]:
    """(command, help text) for ``halfcycle`` and every subcommand, however deep."""
    todo = [("halfcycle", build_parser())]
    while todo:
        name, parser = todo.pop()
        yield name, parser.format_help()
        for action in parser._actions:  # argparse keeps subparsers here, no public accessor
            if isinstance(action, argparse._SubParsersAction):
                todo.extend((f"{name} {sub}", p) for sub, p in action.choices.items())


def _class_a_claims(text: str) -> list[str]:
    return [s for s in _sentences(text) if "Class A" in s and not _denies_certification(s)]


def test_class_a_only_where_certification_is_denied() -> None:
    # IEC 61000-4-30 Class A is a certified instrument's class: the project implements the
    # methods and must never read as claiming the class (README; tests/SOURCES.md Safety).
    assert len(MARKDOWN) >= 5 and ROOT / "README.md" in MARKDOWN
    found = {str(p.relative_to(ROOT)): _class_a_claims(p.read_text()) for p in MARKDOWN}
    helps = dict(_help_texts())
    assert {"halfcycle", "halfcycle calibrate", "halfcycle analyze"} <= set(helps)
    found.update({f"`{cmd} --help`": _class_a_claims(text) for cmd, text in helps.items()})
    assert {k: v for k, v in found.items() if v} == {}
    # The check can fail: a bare claim is caught, a denial is not.
    assert _class_a_claims("It measures with Class A accuracy.")
    assert not _class_a_claims("It uses the Class A methods but is not a certified instrument.")


def test_calibration_steps_say_how_to_take_the_reference_reading_safely() -> None:
    # Mains voltage can kill (tests/SOURCES.md Safety): a licensed electrician with a meter
    # rated for the circuit, or a plug-in meter at a socket; never probe a live circuit.
    for path in (ROOT / "README.md", ROOT / "deploy" / "HARDWARE.md"):
        flat = _flat(path.read_text()).lower()
        phrases = ("licensed electrician", "rated for the circuit", "socket", "plug-in meter",
                   "never probe a live circuit")
        spots = [m.start() for m in re.finditer("reference reading", flat)]
        assert spots, path.name
        assert any(all(p in flat[i - 100:i + 600] for p in phrases) for i in spots), path.name


def test_no_pointer_to_a_source_list_outside_the_repository() -> None:
    # tests/SOURCES.md is the project's one list of sources and confidence.
    # (the patterns are built in pieces so this file does not match itself)
    outside = re.compile("|".join(("REFERENCE" + r"\.md", r"\.\./" + "shared",
                                   "/work/" + "shared")))
    hits = []
    for path in ROOT.rglob("*"):
        rel = path.relative_to(ROOT)
        if (path.is_file() and path.suffix in (".py", ".md", ".toml", ".json", ".txt", ".cfg")
                and not any(part.startswith(".") for part in rel.parts)):
            for n, line in enumerate(path.read_text(errors="replace").splitlines(), 1):
                if outside.search(line):
                    hits.append(f"{rel}:{n}")
    assert hits == []
    # Confidence marks are written out in code and tests ("from memory"); only the list
    # itself uses the short marks.
    mark = re.compile(r"\s\(" + "mem" + r"\)")
    short = [str(p.relative_to(ROOT)) for p in list((ROOT / "agent").rglob("*.py"))
             + list((ROOT / "tests").rglob("*.py")) if mark.search(p.read_text())]
    assert short == []
