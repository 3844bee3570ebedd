"""``halfcycle broker``: prepare and run a local Mosquitto broker for halfcycle."""

from __future__ import annotations

import argparse
import csv
import json
import os
import sys
from pathlib import Path
from typing import Any

from agent.broker import setup
from agent.cli.main import UserError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser("broker", help="prepare and run a Mosquitto broker",
                                   description=__doc__)
    sub = parser.add_subparsers(dest="broker_command", metavar="ACTION")

    add = sub.add_parser("add-device", help="create credentials for a device (older form of "
                         "`devices add`; prints a sentence with the password)")
    add.add_argument("device", metavar="ID", help="device id (also its broker user name)")
    add.add_argument("--site", default=None,
                     help="the site the device may publish under (default: any site)")
    add.add_argument("--dir", default="broker", help="broker directory (default: ./broker)")
    add.set_defaults(func=_add_device)

    devices = sub.add_parser("devices", help="list, add, revoke and import devices",
                             description="Provision the monitors of a rendered broker "
                             "directory. Each device is bound to one site: the ACL lets it "
                             "publish only under hc/v1/SITE/ID/..., and the collector refuses "
                             "a device's messages under another site.")
    dsub = devices.add_subparsers(dest="devices_command", metavar="ACTION", required=True)
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--dir", required=True, help="broker directory (holds mosquitto.conf)")
    ls = dsub.add_parser("list", parents=[common], help="one line per device: id, site, added")
    ls.add_argument("--json", action="store_true")
    ls.set_defaults(func=_devices_list)
    da = dsub.add_parser("add", parents=[common], help="create (or replace) a device's "
                         "credentials; the password goes to stdout alone, or to a file")
    da.add_argument("device", metavar="ID")
    da.add_argument("--site", required=True, help="the site the device publishes under")
    da.add_argument("--password-file", default=None,
                    help="write the password here (mode 0600) instead of stdout")
    da.set_defaults(func=_devices_add)
    dr = dsub.add_parser("revoke", parents=[common], help="remove a device's credentials "
                         "and ACL entries (the broker reloads)")
    dr.add_argument("device", metavar="ID")
    dr.set_defaults(func=_devices_revoke)
    di = dsub.add_parser("import", parents=[common], help="add every device of a CSV file "
                         "with the columns device,site")
    di.add_argument("csv", metavar="FILE.csv")
    di.add_argument("--out", default=None,
                    help="write each password to OUT/ID.password (mode 0600); default: CSV "
                    "device,site,password on stdout")
    di.set_defaults(func=_devices_import)

    run = sub.add_parser("run", help="render the configuration into DIR and run Mosquitto")
    run.add_argument("--dir", required=True, help="broker directory")
    run.add_argument("--port", type=int, default=None,
                     help="listener port (default 8883 with --tls, else 1883)")
    run.add_argument("--bind", default="127.0.0.1", help="listen address (default loopback)")
    run.add_argument("--tls", action="store_true",
                     help="TLS listener with a generated test CA and certificates")
    run.add_argument("--ca-cert", default=None,
                     help="your CA's certificate (PEM); with --cert and --key: TLS with your "
                     "own certificates instead of a generated test CA")
    run.add_argument("--cert", default=None, help="the broker's certificate (PEM)")
    run.add_argument("--key", default=None,
                     help="the broker's private key (PEM, readable by the broker's user)")
    run.add_argument("--user", default=None,
                     help="user Mosquitto runs as (default: the current user)")
    run.add_argument("--max-packet-size", type=int, default=setup.DEFAULT_MAX_PACKET,
                     help="largest MQTT packet accepted [bytes]")
    run.add_argument("--render-only", action="store_true",
                     help="write the files and exit without starting Mosquitto")
    run.set_defaults(func=_run)
    parser.set_defaults(func=lambda args: (parser.print_help(), 2)[1])


def _add_device(args: argparse.Namespace) -> int:
    try:
        password = setup.add_device(args.dir, args.device, args.site)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    print(f"device {args.device}: password (shown once, store it in the device's "
          f"configuration): {password}")
    return 0


