"""``halfcycle calibrate``: measure against a reference meter, write a calibration record."""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from agent.acquisition.calibration import CalibrationRecord, compute_gains
from agent.acquisition.open_source import open_source
from agent.acquisition.timebase import ReplayTimebase
from agent.cli.main import UserError
from agent.measurement.engine import MeasurementEngine
from agent.settings import load_edge_settings


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "calibrate",
        help="measure against a reference meter and write a calibration record",
        description="Reads the configured source for --seconds with calibration gain 1, "
        "compares the mean 10/12-cycle RMS of each channel with the reference meter's "
        "reading, and writes the per-channel gains to the calibration file the agent loads.",
    )
    p.add_argument("--config", required=True, help="edge configuration file (TOML)")
    p.add_argument(
        "--reference-volts",
        type=float,
        required=True,
        help="RMS voltage read by the reference meter over the same time [V]",
    )
    p.add_argument(
        "--uncertainty",
        type=float,
        default=None,
        help="the reference reading's stated uncertainty [V] (default: 0.1 %% of reading)",
    )
    p.add_argument("--seconds", type=float, default=10.0, help="measuring time [s] (default 10)")
    p.add_argument("--out", help="calibration file (default: [calibration] file of the config)")
    p.add_argument("--note", default="", help="free text stored with the record")
    p.set_defaults(func=cmd_calibrate)


def cmd_calibrate(args: argparse.Namespace) -> int:
    settings = load_edge_settings(args.config)
    out = Path(args.out) if args.out else settings.calibration_file
    if out is None:
        raise UserError(f"{args.config}: calibration.file is not set; give --out")
    if args.seconds <= 0:
        raise UserError("--seconds must be positive")
    source = open_source(settings.source)
    info = source.info
    engine = MeasurementEngine(
        info, settings.site, settings.thresholds, ReplayTimebase(info.sample_rate), None
    )
    want = int(args.seconds * info.sample_rate)
    values: list[np.ndarray] = []
    try:
        for block in source.blocks():
            iv = engine.process(block).intervals
            if len(iv):
                values.append(iv.rms)
            if block.end_index >= want:
                break
    finally:
        source.close()
    if not values:
        raise UserError("no complete 10/12-cycle interval measured: is the source live?")
    rms = np.concatenate(values)
    measured = {
        name: float(np.sqrt(np.mean(rms[:, i] ** 2))) for i, name in enumerate(info.channel_names)
    }
    try:
        gains = compute_gains(measured, args.reference_volts)
    except ValueError as exc:
        raise UserError(str(exc)) from None
    uncertainty = args.uncertainty if args.uncertainty is not None else 0.001 * args.reference_volts
    record = CalibrationRecord(
        device=settings.site.device_id,
        channel_gains=gains,
        reference_volts=args.reference_volts,
        reference_uncertainty_v=uncertainty,
        measured_volts=measured,
        note=args.note,
    )
    record.save(out)
    for name in info.channel_names:
        print(
            f"{name}: measured {measured[name]:.3f} V, reference {args.reference_volts:.3f} V, "
            f"gain {gains[name]:.5f}"
        )
    print(f"calibration record written to {out}")
    return 0
