"""``halfcycle serve``: the live page over a recorder store (read-only)."""

from __future__ import annotations

import argparse
import getpass
import sys

from agent.cli.main import UserError

DEFAULT_BIND = "127.0.0.1:8080"


def register(sub: argparse._SubParsersAction[argparse.ArgumentParser]) -> None:
    p = sub.add_parser(
        "serve",
        help="live page over a recorder store: units now, unit pages, event log, JSON twins",
        description="Serves a read-only web page over a recorder store: every unit's state "
        "now (refreshing itself), a page per unit with its figures, events, waveforms and "
        "COMTRADE downloads, and a filterable event log; each page has a JSON twin under "
        "/api/v1/ described at /api/v1/openapi.json. Loopback only unless --token-file or "
        "--password-file is given.",
    )
    p.add_argument("--store", help="store URL: sqlite:///path/recorder.db or postgresql://...")
    p.add_argument("--captures", default=None,
                   help="captures folder (default: 'captures' beside an SQLite store)")
    p.add_argument("--bind", default=DEFAULT_BIND,
                   help=f"HOST:PORT to listen on (default {DEFAULT_BIND}); a non-loopback "
                   "host needs --token-file or --password-file")
    p.add_argument("--token-file", default=None,
                   help="file holding a bearer token (one word, 16+ characters)")
    p.add_argument("--password-file", default=None,
                   help="file of user:scrypt$... lines (HTTP Basic; make one with "
                   "--hash-password USER)")
    p.add_argument("--tz", default="UTC",
                   help="site time zone for displayed times, an IANA name such as "
                   "Europe/Berlin (default UTC; UTC is shown on hover)")
    p.add_argument("--poll", type=float, default=10.0,
                   help="seconds between the fleet page's refreshes (default 10)")
    p.add_argument("--nominal", type=float, default=None,
                   help="nominal voltage [V] for units whose store records none")
    p.add_argument("--hash-password", metavar="USER", default=None,
                   help="read a password from the terminal (or stdin) and print a "
                   "password-file line for USER, then exit")
    p.set_defaults(func=cmd_serve)


def parse_bind(text: str) -> tuple[str, int]:
    host, sep, port = text.rpartition(":")
    if not sep or not host:
        raise UserError(f"--bind {text!r}: use HOST:PORT, e.g. {DEFAULT_BIND}")
    try:
        number = int(port)
    except ValueError:
        number = -1
    if not 0 <= number <= 65535:
        raise UserError(f"--bind {text!r}: port must be 0..65535")
    return host.strip("[]"), number


def cmd_serve(args: argparse.Namespace) -> int:
    try:
        from agent.web.auth import Auth, AuthError, hash_password, is_loopback
    except ImportError as exc:  # pragma: no cover - depends on the install
        raise UserError(f"the live page needs its extra: pip install 'halfcycle[web]' ({exc})"
                        ) from None
    if args.hash_password:
        if ":" in args.hash_password or not args.hash_password.strip():
            raise UserError("--hash-password USER: a user name without ':'")
        password = (getpass.getpass("password: ") if sys.stdin.isatty()
                    else sys.stdin.readline().rstrip("\n"))
        if len(password) < 8:
            raise UserError("password: at least 8 characters")
        print(f"{args.hash_password}:{hash_password(password)}")
        return 0
    if not args.store:
        raise UserError("--store is required")
    host, port = parse_bind(args.bind)
    try:
        auth = Auth.load(args.token_file, args.password_file)
    except AuthError as exc:
        raise UserError(str(exc)) from None
    if auth is None and not is_loopback(host):
        raise UserError(f"--bind {args.bind}: a non-loopback address needs authentication: "
                        "give --token-file or --password-file")
    if not 0.5 <= args.poll <= 3600:
        raise UserError(f"--poll {args.poll:g}: must be 0.5..3600 s")
    from agent.cli.report import open_store
    from agent.render.cli import check_zone

    check_zone(args.tz)
    store = open_store(args.store, args.captures)  # one clear line if it is not a store
    captures = store.captures_dir
    store.close()
    import uvicorn

    from agent.web.app import create_app

    app = create_app(args.store, captures, auth=auth, tz_name=args.tz, poll_s=args.poll,
                     default_nominal_v=args.nominal)
    print(f"halfcycle serve: http://{host}:{port}/ (read-only; "
          f"{'authentication required' if auth else 'loopback, no authentication'})",
          file=sys.stderr, flush=True)
    uvicorn.run(app, host=host, port=port, log_level="warning", access_log=False)
    return 0
