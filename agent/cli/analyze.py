"""``halfcycle analyze``: offline analysis of a WAV or CSV recording."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Iterator
from datetime import UTC, datetime
from pathlib import Path

import numpy as np

from agent.acquisition.base import Block, Source
from agent.acquisition.replay import CsvSource, ReplayError, WavSource
from agent.acquisition.timebase import ReplayTimebase
from agent.cli.main import UserError
from agent.events.types import Thresholds
from agent.pipeline import edge_stages, run
from agent.report.analysis import AnalysisCollector, infer_frequency, render_table
from agent.resources import examples_dir
from agent.site import Site
from agent.verdicts.nominal import infer_nominal, service_for_channels

# The bundled recording of an invented scenario (see agent/examples/README.md).
EXAMPLE_FILE = "invented-street.wav"
EXAMPLE_VOLTS_PER_COUNT = 400 / 32768
EXAMPLE_NOMINAL_V = 120.0
EXAMPLE_NOMINAL_HZ = 60.0
EXAMPLE_CHANNELS = ("L1", "L2")


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "analyze",
        help="analyse a WAV or CSV recording offline",
        description="Offline analysis of a WAV (16-bit PCM) or CSV (volts per column) recording. "
        "Without FILE, analyses the bundled recording of an invented scenario.",
    )
    p.add_argument(
        "file", nargs="?", help="recording (.wav or .csv); default: bundled invented example"
    )
    p.add_argument("--nominal", type=float, help="declared voltage Udin [V] (default: inferred)")
    p.add_argument("--frequency", type=float, choices=(50.0, 60.0), help="nominal frequency [Hz]")
    p.add_argument("--volts-per-count", type=float, help="WAV scale [V/count], mains side")
    p.add_argument("--rate", type=float, help="CSV sample rate [S/s]")
    p.add_argument("--channels", help="comma-separated channel names")
    p.add_argument(
        "--interruption",
        type=float,
        choices=(0.05, 0.10),
        default=0.05,
        help="interruption threshold [pu]: 0.05 (EN 50160) or 0.10 (IEEE 1159)",
    )
    p.add_argument("--start", metavar="ISO-TIME",
                   help="UTC time of the recording's first sample (2026-06-01T12:00:00Z): event "
                   "times become times of day and 10-min means align to the clock (default: "
                   "times stay relative to the file start)")
    p.add_argument("--point", choices=("service", "outlet"), default="service",
                   help="where the recording was taken, for the ANSI C84.1 limits (service "
                   "entrance or a receptacle; default service)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    p.add_argument("--html", metavar="DIR", default=None,
                   help="also write a static HTML report with figures: DIR/index.html")
    p.add_argument("--tz", default="UTC",
                   help="time zone of the HTML report's times (IANA name, e.g. Europe/Berlin)")
    p.set_defaults(func=cmd_analyze)


def parse_start(text: str) -> float:
    """``--start``: an ISO 8601 time (UTC unless it says otherwise) -> UTC seconds."""
    try:
        when = datetime.fromisoformat(text.strip().replace("Z", "+00:00").replace("z", "+00:00"))
    except ValueError:
        raise UserError(f"--start {text!r}: use an ISO 8601 UTC time such as "
                        "2026-06-01T12:00:00Z") from None
    return (when if when.tzinfo else when.replace(tzinfo=UTC)).timestamp()


def _open(args: argparse.Namespace) -> tuple[Source, str]:
    names = args.channels.split(",") if args.channels else None
    if args.file is None:
        path = examples_dir() / EXAMPLE_FILE
        source = WavSource(
            path, EXAMPLE_VOLTS_PER_COUNT, channel_names=EXAMPLE_CHANNELS, block_frames=8192
        )
        return source, f"{path.name} (bundled, invented scenario)"
    path = Path(args.file)
    suffix = path.suffix.lower()
    try:
        if suffix == ".wav":
            if args.volts_per_count is None:
                raise UserError(f"{path}: a WAV has no scale: give --volts-per-count")
            return WavSource(
                path, args.volts_per_count, channel_names=names, block_frames=8192
            ), str(path)
        if suffix == ".csv":
            if args.rate is None:
                raise UserError(f"{path}: a CSV has no sample rate: give --rate")
            return CsvSource(
                path,
                args.rate,
                volts_per_count=args.volts_per_count,
                channel_names=names,
                block_rows=8192,
            ), str(path)
    except (ReplayError, ValueError) as exc:
        if isinstance(exc, UserError):
            raise
        raise UserError(str(exc)) from None
    if not path.exists():
        raise UserError(f"{path}: file not found")
    raise UserError(f"{path}: unknown recording type {suffix!r} (expected .wav or .csv)")


def _probe(source: Source, seconds: float = 2.0) -> np.ndarray:
    """The first seconds of channel 0 in volts, for inferring nominal values."""
    want = int(source.info.sample_rate * seconds)
    parts, got = [], 0
    for block in source.blocks():
        parts.append(block.counts[:, 0].astype(np.float64) * source.info.volts_per_count[0])
        got += block.counts.shape[0]
        if got >= want:
            break
    source.close()
    if not parts:
        raise UserError("recording holds no samples")
    return np.concatenate(parts)[:want]


def cmd_analyze(args: argparse.Namespace) -> int:
    source, label = _open(args)
    info = source.info
    nominal, hz = args.nominal, args.frequency
    if args.file is None:
        nominal = nominal or EXAMPLE_NOMINAL_V
        hz = hz or EXAMPLE_NOMINAL_HZ
    start = parse_start(args.start) if args.start else None
    inferred = nominal is None
    candidates: tuple[float, ...] = ()
    if nominal is None or hz is None:
        probe_source, _ = _open(args)
        volts = _probe(probe_source)
        if hz is None:
            hz = infer_frequency(volts, info.sample_rate)
        if nominal is None:
            # Among the nominals of the detected frequency and the channel count's service
            # type only; marked inferred (agent.verdicts.nominal).
            guess = infer_nominal(float(np.sqrt(np.mean((volts - volts.mean()) ** 2))), hz,
                                  service_for_channels(info.channels))
            nominal, candidates = guess.volts, guess.candidates
    site = Site(
        nominal_v=float(nominal),
        nominal_hz=float(hz),
        service_type=service_for_channels(info.channels),
        channel_names=info.channel_names,
    )
    timebase = ReplayTimebase(info.sample_rate, origin=start or 0.0)
    collector = AnalysisCollector(rate=info.sample_rate, timebase_origin=start or 0.0)
    stages, _ = edge_stages(
        info,
        site,
        timebase,
        thresholds=Thresholds(interruption=args.interruption),
        sinks=[collector],
    )
    seen = 0

    def counted() -> Iterator[Block]:
        nonlocal seen
        for block in source.blocks():
            seen = block.end_index
            yield block

    try:
        run(counted(), stages)
    except ReplayError as exc:
        raise UserError(str(exc)) from None
    finally:
        source.close()
    duration = seen / info.sample_rate
    result = collector.result(
        sample_rate=info.sample_rate,
        nominal_v=float(nominal),
        nominal_hz=float(hz),
        channels=info.channels,
        channel_names=info.channel_names,
        source=label,
        nominal_inferred=inferred,
        duration_s=float(duration),
        start_utc=start,
        nominal_candidates=candidates,
        measurement_point=args.point,
    )
    if args.html:
        from agent.render.cli import write_html_for_analysis

        write_html_for_analysis(result, args.html, args.tz, invented=args.file is None)
    if args.json:
        json.dump(result, sys.stdout, allow_nan=False)
        sys.stdout.write("\n")
    else:
        print(render_table(result))
    return 0
