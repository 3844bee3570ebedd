"""Figures as SVG text, drawn with matplotlib (Agg backend, no display).

Each function takes plain data (from :mod:`agent.render.data`, the event rows of the store,
the fleet report dict) and returns a :class:`Figure`: the SVG and a caption that says what it
shows and the rule it is drawn against. Text stays text in the SVG (searchable, small).
"""

from __future__ import annotations

import io
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from datetime import datetime, tzinfo
from typing import Any

import matplotlib

matplotlib.use("Agg")  # headless: no display, no GUI toolkit

import numpy as np
from matplotlib.figure import Figure as MplFigure

from agent.render.data import Series, Trace
from agent.report.fleet import category_tag
from agent.verdicts.base import CONFIDENCE_WORDS
from agent.verdicts.inverter import IEEE1547_DEFAULTS
from agent.verdicts.limits import Band

# Our palette: slate ink on warm paper, one hue per IEEE 1159 family.
INK = "#22313a"
GRID = "#d9d4c7"
PAPER = "#fbfaf6"
BAND_COLOURS = ("#6aa37a", "#d8b25a")  # inner band, outer band
CATEGORY_COLOURS = {"sag": "#2f6db5", "interruption": "#8a3b8f", "swell": "#c2562b",
                    "undervoltage": "#4b8fa8", "overvoltage": "#a8763b"}
CHANNEL_COLOURS = ("#2f6db5", "#c2562b", "#3c8a55", "#8a3b8f")

# ITIC curve, 2000 revision (tests/SOURCES.md "ITIC curve", pub): the part from 20 ms on
# applies to RMS events; points are (duration [s], magnitude [pu]).
ITIC_UPPER = ((1e-3, 2.0), (3e-3, 1.4), (3e-3, 1.2), (0.5, 1.2), (0.5, 1.1), (100.0, 1.1))
ITIC_LOWER = ((0.02, 0.0), (0.02, 0.7), (0.5, 0.7), (0.5, 0.8), (10.0, 0.8), (10.0, 0.9),
              (100.0, 0.9))
# SEMI F47 ride-through envelope (tests/SOURCES.md "SEMI F47", pub): 50 % for 200 ms, 70 %
# for 0.5 s, 80 % for 1 s; nothing required below 50 ms, nothing beyond 1 s.
SEMI_F47 = ((0.05, 0.5), (0.2, 0.5), (0.2, 0.7), (0.5, 0.7), (0.5, 0.8), (1.0, 0.8))
# IEEE 1547-2018 Category II default over-voltage trips, from the inverter verdict's table
# (tests/SOURCES.md "IEEE 1547-2018 default trip settings", pub): (name, pu, clearing [s]).
INVERTER_OV_TRIPS = tuple((name, pu, clearing) for name, side, pu, clearing
                          in IEEE1547_DEFAULTS["II"] if side == "over")


@dataclass(frozen=True)
class Figure:
    name: str
    svg: str
    caption: str


def _new(width: float = 7.2, height: float = 3.2) -> tuple[MplFigure, Any]:
    fig = MplFigure(figsize=(width, height), facecolor=PAPER)
    ax = fig.add_subplot(1, 1, 1)
    ax.set_facecolor("white")
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.tick_params(colors=INK, labelsize=8)
    return fig, ax


def _svg(fig: MplFigure) -> str:
    buf = io.StringIO()
    fig.set_dpi(96)
    with matplotlib.rc_context({"svg.fonttype": "none", "svg.hashsalt": "halfcycle"}):
        fig.tight_layout()
        fig.savefig(buf, format="svg", facecolor=fig.get_facecolor())
    text = buf.getvalue()
    # Drop the XML prolog and DOCTYPE so the SVG works as a file and inline alike.
    return text[text.index("<svg"):]


def empty(name: str, message: str, caption: str) -> Figure:
    fig, ax = _new(7.2, 1.4)
    ax.axis("off")
    ax.text(0.5, 0.5, message, ha="center", va="center", color=INK, fontsize=10,
            transform=ax.transAxes)
    return Figure(name, _svg(fig), caption)


def _family(category: str) -> str:
    for fam in CATEGORY_COLOURS:
        if fam in category:
            return fam
    return "other"


