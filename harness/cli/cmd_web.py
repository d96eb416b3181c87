"""``stageproof web``: the line page, a read-only view of a results database.

    stageproof web --db postgresql://viewer@line-db/results [--host 127.0.0.1] [--port 8080]

Per station and per part number over this shift, today or a date range: boards tested,
first-pass and final yield, failing measurements ranked, the latest verdicts as they
land, Cpk with its flag, and a board report behind every run.
"""

from __future__ import annotations

import argparse
import ipaddress
import sys

from harness.store import DEFAULT_DB


def register(subparsers: argparse._SubParsersAction) -> None:
    p = subparsers.add_parser(
        "web",
        help="serve the read-only line page (yield, failures, latest verdicts, Cpk)",
        description="Serve a read-only web page for the line supervisor that updates itself "
        "as runs land.  Binds 127.0.0.1 unless --host says otherwise.",
    )
    p.add_argument(
        "--db",
        default=DEFAULT_DB,
        metavar="URL",
        help=f"results database: file path or postgresql://... (default {DEFAULT_DB})",
    )
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=_port, default=8080, help="port (default 8080; 0 = any free)")
    p.add_argument(
        "--shifts",
        default="06:00,14:00,22:00",
        metavar="HH:MM,...",
        help="local shift start times for the 'this shift' window (default 06:00,14:00,22:00)",
    )
    p.set_defaults(func=run)


def _port(text: str) -> int:
    try:
        n = int(text)
    except ValueError:
        n = -1
    if not 0 <= n <= 65535:
        raise argparse.ArgumentTypeError(f"{text!r} is not a port number (0-65535)")
    return n


def _loopback(host: str) -> bool:
    if host == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def run(args: argparse.Namespace) -> int:
    from harness.web.line import parse_shifts
    from harness.web.server import make_server

    shifts = parse_shifts(args.shifts)
    if not _loopback(args.host):
        print(
            f"warning: serving on {args.host}, reachable from other machines; the page has no "
            "login and shows every result in the database",
            file=sys.stderr,
        )
    server = make_server(args.db, args.host, args.port, shifts)
    host, port = str(server.server_address[0]), int(server.server_address[1])
    print(f"line page for {server.location} at http://{host}:{port}/ (Ctrl-C to stop)", flush=True)
    try:
        server.serve_forever(poll_interval=0.5)
    except KeyboardInterrupt:
        print("stopped", file=sys.stderr)
    finally:
        server.server_close()
    return 0
