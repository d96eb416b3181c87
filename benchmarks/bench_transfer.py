"""Waveform transfer: 1,000,000 float32 samples over pyvisa-py loopback, binary vs ASCII.

A tiny SCPI server in this script (127.0.0.1, ephemeral port) answers ``BIN?`` with an
IEEE 488.2 definite-length block (REAL,32, big-endian) and ``ASC?`` with the same samples
as comma-separated text.  Three client paths are timed:

- ``Session.query_block``: write, read header, read exactly the payload (termination off);
- pyvisa ``query_binary_values(datatype="f", is_big_endian=True)``;
- pyvisa ``query_ascii_values`` (the slow path the drivers never use).

Prints the best of a few runs for each and the ASCII/binary ratio (aim: >= 8x, binary
under 150 ms on a 2-core machine).  Run: ``python benchmarks/bench_transfer.py [N]``.
"""

from __future__ import annotations

import socketserver
import sys
import threading
import time

import numpy as np

from harness.instruments.scpi import encode_values
from harness.instruments.session import Session, resource_manager
from harness.io.profiles import load_profile


def _server(n: int) -> socketserver.ThreadingTCPServer:
    rng = np.random.default_rng(1)
    samples = rng.standard_normal(n).astype(np.float32)
    binary = encode_values(samples, "float32") + b"\n"
    ascii_ = (",".join(f"{x:.9g}" for x in samples) + "\n").encode()

    class Handler(socketserver.StreamRequestHandler):
        def handle(self) -> None:
            for raw in self.rfile:
                cmd = raw.strip().upper()
                if cmd == b"*IDN?":
                    self.wfile.write(b"stageproof-bench,LOOP,0,1\n")
                elif cmd == b"BIN?":
                    self.wfile.write(binary)
                elif cmd == b"ASC?":
                    self.wfile.write(ascii_)
                elif cmd.endswith(b"?"):
                    self.wfile.write(b'0,"No error"\n')

    srv = socketserver.ThreadingTCPServer(("127.0.0.1", 0), Handler)
    srv.daemon_threads = True
    srv.samples = samples  # type: ignore[attr-defined]
    threading.Thread(target=srv.serve_forever, daemon=True).start()
    return srv


def _best(fn, runs: int) -> tuple[float, object]:
    best, out = float("inf"), None
    for _ in range(runs):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def main(n: int = 1_000_000) -> int:
    srv = _server(n)
    port = srv.server_address[1]
    resource = f"TCPIP::127.0.0.1::{port}::SOCKET"
    s = Session(resource, load_profile("scpi-scope"), timeout_ms=20000, rm=resource_manager())
    s.open()
    res = s._res  # the same pyvisa resource, for the library's own methods
    ref = srv.samples  # type: ignore[attr-defined]

    t_block, a = _best(lambda: s.query_block("BIN?", "float32"), 5)
    t_qbv, b = _best(
        lambda: res.query_binary_values(
            "BIN?", datatype="f", is_big_endian=True, container=np.array
        ),
        5,
    )
    t_ascii, c = _best(lambda: res.query_ascii_values("ASC?", container=np.array), 2)
    for name, arr in (("query_block", a), ("query_binary_values", b), ("ascii", c)):
        assert np.array_equal(np.asarray(arr, dtype=np.float32), ref), name
    s.close()
    srv.shutdown()

    print(f"{n:,} float32 samples over pyvisa-py loopback (best of runs)")
    print(f"  binary, Session.query_block          {t_block * 1e3:8.1f} ms")
    print(f"  binary, pyvisa query_binary_values   {t_qbv * 1e3:8.1f} ms")
    print(f"  ASCII,  pyvisa query_ascii_values    {t_ascii * 1e3:8.1f} ms")
    fastest = min(t_block, t_qbv)
    ratio = t_ascii / fastest
    print(f"  ratio ASCII / binary                 {ratio:8.1f} x  (aim >= 8x)")
    print(f"  query_block / query_binary_values    {t_block / t_qbv:8.2f}")
    ok = ratio >= 8 and fastest < 0.150
    print("  target met" if ok else "  TARGET MISSED (binary < 150 ms and ratio >= 8x)")
    return 0


if __name__ == "__main__":
    sys.exit(main(int(sys.argv[1]) if len(sys.argv) > 1 else 1_000_000))