def category_of(ev: Mapping[str, Any]) -> str:
    """IEEE 1159 category of a stored event, with its duration class (``momentary sag``)."""
    return category_tag(ev.get("classification"))


def _event_points(events: Sequence[Mapping[str, Any]]) -> dict[str, tuple[list[float],
                                                                           list[float]]]:
    groups: dict[str, tuple[list[float], list[float]]] = {}
    for ev in events:
        d, pu = ev.get("duration_s"), ev.get("level_pu")
        if not isinstance(d, int | float) or not isinstance(pu, int | float) or d <= 0:
            continue
        xs, ys = groups.setdefault(category_of(ev), ([], []))
        xs.append(float(d))
        ys.append(float(pu))
    return groups


def _scatter_events(ax: Any, groups: Mapping[str, tuple[list[float], list[float]]]) -> None:
    markers = ("o", "s", "^", "D", "v", "P", "X")
    for i, (cat, (xs, ys)) in enumerate(sorted(groups.items())):
        ax.scatter(xs, ys, s=26, marker=markers[i % len(markers)],
                   color=CATEGORY_COLOURS.get(_family(cat), "#666666"), edgecolor=INK,
                   linewidth=0.4, label=f"{cat} ({len(xs)})", zorder=3)


def _duration_axis(ax: Any, low: float, high: float) -> None:
    ax.set_xscale("log")
    ax.set_xlim(low, high)
    ax.set_xlabel("duration [s] (log)", color=INK, fontsize=8)
    ax.set_ylabel("magnitude [pu]", color=INK, fontsize=8)


def itic(events: Sequence[Mapping[str, Any]]) -> Figure:
    """Events (duration, residual or peak in pu) on the ITIC curve."""
    caption = ("Events on the ITIC curve (2000 revision): duration on a log axis against the "
               "residual (dips, interruptions) or peak (swells) in pu of the declared voltage; "
               "markers by IEEE 1159 category. Between the two lines: no-interruption region; "
               "above: prohibited; below: no-damage region. Curve points: tests/SOURCES.md.")
    groups = _event_points(events)
    fig, ax = _new()
    ux, uy = zip(*ITIC_UPPER, strict=True)
    lx, ly = zip(*ITIC_LOWER, strict=True)
    ax.plot(ux, uy, color=INK, linewidth=1.3, label="ITIC upper (prohibited above)")
    ax.plot(lx, ly, color=INK, linewidth=1.3, linestyle="--", label="ITIC lower (no damage below)")
    ax.fill_between(lx, ly, 0, color="#efe9f2", zorder=0)
    _scatter_events(ax, groups)
    _duration_axis(ax, 1e-3, 100.0)
    ax.set_ylim(-0.04, 2.0)  # interruptions at 0 pu stay visible
    ax.legend(fontsize=7, loc="upper right", frameon=False)
    return Figure("itic", _svg(fig), caption)


def semi_f47(events: Sequence[Mapping[str, Any]]) -> Figure:
    """Dips and interruptions (duration, residual in pu) against the SEMI F47 envelope."""
    caption = ("Dips and interruptions against the SEMI F47 ride-through envelope (50 % for "
               "200 ms, 70 % for 0.5 s, 80 % for 1 s; nothing required below 50 ms or beyond "
               "1 s): duration on a log axis, residual in pu; below the line: outside the "
               "envelope. Markers by IEEE 1159 category. Envelope: tests/SOURCES.md.")
    low = [e for e in events if e.get("kind") in ("dip", "interruption")]
    groups = _event_points(low)
    fig, ax = _new()
    sx, sy = zip(*SEMI_F47, strict=True)
    ax.step(sx, sy, where="post", color=INK, linewidth=1.3, label="SEMI F47 envelope")
    ax.fill_between(sx, sy, 0, step="post", color="#f4ece0", zorder=0)
    _scatter_events(ax, groups)
    _duration_axis(ax, 0.01, 100.0)
    ax.set_ylim(-0.04, 1.1)
    ax.legend(fontsize=7, loc="lower right", frameon=False)
    return Figure("semi-f47", _svg(fig), caption)


