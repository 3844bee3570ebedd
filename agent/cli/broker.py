"""``halfcycle broker``: prepare and run a local Mosquitto broker for halfcycle."""

from __future__ import annotations

import argparse
import os
import sys
from typing import Any

from agent.broker import setup
from agent.cli.main import UserError


def register(subparsers: Any) -> None:
    parser = subparsers.add_parser("broker", help="prepare and run a Mosquitto broker",
                                   description=__doc__)
    sub = parser.add_subparsers(dest="broker_command", metavar="ACTION")

    add = sub.add_parser("add-device", help="create credentials for a device")
    add.add_argument("device", metavar="ID", help="device id (also its broker user name)")
    add.add_argument("--dir", default="broker", help="broker directory (default: ./broker)")
    add.set_defaults(func=_add_device)

    run = sub.add_parser("run", help="render the configuration into DIR and run Mosquitto")
    run.add_argument("--dir", required=True, help="broker directory")
    run.add_argument("--port", type=int, default=None,
                     help="listener port (default 8883 with --tls, else 1883)")
    run.add_argument("--bind", default="127.0.0.1", help="listen address (default loopback)")
    run.add_argument("--tls", action="store_true",
                     help="TLS listener with a generated test CA and certificates")
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
        password = setup.add_device(args.dir, args.device)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    print(f"device {args.device}: password (shown once, store it in the device's "
          f"configuration): {password}")
    return 0


def _run(args: argparse.Namespace) -> int:
    port = args.port if args.port is not None else (8883 if args.tls else 1883)
    if not 1 <= port <= 65535:
        raise UserError(f"--port {port}: must be 1..65535")
    try:
        bdir = setup.render(args.dir, port=port, bind_address=args.bind, tls=args.tls,
                            user=args.user, max_packet_size=args.max_packet_size)
        cmd = setup.mosquitto_command(bdir)
    except setup.BrokerSetupError as exc:
        raise UserError(str(exc)) from None
    print(f"broker directory {bdir.root}: listening on {args.bind}:{port}"
          f"{' (TLS)' if args.tls else ''}; collector password in "
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
