"""The fleet report as text: tables, one section per question. Renders the report dict of
:func:`agent.report.fleet.fleet_report` and computes nothing of its own."""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any


def category_tag(classification: Mapping[str, Any] | None) -> str:
    """IEEE 1159 category with its duration class, e.g. ``momentary sag``."""
    c = classification or {}
    cat = c.get("ieee1159_category")
    if not cat:
        return "unclassified"
    dur = c.get("ieee1159_duration_class")
    return f"{dur} {cat}" if dur and dur != cat and cat in ("sag", "swell", "interruption") \
        else str(cat)


def _table(headers: Sequence[str], rows: Sequence[Sequence[Any]]) -> list[str]:
    cells = [[("-" if c is None else str(c)) for c in row] for row in rows]
    widths = [max(len(h), *(len(r[i]) for r in cells)) if cells else len(h)
              for i, h in enumerate(headers)]
    line = "  ".join(h.ljust(w) for h, w in zip(headers, widths, strict=True))
    out = [line, "  ".join("-" * w for w in widths)]
    out += ["  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)) for r in cells]
    return out


def _names(devices: Sequence[str], most: int = 6) -> str:
    """Device names for a table cell; a long list is cut (the JSON report has them all)."""
    shown = ", ".join(devices[:most])
    return shown if len(devices) <= most else f"{shown} ... (+{len(devices) - most} more)"


def _pu(x: float | None) -> str | None:
    return None if x is None else f"{x:.3f}"


def _word(v: Mapping[str, Any] | None) -> str | None:
    return None if v is None else str(v.get("verdict", "-")).replace("_", " ")


def _pct(x: float | None) -> str | None:
    return None if x is None else f"{100 * x:.1f} %"


def _fleet_events(report: Mapping[str, Any]) -> list[str]:
    lines = ["== Events seen by many homes at once (likely upstream: feeder or "
             "transmission) =="]
    if report["fleet_events"]:
        lines += _table(
            ("start (UTC)", "kind", "homes", "feeder", "worst pu", "longest s", "spread s",
             "devices"),
            [(f["start"], "+".join(f["kinds"]), f"{f['homes']}/{f['homes_monitored']}",
              None if not f["feeder"] else f"{f['feeder']} ({f['homes']}/{f['homes_on_feeder']})",
              _pu(f["worst_level_pu"]), f["longest_s"], f["spread_s"], _names(f["devices"]))
             for f in report["fleet_events"]])
    else:
        lines.append("none: no event started on two or more homes together")
    ta = report["temporal_aggregates"]
    lines += [f"IEEE 1564 temporal aggregation ({ta['window_s']:.0f} s): {ta['fleet_events']} "
              f"fleet events -> {ta['fleet_aggregates']} aggregates;",
              f"  {ta['per_home_events']} home events -> {ta['per_home_aggregates']} counted "
              "for SARFI (sags and swells aggregated apart)", ""]
    lines.append("== How many homes saw sags, swells and curve violations (IEEE 1564 SARFI) ==")
    s = report["sarfi"]
    if "index" in s:
        keys = list(s["index"])
        lines += _table(("index", *keys, "SARFI-ITIC", "ITIC swell"),
                        [("homes (N_i)", *(s["counts"][k] for k in keys), s["itic_count"],
                          s["itic_swell_count"]),
                         ("per home monitored", *(f"{s['index'][k]:.3f}" for k in keys),
                          f"{s['SARFI-ITIC']:.3f}", f"{s['ITIC-swell']:.3f}")])
        lines.append(f"over {s['homes_monitored']} homes monitored; open events not counted: "
                     f"{s['skipped_open']}. SARFI-ITIC: sags below the ITIC curve (IEEE 1564);")
        lines.append("  ITIC swell: swells above the curve, counted apart.")
    lines.append("")
    return lines


def _solar(report: Mapping[str, Any]) -> list[str]:
    lines = ["== Overvoltage and swells (solar installers) =="]
    rows: list[tuple[Any, ...]] = []
    for d in report["devices"]:
        ov = d.get("overvoltage")
        swell = d.get("max_swell")
        days = (ov or {}).get("max_per_day") or {}
        nominal = d.get("nominal_v")
        rows.append((
            d["device"],
            None if swell is None else f"{swell['level_pu']:.3f} ({swell['level_v']} V)",
            None if ov is None else ov["seconds_above"],
            None if ov is None else ov["seconds_peak_above"],
            None if ov is None else (f"{ov['ten_min_above']}/{ov['ten_min_means']}"
                                     if ov["ten_min_means"] else "n/a (<10 min)"),
            "; ".join(f"{k} {v:.1f} V" + (f" ({v / nominal:.3f} pu)" if nominal else "")
                      for k, v in sorted(days.items())) or None,
        ))
    lines += _table(("home", "max swell pu", "s mean>1.10", "s peak>1.10", "10-min>1.10",
                     "highest per day"), rows)
    lines += ["1.10 pu: EN 50549-1 10-min mean trip level (from memory); every value counted,",
              "  flagged ones too. 10-min column: means above 1.10 pu / means available.", ""]
    settings = report.get("settings") or {}
    lines.append(f"== Would the inverter have tripped? (IEEE 1547-2018 category "
                 f"{settings.get('inverter_category', 'II')} defaults; EN 50549-1 for 50-Hz "
                 "homes) ==")
    rows = []
    for d in report["devices"]:
        inv = d.get("inverter")
        if inv is None:
            continue
        trips = [e for e in inv["per_event"] if e["result"] != "ride_through"]
        en = inv.get("en50549_1") or {}
        rows.append((d["device"], _word(inv), f"{len(trips)}/{len(inv['per_event'])}",
                     len(inv["sustained"]),
                     None if not en else f"{en['above']}/{en['means']}",
                     ", ".join(f"{k} {v.replace('_', ' ')}" for k, v in inv["per_day"].items()
                               if v != "ride_through") or None))
    lines += _table(("home", "verdict", "events trip", "sustained trips",
                     "EN 50549-1 10-min>1.10", "days"), rows)
    lines += ["A setting trips when the voltage is beyond it for its clearing time (IEEE 1547-2018",
              "  Tables 11/12 defaults, published); 'may trip': beyond a setting past the event",
              "  threshold, time beyond it unknown (at most the event's duration).", ""]
    return lines


def _compliance(report: Mapping[str, Any]) -> list[str]:
    lines = ["== Service voltage compliance =="]
    rows: list[tuple[Any, ...]] = []
    details: list[str] = []
    for d in report["devices"]:
        c = d.get("compliance")
        nominal = d.get("nominal_v")
        name = None if nominal is None else f"{nominal:g} ({d['nominal_source']})"
        if c is None:
            rows.append((d["device"], name, d.get("measurement_point"), "no data", None, None,
                         None, None, None))
            continue
        basis = c["basis"]
        ansi = c["standard"] == "ANSI C84.1"
        r = c["range_a"] if ansi else c["band"]
        ex = c.get("excursions") or {}
        rows.append((
            d["device"], name, d.get("measurement_point"), _word(c),
            f"{basis.get('count', 0)} x {basis.get('values')}",
            f"{basis.get('flagged', 0)} ({_pct(basis.get('flagged_share')) or '-'})",
            _pct(r["fraction_inside"]), f"{r['low_v']:.1f}-{r['high_v']:.1f} V",
            (f"{len(ex.get('longer_than_60s', []))}/{len(ex.get('longer_than_600s', []))}"
             if ansi and ex else None)))
        for e in ex.get("longer_than_60s", []):
            details.append(f"  {d['device']}: {e['extreme_v']:.1f} V ({e['side']}) for "
                           f"{e['duration_s']:.0f} s from {e['start']}"
                           + (" - outside Range B" if e.get("outside_b") else ""))
        for w in c.get("weeks") or []:
            if w.get("passed") is False:
                details.append(f"  {d['device']}: week {w['week']} fails ({w['failed_rule']}; "
                               f"{_pct(w['fraction_within_10pct'])} within ±10 %, "
                               f"{w['count']} means)")
        for note in c.get("notes") or []:
            details.append(f"  {d['device']}: {note}")
    lines += _table(("home", "nominal V", "point", "verdict", "judged", "flagged (judged)",
                     "inside", "limits", "excursions >1/>10 min"), rows)
    if details:
        lines.append("sustained excursions, failing weeks and notes:")
        lines += details
    lines += [
        "ANSI C84.1 (60-Hz homes): window means (averaging window: common practice) against",
        "  Range A / B; Range A service limits published, utilization and Range B from memory.",
        "  Excursions: runs of per-second values outside Range A longer than 1 and 10 min.",
        "EN 50160 (50-Hz homes): per calendar week, 95 % of 10-min means within Un +-10 %,",
        "  all within +10/-15 %; a week with fewer than 1008 means is provisional.",
        "Every value is judged, flagged ones included; the flagged share is shown.", ""]
    return lines


def _profile_supply(report: Mapping[str, Any]) -> list[str]:
    lines = ["== Voltage profile (10-min means; percentiles, daily range) =="]
    rows = []
    for d in report["devices"]:
        p = d.get("profile")
        if p is None:
            continue
        pct = p["percentiles_v"]
        days = p["daily"]
        rows.append((d["device"], *(pct[k] for k in ("p1", "p5", "p50", "p95", "p99")),
                     f"{min(x['min_v'] for x in days.values()):.1f}-"
                     f"{max(x['max_v'] for x in days.values()):.1f}" if days else None,
                     len(p["out_of_range"])))
    lines += _table(("home", "1 %", "5 %", "50 %", "95 %", "99 %", "min-max V",
                     "out-of-range periods"), rows) if rows else ["no 10-min means yet"]
    lines += ["", "== Frequency, THD and unbalance (where the home has the channels) =="]
    rows = []
    for d in report["devices"]:
        sup = d.get("supply") or {}
        if sup:
            rows.append((d["device"], _word(sup.get("frequency")), _word(sup.get("thd")),
                         None if "thd" not in sup else
                         f"{sup['thd']['basis']['orders'][0]}-{sup['thd']['basis']['orders'][1]}",
                         _word(sup.get("unbalance")),
                         None if "unbalance" not in sup else sup["unbalance"]["rule"]
                         .split(" ≤")[0]))
    lines += _table(("home", "frequency", "THD", "orders", "unbalance", "unbalance rule"),
                    rows) if rows else ["no per-second frequency, THD or unbalance values"]
    lines += ["EN 50160: frequency 10-s means within +-1 % for 99.5 % of a year, +4/-6 % always",
              "  (provisional under a year); THD <= 8 % and u2 <= 2 % for 95 % of each week;",
              "  split phase: NEMA max deviation from average <= 3 % (C84.1, from memory).", ""]
    return lines


def _interruptions(report: Mapping[str, Any]) -> list[str]:
    i = report.get("interruptions") or {}
    lines = ["== Interruptions (EN 50160 counts; IEEE 1366 indices over homes monitored) =="]
    if i:
        en, ieee = i["en50160"], i["ieee1366"]
        def show(x: Any, unit: str = "") -> str:
            return "-" if x is None else f"{x:g}{unit}"

        lines.append(f"EN 50160: {en['short']} short (<= 3 min), {en['long']} long")
        lines.append(f"IEEE 1366 (sustained > 5 min) over {i['basis']['homes_monitored']} "
                     f"homes: SAIFI {show(ieee['SAIFI'])}, SAIDI "
                     f"{show(ieee['SAIDI_min'], ' min')}, CAIDI {show(ieee['CAIDI_min'], ' min')}"
                     f", MAIFI {show(ieee['MAIFI'])}")
    lines.append("")
    return lines


def _attention(report: Mapping[str, Any]) -> list[str]:
    lines = ["== Units out of range, offline or without power (property managers) =="]
    now_rows = [(a["device"], a["site"], n["state"].replace("_", " "), n["since"], n["reason"])
                for a in report["attention"] for n in a["now"]]
    lines.append("now:")
    lines += _table(("home", "site", "state", "since", "why"), now_rows) if now_rows \
        else ["  none"]
    period = [(a["device"], a["site"], "; ".join(a["period"]))
              for a in report["attention"] if a["period"]]
    lines.append("in the period:")
    lines += _table(("home", "site", "what happened"), period) if period else ["  none"]
    if report["outage_windows"]:
        lines.append("outage windows (from restart reports and power-loss events):")
        lines += _table(("home", "from", "to", "s", "from reports"),
                        [(w["device"], w["start"], w["end"], w["duration_s"],
                          ", ".join(w["sources"])) for w in report["outage_windows"]])
    if report["site_outages"]:
        lines.append("site outages (most of a site's monitors out at once):")
        lines += _table(("site", "from", "to", "s", "homes out"),
                        [(o["site"], o["start"], o["end"], o["duration_s"],
                          f"{len(o['devices'])}/{o['devices_monitored']}")
                         for o in report["site_outages"]])
    lines.append("")
    return lines


def render_text(report: Mapping[str, Any]) -> str:
    """The report as readable text (tables), one section per question."""
    lines: list[str] = []
    if report.get("invented"):
        lines += ["*** INVENTED DATA: a made-up demo street, not measurements of any real "
                  "home, feeder or utility. ***", ""]
    homes = report["homes_monitored"]
    lines.append(f"halfcycle fleet report - {homes} homes monitored, sites: "
                 f"{', '.join(report['sites']) or '-'}; generated {report['generated']}")
    period = report["period"]
    lines.append(f"events from {period['first_event'] or '-'} to {period['last_event'] or '-'};"
                 f" last heard {period['last_seen'] or '-'}")
    lines.append(f"Verdicts are {report['indicative']}.")
    lines.append("")
    lines += _fleet_events(report)
    lines += _solar(report)
    lines += _compliance(report)
    lines += _profile_supply(report)
    lines += _interruptions(report)
    lines += _attention(report)
    lines.append("== Every home ==")
    lines += _table(
        ("home", "site", "state", "last seen", "events", "by IEEE 1159 category", "worst dip pu"),
        [(d["device"], d["site"], str(d["state"]) + (" (planned stop)" if d["planned_stop"]
                                                      else "")
          + ("" if d.get("monitored_in_period", True) else " (silent before the period)"),
          d["last_seen"], d["events"],
          ", ".join(f"{k} {v}" for k, v in sorted(d["events_by_category"].items())) or None,
          None if d["worst_dip"] is None else _pu(d["worst_dip"]["level_pu"]))
         for d in report["devices"]])
    st = report["store"]
    lines.append("")
    lines.append(f"store: {st['events']} events, {st['captures']} captures, {st['gaps']} gap "
                 f"notices, {st['dead_letters']} dead letters")
    unreadable = {d["device"]: d["trend_rows_unreadable"] for d in report["devices"]
                  if d["trend_rows_unreadable"]}
    if unreadable:
        lines.append(f"NOT USED: unreadable per-second rows {unreadable}")
    if st.get("events_not_correlated"):
        lines.append(f"NOT USED in fleet figures: {st['events_not_correlated']} events without "
                     "kind, start or level")
    for problem in report.get("outage_errors") or []:
        lines.append(f"NOT USED in outage windows: {problem}")
    return "\n".join(lines) + "\n"