def _bands(ax: Any, bands: Sequence[Band], horizontal: bool = True) -> None:
    for band, colour in zip(reversed(bands), reversed(BAND_COLOURS[:len(bands)]), strict=True):
        for value in (band.low_v, band.high_v):
            if horizontal:
                ax.axhline(value, color=colour, linewidth=1.2, linestyle="--")
            else:
                ax.axvline(value, color=colour, linewidth=1.2, linestyle="--")
        (ax.axhline if horizontal else ax.axvline)(math.nan, color=colour, linestyle="--",
                                                  label=f"{band.rule} ({band.low_v:.1f}–"
                                                  f"{band.high_v:.1f} V)")


def _band_rules(bands: Sequence[Band]) -> str:
    return "; ".join(f"{b.rule} {b.low_v:.1f}–{b.high_v:.1f} V "
                     f"({CONFIDENCE_WORDS[b.confidence]})" for b in bands)


def _nan_reduce(fn: Any, v: np.ndarray) -> np.ndarray:
    """nanmin/nanmax/nanmean over channels; all-NaN rows give NaN without a warning."""
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        return np.asarray(fn(v, axis=1))


def _local(t: np.ndarray, tz: tzinfo) -> list[datetime]:
    return [datetime.fromtimestamp(float(x), tz) for x in t]


def _time_axis(ax: Any, tz: tzinfo) -> None:
    import matplotlib.dates as mdates

    locator = mdates.AutoDateLocator(tz=tz, maxticks=8)
    ax.xaxis.set_major_locator(locator)
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(locator, tz=tz))
    ax.set_xlabel(f"time ({tz})", color=INK, fontsize=8)


def profile(series: Series | None, bands: Sequence[Band], tz: tzinfo) -> Figure:
    """RMS means over the period against the service bands."""
    if series is None:
        return empty("profile", "no RMS values stored in the period",
                      "RMS means over the period: none stored.")
    caption = (f"{series.label.capitalize()} per channel over the period against the service "
               f"bands ({_band_rules(bands)}); hollow markers: intervals flagged by an RMS "
               "event (IEC 61000-4-30 flagging), not judged.")
    fig, ax = _new()
    x = _local(series.t, tz)
    for c, name in enumerate(series.channels):
        colour = CHANNEL_COLOURS[c % len(CHANNEL_COLOURS)]
        ax.plot(x, series.v[:, c], color=colour, linewidth=0.9, label=name,
                marker="." if series.t.size < 200 else None, markersize=3)
        if series.flagged.any():
            fx = [x[i] for i in np.flatnonzero(series.flagged)]
            ax.scatter(fx, series.v[series.flagged, c], facecolor="none", edgecolor=colour,
                       s=18, zorder=3)
    _bands(ax, bands)
    _time_axis(ax, tz)
    ax.set_ylabel("RMS [V]", color=INK, fontsize=8)
    ax.legend(fontsize=7, loc="best", frameon=False, ncol=2)
    return Figure("profile", _svg(fig), caption)


def daily_envelope(series: Series | None, bands: Sequence[Band], tz: tzinfo) -> Figure:
    """Per local day: lowest and highest mean of any channel, against the bands."""
    if series is None:
        return empty("daily-envelope", "no RMS values stored in the period",
                      "Daily envelope: no values stored.")
    days: dict[str, list[float]] = {}
    lo_all = _nan_reduce(np.nanmin, series.v)
    hi_all = _nan_reduce(np.nanmax, series.v)
    for when, lo, hi in zip(_local(series.t, tz), lo_all, hi_all, strict=True):
        if math.isfinite(lo) and math.isfinite(hi):
            d = days.setdefault(when.date().isoformat(), [math.inf, -math.inf])
            d[0], d[1] = min(d[0], float(lo)), max(d[1], float(hi))
    caption = (f"Daily envelope: lowest and highest {series.label} of any channel per day "
               f"({tz}), against {_band_rules(bands)}.")
    fig, ax = _new(7.2, 2.8)
    names = sorted(days)
    lows = [days[n][0] for n in names]
    highs = [days[n][1] for n in names]
    ax.vlines(range(len(names)), lows, highs, color=CHANNEL_COLOURS[0], linewidth=6)
    ax.scatter(range(len(names)), lows, color=INK, s=8, zorder=3)
    ax.scatter(range(len(names)), highs, color=INK, s=8, zorder=3)
    ax.set_xticks(range(len(names)), names, fontsize=7, rotation=0)
    ax.set_xlim(-0.7, len(names) - 0.3)
    _bands(ax, bands)
    ax.set_ylabel("RMS [V]", color=INK, fontsize=8)
    ax.legend(fontsize=7, loc="best", frameon=False)
    return Figure("daily-envelope", _svg(fig), caption)


