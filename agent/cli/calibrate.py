"""``halfcycle calibrate``: measure against a reference meter, write a calibration record."""

from __future__ import annotations

import argparse
from pathlib import Path

import numpy as np

from agent.acquisition.calibration import CalibrationRecord, check_shared_reading, compute_gains
from agent.acquisition.open_source import open_source
from agent.acquisition.timebase import ReplayTimebase
from agent.cli.main import UserError
from agent.measurement.engine import MeasurementEngine
from agent.settings import load_edge_settings

SAFETY = (
    "Safety: mains voltage can kill. The reference reading is taken by a licensed electrician "
    "with a meter rated for the circuit (its measurement category and voltage), or at a "
    "socket with a plug-in meter. Never probe a live circuit yourself, and never open the "
    "monitor's enclosure while it is connected."
)


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "calibrate",
        help="measure against a reference meter and write a calibration record",
        description="Reads the configured source for --seconds with calibration gain 1, "
        "compares the mean 10/12-cycle RMS of each channel with the reference meter's "
        "reading for that channel, and writes the per-channel gains, readings and "
        "uncertainties to the calibration file the agent loads. Give one reading per channel "
        "(--reference-volts L1=120.4 --reference-volts L2=119.6) on a split-phase or "
        "three-phase service; a single reading is applied to every channel only when the "
        "monitor sees them within the reading's uncertainty of each other. " + SAFETY,
        epilog=SAFETY,
    )
    p.add_argument("--config", required=True, help="edge configuration file (TOML)")
    p.add_argument(
        "--reference-volts",
        action="append",
        required=True,
        metavar="[NAME=]V",
        help="RMS voltage read by the reference meter over the same time [V]: NAME=V for one "
        "channel (repeat per channel), or V alone for every channel",
    )
    p.add_argument(
        "--uncertainty",
        action="append",
        default=None,
        metavar="[NAME=]U",
        help="the reading's stated uncertainty [V], per channel (NAME=U) or for all "
        "(default: 0.1 %% of the reading)",
    )
    p.add_argument("--seconds", type=float, default=10.0, help="measuring time [s] (default 10)")
    p.add_argument("--out", help="calibration file (default: [calibration] file of the config)")
    p.add_argument("--note", default="", help="free text stored with the record")
    p.set_defaults(func=cmd_calibrate)


def _per_channel(values: list[str], names: tuple[str, ...], option: str
                 ) -> tuple[dict[str, float], float | None]:
    """Parse repeated ``[NAME=]V`` options: (per-channel values, the shared value or None)."""
    named: dict[str, float] = {}
    shared: float | None = None
    for text in values:
        name, sep, num = text.rpartition("=")
        try:
            v = float(num)
        except ValueError:
            raise UserError(f"{option} {text!r}: not a number") from None
        if not sep:
            if shared is not None or named:
                raise UserError(f"{option}: give one value for all channels, or NAME=V for each")
            shared = v
        elif name not in names:
            raise UserError(f"{option} {text!r}: no channel {name!r} (channels: "
                            f"{', '.join(names)})")
        elif name in named or shared is not None:
            raise UserError(f"{option}: channel {name} given twice")
        else:
            named[name] = v
    return named, shared


def cmd_calibrate(args: argparse.Namespace) -> int:
    settings = load_edge_settings(args.config)
    out = Path(args.out) if args.out else settings.calibration_file
    if out is None:
        raise UserError(f"{args.config}: calibration.file is not set; give --out")
    if args.seconds <= 0:
        raise UserError("--seconds must be positive")
    names = tuple(settings.site.channel_names)
    ref_named, ref_shared = _per_channel(args.reference_volts, names, "--reference-volts")
    if ref_named and set(ref_named) != set(names):
        missing = [n for n in names if n not in ref_named]
        raise UserError(f"--reference-volts: no reading for channel {', '.join(missing)}")
    unc_named, unc_shared = _per_channel(args.uncertainty or [], names, "--uncertainty")
    refs = ref_named or {n: float(ref_shared) for n in names}  # type: ignore[arg-type]
    uncs = {n: unc_named.get(n, unc_shared if unc_shared is not None else 0.001 * refs[n])
            for n in names}
    if any(not (u >= 0) for u in uncs.values()):
        raise UserError("--uncertainty must be >= 0 V")
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
        if ref_shared is not None:
            check_shared_reading(measured, min(uncs.values()))
        gains = compute_gains(measured, refs)
    except ValueError as exc:
        raise UserError(str(exc)) from None
    record = CalibrationRecord(
        device=settings.site.device_id,
        channel_gains=gains,
        reference_volts=refs,
        reference_uncertainty_v=uncs,
        measured_volts=measured,
        note=args.note,
    )
    record.save(out)
    for name in info.channel_names:
        print(
            f"{name}: measured {measured[name]:.3f} V, reference {refs[name]:.3f} V "
            f"± {uncs[name]:.3f} V, gain {gains[name]:.5f}"
        )
    print(f"calibration record written to {out}")
    return 0
