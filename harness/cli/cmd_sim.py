"""``stageproof sim serve BOARD.toml``: run the simulated bench until Ctrl-C / SIGTERM."""

from __future__ import annotations

import argparse
import logging
import signal
import sys
import threading
from pathlib import Path
from typing import Any

from harness.errors import StageproofError
from harness.io.board import load_board

LOOPBACK = "127.0.0.1"


def register(subparsers: Any) -> None:
    sim = subparsers.add_parser("sim", help="the simulated bench (SCPI servers + board physics)")
    sim_sub = sim.add_subparsers(dest="sim_command", metavar="SIMCOMMAND")
    serve = sim_sub.add_parser(
        "serve",
        help="serve one SCPI instrument per role on 127.0.0.1 for a board",
        description="Start a simulated generator, scope, switch, DMM and supply for BOARD "
        "on 127.0.0.1, write a station file and a fixture file for them and serve until "
        "Ctrl-C or SIGTERM.",
    )
    serve.add_argument("board", type=Path, help="board description (limits/*.toml)")
    serve.add_argument(
        "--station-out",
        type=Path,
        default=Path("station-sim.toml"),
        help="station file to write (default: %(default)s)",
    )
    serve.add_argument(
        "--fixture-out",
        type=Path,
        default=Path("fixture-sim.toml"),
        help="fixture file to write (default: %(default)s)",
    )
    serve.add_argument(
        "--port-base",
        type=int,
        default=0,
        help="first TCP port (generator; the others follow); 0 = ephemeral",
    )
    serve.add_argument(
        "--host",
        default=LOOPBACK,
        help="address to listen on (default 127.0.0.1; anything else is "
        "reachable from the network: a warning is printed)",
    )
    serve.add_argument(
        "--fault",
        action="append",
        default=[],
        metavar="SPEC",
        help="component fault (R104:drift=1.3, A.gain:low_beta=40) or "
        "instrument fault (scope:no_reply@fetch,count=1); repeatable",
    )
    serve.add_argument(
        "--latency",
        action="store_true",
        help="realistic timing: 1-3 ms per command, acquisition and transfer "
        "times, and a board that settles after each change (default: instant and settled)",
    )
    serve.add_argument(
        "--settling",
        action=argparse.BooleanOptionalAction,
        default=None,
        help="the board's capacitors move toward each new balance with its time constants "
        "(default: with --latency)",
    )
    serve.add_argument("--seed", type=int, default=20240601, help="noise seed")
    serve.add_argument(
        "--dialect",
        choices=("default", "benchtop"),
        default="default",
        help="instrument dialect: SCPI-99 digitiser and generator (default), or a benchtop "
        "scope (V/div, s/div, preamble, chunked reads) and a dBm generator; the station "
        "file names the matching shipped profiles",
    )
    serve.set_defaults(func=_serve)
    sim.set_defaults(func=lambda args: (sim.print_help(), 2)[1])


def _serve(
    args: argparse.Namespace,
    *,
    ready: threading.Event | None = None,
    stop: threading.Event | None = None,
) -> int:
    from harness.sim.bench import SimBench

    if not 0 <= args.port_base <= 65535 - 5:
        raise _UsageError(f"--port-base {args.port_base} is not a TCP port (0-65530)")
    board = load_board(args.board)
    for option, path in (("--station-out", args.station_out), ("--fixture-out", args.fixture_out)):
        _check_out(option, path)
    if args.host != LOOPBACK:
        print(
            f"stageproof: warning: listening on {args.host}, not loopback: anyone who can "
            "reach this address can drive the simulated bench",
            file=sys.stderr,
        )
    bench = SimBench(
        board,
        faults=args.fault,
        latency=args.latency,
        settling=args.settling,
        host=args.host,
        port_base=args.port_base,
        seed=args.seed,
        dialect=args.dialect,
    )
    stop = stop or threading.Event()
    try:
        bench.start()
    except OSError as exc:
        raise _UsageError(
            f"cannot listen on {args.host}: {exc.strerror or exc}",
            hint="choose another --port-base or 0 for ephemeral ports",
        ) from None
    # The servers say on their logger when they cannot accept (out of file descriptors)
    # and when they accept again: the person running the bench must see both.
    shout = logging.StreamHandler(sys.stderr)
    shout.setLevel(logging.WARNING)
    shout.setFormatter(logging.Formatter("stageproof: warning: %(message)s"))
    sim_log = logging.getLogger("harness.sim")
    sim_log.addHandler(shout)
    if sim_log.getEffectiveLevel() > logging.WARNING:
        sim_log.setLevel(logging.WARNING)
    old = {}
    if threading.current_thread() is threading.main_thread():
        for sig in (signal.SIGINT, signal.SIGTERM):
            old[sig] = signal.signal(sig, lambda *_: stop.set())
    try:
        try:
            bench.write_station(args.station_out)
            bench.write_fixture(args.fixture_out)
        except OSError as exc:
            raise _UsageError(
                f"cannot write {exc.filename or args.station_out}: {exc.strerror or exc}",
                hint="give --station-out / --fixture-out a file in a folder you can write",
            ) from None
        print(f"simulated bench for {board.name} ({board.part_number}), {args.dialect} dialect")
        for role, resource in bench.resources.items():
            print(f"  {role:<9} {resource}")
        print(f"station file: {args.station_out}")
        print(f"fixture file: {args.fixture_out}")
        for f in bench.faults:
            print(f"  component fault: {f.spec}")
        for dev in bench.devices.values():
            for armed in dev.faults:
                print(f"  instrument fault: {armed.fault.spec}")
        _check_answers(bench, args.host)
        print("serving; Ctrl-C to stop", flush=True)
        if ready is not None:
            ready.set()
        while not stop.wait(0.2):
            pass
    finally:
        bench.stop()
        for sig, handler in old.items():
            signal.signal(sig, handler)
        logging.getLogger("harness.sim").removeHandler(shout)
    print("stopped", flush=True)
    return 0


def _check_answers(bench: Any, host: str, timeout_s: float = 2.0) -> None:
    """Every instrument's server accepts a connection (a probe connection, seen accepted by
    the server itself) before "serving" is printed: a port whose backlog takes the
    handshake but whose process cannot accept (out of file descriptors) does not count."""
    import socket
    import time

    probe_host = LOOPBACK if host in ("0.0.0.0", "") else host
    for role, server in bench.servers.items():
        before = server.connections_served
        why = "no connection accepted"
        try:
            with socket.create_connection((probe_host, server.port), timeout=timeout_s):
                deadline = time.monotonic() + timeout_s
                while server.connections_served == before and time.monotonic() < deadline:
                    time.sleep(0.01)
        except OSError as exc:
            why = exc.strerror or str(exc)
        if server.connections_served == before:
            raise _UsageError(
                f"the simulated {role} on port {server.port} does not answer: "
                f"{server.trouble or why}",
                hint="raise the open-file limit (ulimit -n) or check --host",
            )


def _check_out(option: str, path: Path) -> None:
    """An output file the bench can write: before any port is opened, so a wrong path never
    leaves a bench serving that nobody can find."""
    if path.is_dir():
        raise _UsageError(
            f"{option} {path} is a folder", hint=f"give a file name, e.g. {path / 'station.toml'}"
        )
    parent = path.parent if str(path.parent) else Path(".")
    if not parent.is_dir():
        raise _UsageError(
            f"{option} {path}: folder {parent} does not exist",
            hint=f"create it (mkdir -p {parent}) or choose another path",
        )


class _UsageError(StageproofError, ValueError):
    """A command-line value that cannot work (port, address)."""
