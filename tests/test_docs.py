"""The contributor guide's copy of the classification boundary table is the code's table."""

from __future__ import annotations

from pathlib import Path

from agent.events.classify import boundary_table_markdown

ROOT = Path(__file__).resolve().parents[1]


def test_developers_guide_boundary_table_is_current() -> None:
    text = (ROOT / "DEVELOPERS.md").read_text()
    start = text.index("<!-- boundary-table:start -->") + len("<!-- boundary-table:start -->")
    end = text.index("<!-- boundary-table:end -->")
    assert text[start:end].strip() == boundary_table_markdown().strip()


def test_readme_states_the_safety_caution_and_no_class_a_claim() -> None:
    readme = (ROOT / "README.md").read_text()
    flat = " ".join(readme.replace(">", " ").split())
    assert "Mains voltage can kill" in flat and "licensed electrician" in flat
    assert "local electrical code" in flat
    # IEC 61000-4-30 Class A needs a certified instrument: the project only uses its methods.
    for line in readme.splitlines():
        if "Class A" in line:
            assert "method" in line or "not a certified" in line or "not" in line, line