def _devices_list(args: argparse.Namespace) -> int:
    try:
        setup.broker_dir(args.dir)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    devices = setup.list_devices(args.dir)
    if args.json:
        print(json.dumps([{"device": d.device, "site": d.site, "added_utc": d.added_utc or None}
                          for d in devices]))
        return 0
    print(f"{'device':<24} {'site':<24} added (UTC)")
    for d in devices:
        print(f"{d.device:<24} {d.site or '(any site)':<24} {d.added_utc or '-'}")
    return 0


def _write_password(path: Path, password: str) -> None:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_TRUNC, 0o600)
    with os.fdopen(fd, "w", encoding="utf-8") as fh:
        fh.write(password + "\n")


def _devices_add(args: argparse.Namespace) -> int:
    try:
        password = setup.add_device(args.dir, args.device, args.site)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    if args.password_file:
        try:
            _write_password(Path(args.password_file), password)
        except OSError as exc:
            raise UserError(f"--password-file {args.password_file}: {exc.strerror} (the "
                            f"device was added; run add again for a new password)") from None
        print(f"device {args.device} (site {args.site}): password written to "
              f"{args.password_file}", file=sys.stderr)
    else:
        print(password)  # alone on stdout: `PW=$(halfcycle broker devices add ...)`
    return 0


def _devices_revoke(args: argparse.Namespace) -> int:
    try:
        setup.revoke_device(args.dir, args.device)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    print(f"device {args.device}: revoked", file=sys.stderr)
    return 0


def _devices_import(args: argparse.Namespace) -> int:
    try:
        rows = setup.read_device_csv(args.csv)
        out = Path(args.out) if args.out else None
        if out is not None and not out.is_dir():
            raise setup.BrokerSetupError(f"--out {out}: not a folder")
        passwords = setup.add_devices(args.dir, rows)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    if out is not None:
        for device, password in passwords.items():
            _write_password(out / f"{device}.password", password)
        print(f"{len(passwords)} devices added; passwords in {out}/ID.password",
              file=sys.stderr)
    else:
        w = csv.writer(sys.stdout, lineterminator="\n")
        w.writerow(["device", "site", "password"])
        for device, site in rows:
            w.writerow([device, site, passwords[device]])
    return 0


def _run(args: argparse.Namespace) -> int:
    port = args.port if args.port is not None else (8883 if args.tls else 1883)
    if not 1 <= port <= 65535:
        raise UserError(f"--port {port}: must be 1..65535")
    given = [x for x in (args.ca_cert, args.cert, args.key) if x]
    if given and len(given) != 3:
        raise UserError("--ca-cert, --cert and --key go together")
    certs = (setup.OperatorCertificates(Path(args.ca_cert), Path(args.cert), Path(args.key))
             if given else None)
    if certs is not None and args.port is None:
        port = 8883
    try:
        bdir = setup.render(args.dir, port=port, bind_address=args.bind, tls=args.tls,
                            user=args.user, max_packet_size=args.max_packet_size,
                            certificates=certs)
        cmd = setup.mosquitto_command(bdir)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    print(f"broker directory {bdir.root}: listening on {args.bind}:{port}"
          f"{' (TLS)' if args.tls or certs else ''}; collector password in "
          f"{bdir.collector_password_file}", file=sys.stderr, flush=True)
    if args.render_only:
        return 0
    # exec: Mosquitto takes over this process, so signals (SIGTERM, SIGHUP reload) reach it
    # directly and a supervisor sees its real exit status.
    sys.stdout.flush()
    os.execv(cmd[0], cmd)
    return 0  # not reached


def main(argv: list[str] | None = None) -> int:
    """``python -m agent.cli.broker broker ...``: the same as the ``halfcycle`` command (the
    tests start their brokers this way, without depending on the console script)."""
    from agent.cli.main import main as halfcycle_main

    return halfcycle_main(argv)


if __name__ == "__main__":
    sys.exit(main())