def hour_profile(series: Series | None, bands: Sequence[Band], tz: tzinfo) -> Figure:
    """Time-of-day profile: 5th, 50th and 95th percentile of the means per local hour."""
    if series is None:
        return empty("hour-profile", "no RMS values stored in the period",
                      "Time-of-day profile: no values stored.")
    hours = np.array([w.hour for w in _local(series.t, tz)])
    worst = series.v.reshape(series.v.shape[0], -1)
    p = np.full((24, 3), math.nan)
    n = np.zeros(24, dtype=int)
    for h in range(24):
        vals = worst[hours == h].ravel()
        vals = vals[np.isfinite(vals)]
        n[h] = vals.size
        if vals.size:
            p[h] = np.percentile(vals, [5, 50, 95])
    caption = (f"Time-of-day profile ({tz}): 5th, 50th and 95th percentile of all channels' "
               f"{series.label} in each hour of the day over the period ({int(n.sum())} values), "
               f"against {_band_rules(bands)}.")
    fig, ax = _new(7.2, 2.8)
    hrs = np.arange(24)
    ax.fill_between(hrs, p[:, 0], p[:, 2], color="#c9dbe8", step="mid", label="5th–95th pct")
    ax.step(hrs, p[:, 1], where="mid", color=CHANNEL_COLOURS[0], linewidth=1.4, label="median")
    _bands(ax, bands)
    ax.set_xlim(-0.5, 23.5)
    ax.set_xticks(range(0, 24, 3))
    ax.set_xlabel(f"hour of day ({tz})", color=INK, fontsize=8)
    ax.set_ylabel("RMS [V]", color=INK, fontsize=8)
    ax.legend(fontsize=7, loc="best", frameon=False)
    return Figure("hour-profile", _svg(fig), caption)


def histogram(series: Series | None, bands: Sequence[Band]) -> Figure:
    """Histogram of the means (all channels) against the band limits."""
    if series is None:
        return empty("histogram", "no RMS values stored in the period",
                      "Histogram: no values stored.")
    vals = series.v[np.isfinite(series.v)]
    inner = bands[0]
    inside = float(np.mean((vals >= inner.low_v) & (vals <= inner.high_v))) if vals.size else 0
    caption = (f"Histogram of {series.label} (all channels, {vals.size} values) with the band "
               f"limits as vertical lines ({_band_rules(bands)}); {inside:.1%} within "
               f"{inner.rule}.")
    fig, ax = _new(7.2, 2.8)
    if vals.size:
        lo = min(float(vals.min()), bands[-1].low_v) - 1.0
        hi = max(float(vals.max()), bands[-1].high_v) + 1.0
        ax.hist(vals, bins=np.linspace(lo, hi, 60), color=CHANNEL_COLOURS[0], alpha=0.85)
    _bands(ax, bands, horizontal=False)
    ax.set_xlabel("RMS [V]", color=INK, fontsize=8)
    ax.set_ylabel("count", color=INK, fontsize=8)
    ax.legend(fontsize=7, loc="best", frameon=False)
    return Figure("histogram", _svg(fig), caption)


