"""The ``--html DIR`` option of ``halfcycle report``, ``analyze`` and ``demo``: checks the
folder and the time zone, writes the static report, prints where it is."""

from __future__ import annotations

import sys
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from agent.store.recorder import RecorderStore

INVENTED = ("INVENTED DATA: a made-up scenario, not measurements of any real home, feeder "
            "or utility.")


class HtmlOptionError(ValueError):
    """``--html`` / ``--tz`` cannot be used as given (one line)."""


def check_zone(tz_name: str) -> None:
    """``--tz``: an IANA time zone name, or HtmlOptionError (one line)."""
    from agent.render.pages import zone

    try:
        zone(tz_name)
    except ValueError as exc:
        raise HtmlOptionError(f"--tz: {exc}") from None


def _check(out_dir: str, tz_name: str) -> Path:
    check_zone(tz_name)
    root = Path(out_dir)
    if root.exists() and not root.is_dir():
        raise HtmlOptionError(f"--html {root}: exists and is not a folder")
    if root.is_dir() and (root / "index.html").exists() and not (root / "assets").is_dir():
        raise HtmlOptionError(f"--html {root}: holds an index.html that is not a halfcycle "
                              "report; choose another folder")
    try:
        root.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise HtmlOptionError(f"--html {root}: {exc}") from None
    return root


def write_html_for_store(store: RecorderStore, out_dir: str, tz_name: str, *,
                         report: Mapping[str, Any] | None = None, invented: bool = False,
                         **options: Any) -> Path:
    from agent.render.static import write_store_report

    root = _check(out_dir, tz_name)
    index = write_store_report(store, root, tz_name=tz_name, report=report,
                               invented=INVENTED if invented else None, **options)
    print(f"HTML report: {index.resolve()}", file=sys.stderr, flush=True)
    return index


def write_html_for_analysis(result: Mapping[str, Any], out_dir: str, tz_name: str, *,
                            invented: bool = False) -> Path:
    from agent.render.static import write_analysis_report

    root = _check(out_dir, tz_name)
    index = write_analysis_report(result, root, tz_name=tz_name,
                                  invented=INVENTED if invented else None)
    print(f"HTML report: {index.resolve()}", file=sys.stderr, flush=True)
    return index
