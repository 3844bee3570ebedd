"""The static report: ``DIR/index.html`` with its figures (SVG), COMTRADE files and assets in
one folder that opens from disk with no network."""

from __future__ import annotations

import re
import shutil
import time
from collections.abc import Callable, Mapping
from datetime import tzinfo
from pathlib import Path
from typing import Any

import numpy as np

from agent import __version__
from agent.render import data, figures, pages
from agent.render.figures import Figure
from agent.report.fleet import fleet_report
from agent.report.now import fleet_now
from agent.store.comtrade import write_comtrade
from agent.store.recorder import RecorderStore

_SAFE = re.compile(r"[^A-Za-z0-9_.-]")


def _safe(name: str) -> str:
    return _SAFE.sub("_", name)


class _Folder:
    """The report folder: figures are written once each and referenced by relative path."""

    def __init__(self, root: Path) -> None:
        self.root = root
        for sub in ("figures", "comtrade", "assets"):
            (root / sub).mkdir(parents=True, exist_ok=True)
        for asset in pages.STATIC_DIR.iterdir():
            if asset.is_file():
                shutil.copyfile(asset, root / "assets" / asset.name)
        self.srcs: dict[int, str] = {}
        self.count = 0

    def figure(self, fig: Figure, prefix: str = "") -> Figure:
        name = _safe(f"{prefix}{fig.name}") + ".svg"
        (self.root / "figures" / name).write_text(fig.svg, encoding="utf-8")
        self.srcs[id(fig)] = f"figures/{name}"
        self.count += 1
        return fig

    def src(self, fig: Figure) -> str:
        return self.srcs[id(fig)]


def _render(folder: _Folder, tz: tzinfo, tz_name: str, title: str, heading: str, lede: str,
            sections: list[dict[str, Any]], invented: str | None, show_indicative: bool
            ) -> Path:
    env = pages.environment()
    html = env.get_template("report.html").render(
        title=title, heading=heading, lede=lede, sections=sections, nav=[],
        asset_base="assets/", tz_name=tz_name, version=__version__,
        footer="static report; opens from disk, no network",
        when=lambda t: pages.when(t, tz), fig_src=folder.src,
        capture_href=lambda c, _device: f"#capture-{c}", unit_href=None,
        invented=invented, show_indicative=show_indicative)
    index = folder.root / "index.html"
    index.write_text(html, encoding="utf-8")
    return index


def write_store_report(store: RecorderStore, out_dir: str | Path, *, tz_name: str = "UTC",
                       now: float | None = None, start_utc: float | None = None,
                       end_utc: float | None = None, default_nominal_v: float | None = None,
                       report: Mapping[str, Any] | None = None,
                       invented: str | None = None) -> Path:
    """Write the fleet report of ``store`` as ``out_dir/index.html``; returns its path.

    ``report``: a fleet report dict already computed for the same period (else computed
    here with :func:`agent.report.fleet.fleet_report`)."""
    tz = pages.zone(tz_name)
    now = time.time() if now is None else now
    if report is None:
        report = fleet_report(store, now=now, default_nominal_v=default_nominal_v,
                              start_utc=start_utc, end_utc=end_utc)
    folder = _Folder(Path(out_dir))
    fig = folder.figure
    now_rows = pages.fleet_now_rows(pages.add_last_events(
        [v.as_dict() for v in fleet_now(store, now, default_nominal_v=default_nominal_v)],
        store.events(start_from=start_utc, start_before=end_utc)))
    fleet_figs = [fig(f) for f in pages.fleet_figures(store, report, tz, start_utc, end_utc)]
    by_name = {f.name: f for f in fleet_figs}
    fleet_events = report.get("fleet_events") or []
    sections: list[dict[str, Any]] = [
        {"id": "now", "title": "Units now", "now": now_rows,
         "intro": f"State of every unit when the report was written "
                  f"({pages.iso_utc(now)} UTC)."},
        {"id": "fleet", "title": "Fleet",
         "figures": [by_name["fleet-timeline"], by_name["sarfi"], by_name["interruptions"]],
         "table": {"head": ["start", "kinds", "homes", "share", "worst [pu]",
                            "worst home", "spread [s]"],
                   "rows": [[pages.when(e.get("start_utc"), tz),
                             ", ".join(e.get("kinds") or []), e.get("homes"), e.get("share"),
                             e.get("worst_level_pu"), e.get("worst_device"), e.get("spread_s")]
                            for e in fleet_events]}
         if fleet_events else None},
        {"id": "curves", "title": "Events against equipment curves",
         "figures": [by_name["itic"], by_name["semi-f47"]]},
        {"id": "solar", "title": "Solar: swells and inverter trips",
         "figures": [by_name["swells-trips"]]},
        {"id": "verdicts", "title": "Fleet verdicts",
         # Every fleet-level verdict in the report, wherever it sits; each home's own are in
         # its section, the "now" list is the table above.
         "verdicts": list(pages.verdict_rows({k: v for k, v in report.items()
                                              if k not in ("now", "devices")}))},
    ]
    for dev in store.devices():
        unit = pages.unit_context(store, dev["device"])
        prefix = f"{dev['device']}-"
        unit_events = [e for e in unit["events"]
                       if (start_utc is None or (e.get("start_utc") or 0) >= start_utc)
                       and (end_utc is None or (e.get("start_utc") or 0) < end_utc)]
        waves = []
        for ev in unit_events:
            for cid, wf in pages.event_figures(store, unit, ev):
                capture = store.capture(cid)
                cfg, dat = write_comtrade(capture, folder.root / "comtrade",
                                          station=str(unit["site"]), rec_dev_id=dev["device"],
                                          line_hz=float(unit["nominal_hz"] or 50.0))
                waves.append({"capture_id": cid, "figure": fig(wf, prefix),
                              "cfg": f"comtrade/{cfg.name}", "dat": f"comtrade/{dat.name}"})
        nominal = unit["nominal_v"]
        section: Mapping[str, Any] = next((d for d in report.get("devices") or []
                                           if d.get("device") == dev["device"]), {})
        sections.append({
            "id": f"unit-{_safe(dev['device'])}", "title": f"Home {dev['device']}",
            "intro": f"site {unit['site']}; declared {nominal:g} V" if nominal else
                     f"site {unit['site']}; declared voltage unknown",
            "figures": [fig(f, prefix) for f in pages.unit_figures(store, unit, tz, start_utc,
                                                                   end_utc)],
            "verdicts": list(pages.verdict_rows(section)),
            "events": [pages.event_row(e) for e in unit_events], "waves": waves})
    return _render(folder, tz, tz_name, "Supply report", "Supply report",
                   f"{len(store.devices())} homes; period "
                   f"{(report.get('period_requested') or {}).get('start') or 'all stored'} to "
                   f"{(report.get('period_requested') or {}).get('end') or 'now'}; "
                   f"{folder.count} figures.",
                   sections, invented, show_indicative=True)