def waveform(trace: Trace, event: Mapping[str, Any], nominal_v: float,
             name: str = "waveform") -> Figure:
    """A capture's samples with the Urms(1/2) trace, the trigger and the residual or peak."""
    kind = str(event.get("kind") or "event")
    level_v = event.get("level_v")
    word = "peak" if kind == "swell" else "residual"
    caption = (f"Waveform of the {trace.trigger} capture of a {kind} (volts per channel, time "
               "from the trigger) with Urms(1/2) computed from these samples (one-cycle "
               "windows refreshed every half cycle, IEC 61000-4-30 Ed.3 5.4.2; right axis); "
               "the vertical line marks the trigger (pre-trigger samples to its left)"
               + (f"; dashed: the event's {word} {float(level_v):.1f} V" if isinstance(
                   level_v, int | float) else "") + ".")
    fig = MplFigure(figsize=(7.2, 3.0), facecolor=PAPER)
    ax = fig.add_subplot(1, 1, 1)
    ax.set_facecolor("white")
    ax.grid(True, color=GRID, linewidth=0.6)
    ax.tick_params(colors=INK, labelsize=8)
    rms_ax = ax.twinx()
    rms_ax.tick_params(colors=INK, labelsize=8)
    for c, ch in enumerate(trace.channels):
        colour = CHANNEL_COLOURS[c % len(CHANNEL_COLOURS)]
        ax.plot(trace.t_ms, trace.v[:, c], color=colour, linewidth=0.6, alpha=0.55,
                label=f"{ch} [V]")
        if trace.urms.size:
            rms_ax.plot(trace.urms_t_ms, trace.urms[:, c], color=colour, linewidth=1.6,
                        label=f"{ch} Urms(1/2)")
    ax.axvline(0.0, color=INK, linewidth=1.0)
    ax.text(0.0, 1.01, " trigger", transform=ax.get_xaxis_transform(), fontsize=7, color=INK)
    if isinstance(level_v, int | float):
        rms_ax.axhline(float(level_v), color=INK, linestyle="--", linewidth=0.9)
    rms_ax.set_ylim(0, max(1.3 * nominal_v, float(np.nanmax(trace.urms)) * 1.05
                           if trace.urms.size else 0))
    peak = math.sqrt(2.0) * nominal_v * 1.4
    ax.set_ylim(-peak, peak)
    ax.set_xlabel("time from trigger [ms]", color=INK, fontsize=8)
    ax.set_ylabel("instantaneous [V]", color=INK, fontsize=8)
    rms_ax.set_ylabel("Urms(1/2) [V]", color=INK, fontsize=8)
    h1, l1 = ax.get_legend_handles_labels()
    h2, l2 = rms_ax.get_legend_handles_labels()
    ax.legend(h1 + h2, l1 + l2, fontsize=7, loc="lower left", frameon=False, ncol=2)
    return Figure(name, _svg(fig), caption)


def fleet_timeline(rows: Sequence[tuple[str, Series | None, float | None]],
                   events: Sequence[Mapping[str, Any]],
                   fleet_events: Sequence[Mapping[str, Any]], tz: tzinfo) -> Figure:
    """Homes × time: each home's means as a strip coloured by deviation from nominal, its
    events as ticks, fleet-wide events as vertical lines."""
    caption = ("Homes × time: each row is a home, coloured by its RMS means in % of the "
               "declared voltage (grey: no data); black ticks: the home's events; red lines: "
               "events seen by several homes at once (fleet-wide, from the fleet report).")
    if not rows:
        return empty("fleet-timeline", "no homes in the store", caption)
    fig, ax = _new(7.2, 0.9 + 0.35 * len(rows))
    ax.grid(False)
    from matplotlib.colors import TwoSlopeNorm

    norm = TwoSlopeNorm(vcenter=0.0, vmin=-12.0, vmax=12.0)
    cmap = matplotlib.colormaps["PuOr_r"]
    # One common time grid (at most 800 columns), each home's mean deviation per column;
    # drawn as one raster inside the SVG so a week of 10-min means stays small.
    series_rows = [(s, n) for _, s, n in rows if s is not None and n]
    span: list[float] = []  # x extent, set explicitly (pcolormesh does not autoscale here)
    if series_rows:
        t0 = min(float(s.t[0]) for s, _ in series_rows)
        t1 = max(float(s.t[-1]) + s.interval_s for s, _ in series_rows)
        step = max(min(s.interval_s for s, _ in series_rows), (t1 - t0) / 800.0)
        edges = np.arange(t0, t1 + step, step)
        grid = np.full((len(rows), edges.size - 1), np.nan)
        for i, (_, series, nominal) in enumerate(rows):
            if series is None or not nominal:
                continue
            pct = (_nan_reduce(np.nanmean, series.v) / nominal - 1.0) * 100.0
            col = np.clip(np.searchsorted(edges, series.t, side="right") - 1, 0,
                          edges.size - 2)
            ok = np.isfinite(pct)
            sums = np.bincount(col[ok], weights=pct[ok], minlength=edges.size - 1)
            counts = np.bincount(col[ok], minlength=edges.size - 1)
            with np.errstate(invalid="ignore", divide="ignore"):
                grid[i] = np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)
        x = matplotlib.dates.date2num([datetime.fromtimestamp(float(e), tz) for e in edges])
        ax.set_facecolor("#e4e1d8")  # no data: grey
        ax.pcolormesh(x, np.arange(len(rows) + 1) - 0.5, np.ma.masked_invalid(grid),
                      cmap=cmap, norm=norm, rasterized=True, shading="flat")
        span += [float(x[0]), float(x[-1])]
    names = [r[0] for r in rows]
    for ev in events:
        if ev.get("device") in names and isinstance(ev.get("start_utc"), int | float):
            i = names.index(ev["device"])
            x0 = matplotlib.dates.date2num(datetime.fromtimestamp(ev["start_utc"], tz))
            ax.plot([x0, x0], [i - 0.45, i + 0.45], color=INK, linewidth=1.2)
            span.append(x0)
    for fe in fleet_events:
        t = fe.get("start_utc")
        if isinstance(t, int | float):
            ax.axvline(matplotlib.dates.date2num(datetime.fromtimestamp(t, tz)),
                       color="#c0392b", linewidth=1.0, alpha=0.8)
    ax.set_yticks(range(len(names)), names, fontsize=7)
    ax.set_ylim(len(names) - 0.5, -0.5)
    if span:
        pad = max((max(span) - min(span)) * 0.01, 1.0 / 86400)
        ax.set_xlim(min(span) - pad, max(span) + pad)
    ax.xaxis_date(tz)
    _time_axis(ax, tz)
    sm = matplotlib.cm.ScalarMappable(norm=norm, cmap=cmap)
    fig.colorbar(sm, ax=ax, pad=0.01, fraction=0.03).set_label("% of nominal", fontsize=7)
    return Figure("fleet-timeline", _svg(fig), caption)


def sarfi_bars(sarfi: Mapping[str, Any]) -> Figure:
    """SARFI indices from the fleet report (IEEE 1564)."""
    index = dict(sarfi.get("index") or {})
    for key in ("SARFI-ITIC", "SARFI-SEMI"):
        if isinstance(sarfi.get(key), int | float):
            index[key] = sarfi[key]
    caption = (f"SARFI indices of the period (IEEE 1564-2014): events per monitored home "
               f"({sarfi.get('homes_monitored')} homes) below (or above, for X > 100) X % of "
               "the declared voltage, and outside the ITIC / SEMI F47 curves; from the fleet "
               "report.")
    if not index:
        return empty("sarfi", "no SARFI in the fleet report", caption)
    fig, ax = _new(7.2, 2.6)
    names = list(index)
    ax.bar(names, [float(index[n]) for n in names], color="#4b7f8c")
    for i, n in enumerate(names):
        ax.text(i, float(index[n]), f"{float(index[n]):.2f}", ha="center", va="bottom",
                fontsize=7, color=INK)
    ax.tick_params(axis="x", labelsize=7, rotation=30)
    ax.set_ylabel("events per home", color=INK, fontsize=8)
    return Figure("sarfi", _svg(fig), caption)


def interruptions(stats: Mapping[str, Any] | None,
                  windows: Sequence[Mapping[str, Any]] = ()) -> Figure:
    """Interruptions per home and the fleet's interruption indices.

    ``stats``: the fleet report's interruption verdict (``per_home`` {device: {short, long,
    sustained, momentary, minutes}}, ``ieee1366`` {SAIFI, SAIDI_min, CAIDI_min, MAIFI});
    without it, per-home counts and minutes from the report's ``outage_windows``."""
    per: dict[str, list[float]] = {}
    indices: dict[str, Any] = {}
    if stats and isinstance(stats.get("per_home"), Mapping):
        for device, h in stats["per_home"].items():
            per[str(device)] = [float(h.get("short", 0)) + float(h.get("long", 0)),
                                float(h.get("minutes") or 0.0)]
        indices = {k: v for k, v in (stats.get("ieee1366") or {}).items()
                   if k in ("SAIFI", "MAIFI", "SAIDI_min", "CAIDI_min")
                   and isinstance(v, int | float)}
    else:
        for w in windows:
            d = per.setdefault(str(w.get("device")), [0, 0.0])
            d[0] += 1
            d[1] += float(w.get("duration_s") or 0.0) / 60.0
    caption = ("Interruptions in the period: minutes without supply per home (count above "
               "each bar; outage windows from power-loss reports and interruption events)"
               + ("; right: IEEE 1366 indices with monitored homes as customers (SAIFI, "
                  "SAIDI: sustained > 5 min; MAIFI: momentary), from the fleet report"
                  if indices else "") + ".")
    if not per:
        return empty("interruptions", "no interruptions in the period", caption)
    fig = MplFigure(figsize=(7.2, 2.6), facecolor=PAPER)
    axes = fig.subplots(1, 2, gridspec_kw={"width_ratios": [3, 2]}) if indices else \
        [fig.add_subplot(1, 1, 1)]
    for ax in axes:
        ax.set_facecolor("white")
        ax.grid(True, color=GRID, linewidth=0.6)
        ax.tick_params(colors=INK, labelsize=7)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    names = sorted(per)
    ax = axes[0]
    ax.bar(names, [per[n][1] for n in names], color="#8a3b8f")
    for i, n in enumerate(names):
        ax.text(i, per[n][1], f"{int(per[n][0])}×", ha="center", va="bottom", fontsize=7,
                color=INK)
    ax.set_xlim(-0.5, max(len(names), 6) - 0.5)
    ax.set_ylabel("minutes without supply", color=INK, fontsize=8)
    if indices:
        keys = list(indices)
        axes[1].bar(keys, [float(indices[k]) for k in keys], color="#4b7f8c")
        for i, k in enumerate(keys):
            axes[1].text(i, float(indices[k]), f"{float(indices[k]):.3g}", ha="center",
                         va="bottom", fontsize=7, color=INK)
        axes[1].set_ylabel("per home / minutes", color=INK, fontsize=8)
    return Figure("interruptions", _svg(fig), caption)