def write_analysis_report(result: Mapping[str, Any], out_dir: str | Path, *,
                          tz_name: str = "UTC", origin_utc: float = 0.0,
                          invented: str | None = None) -> Path:
    """Write the offline analysis of one recording (``halfcycle analyze`` result) as
    ``out_dir/index.html``. Times in the file count from ``origin_utc``."""
    tz = pages.zone(tz_name)
    folder = _Folder(Path(out_dir))
    events = [{"kind": e.get("type"), "duration_s": e.get("duration_s"),
               "level_pu": e.get("level_pu"), "level_v": e.get("level_v"),
               "start_utc": origin_utc + float(e.get("start_s") or 0.0),
               "classification": {"ieee1159_category": (e.get("ieee1159") or "").split(" ")[-1]
                                  or None,
                                  "ieee1159_duration_class": (e.get("ieee1159") or "").split(
                                      " ")[0] if " " in (e.get("ieee1159") or "") else None,
                                  "itic_region": e.get("itic"), "semi_f47": e.get("semi_f47")},
               "captures": []} for e in result.get("events") or []]
    rms = result.get("rms_10_12") or []
    series = None
    if rms:
        series = data.Series(np.array([origin_utc + float(r["t"]) for r in rms]),
                             np.array([[np.nan if x is None else float(x) for x in r["v"]]
                                       for r in rms]),
                             0.2, np.array([bool(r.get("flagged")) for r in rms]),
                             tuple(result.get("channel_names") or ()))
    bands = data.bands_for(float(result["nominal_v"]), float(result["nominal_hz"]))
    fig = folder.figure
    figs = [fig(figures.itic(events)), fig(figures.semi_f47(events)),
            fig(figures.profile(series, bands, tz)), fig(figures.histogram(series, bands)),
            fig(figures.swells_vs_trips(events))]
    sections = [{"id": "curves", "title": "Events against equipment curves",
                 "figures": figs[:2], "events": [pages.event_row(e) for e in events]},
                {"id": "profile", "title": "RMS over the recording", "figures": figs[2:4]},
                {"id": "solar", "title": "Swells and inverter trips", "figures": figs[4:]}]
    return _render(folder, tz, tz_name, "Recording analysis", "Recording analysis",
                   f"{result.get('source')}: {float(result.get('duration_s') or 0):.1f} s at "
                   f"{float(result.get('sample_rate') or 0):g} S/s, declared "
                   f"{float(result['nominal_v']):g} V {float(result['nominal_hz']):g} Hz; "
                   f"{len(events)} events; {folder.count} figures.",
                   sections, invented, show_indicative=False)


FigureSource = Callable[[Figure], str]