def overvoltage_by_hour(series: Series | None, band: Band, tz: tzinfo) -> Figure:
    """Minutes above the band's upper limit per local hour of day."""
    caption = (f"Time above {band.rule} upper limit {band.high_v:.1f} V by hour of the day "
               f"({tz}), from the {series.label if series else 'means'} of any channel: where "
               "rooftop solar export raises the voltage it shows around midday.")
    if series is None:
        return empty("overvoltage-hours", "no RMS values stored in the period", caption)
    over = _nan_reduce(np.nanmax, series.v) > band.high_v
    hours = np.array([w.hour for w in _local(series.t, tz)])
    minutes = np.array([over[hours == h].sum() * series.interval_s / 60.0 for h in range(24)])
    fig, ax = _new(7.2, 2.4)
    ax.bar(range(24), minutes, color="#c2562b")
    ax.set_xlim(-0.5, 23.5)
    ax.set_xticks(range(0, 24, 3))
    ax.set_xlabel(f"hour of day ({tz})", color=INK, fontsize=8)
    ax.set_ylabel("minutes above", color=INK, fontsize=8)
    return Figure("overvoltage-hours", _svg(fig), caption)


def swells_vs_trips(events: Sequence[Mapping[str, Any]],
                    trips: Sequence[tuple[str, float, float]] = INVERTER_OV_TRIPS) -> Figure:
    """Swells (duration, peak pu) against inverter over-voltage trip settings."""
    caption = ("Swells against inverter over-voltage trip settings (IEEE 1547-2018 Category II "
               "defaults: " + ", ".join(f"{n} {pu:.2f} pu for {t:g} s" for n, pu, t in trips)
               + "; tests/SOURCES.md): a swell at or right of a setting's corner would have "
               "tripped an inverter using it.")
    swells = [e for e in events if e.get("kind") == "swell"]
    fig, ax = _new(7.2, 2.8)
    for (n, pu, t), colour in zip(trips, ("#8a3b8f", "#c2562b"), strict=False):
        ax.plot([t, 100.0], [pu, pu], color=colour, linewidth=1.4, label=f"{n}: {pu:.2f} pu")
        ax.plot([t, t], [pu, 2.0], color=colour, linewidth=1.4)
    _scatter_events(ax, _event_points(swells))
    _duration_axis(ax, 0.01, 100.0)
    ax.set_ylim(1.0, 1.5)
    ax.legend(fontsize=7, loc="upper right", frameon=False)
    return Figure("swells-trips", _svg(fig), caption)
