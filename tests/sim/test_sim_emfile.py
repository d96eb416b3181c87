"""The simulated bench when its process runs out of file descriptors.

``accept(2)`` fails with EMFILE when the process has no free descriptor (Linux man-pages,
accept(2), ERRORS; the limit is RLIMIT_NOFILE, getrlimit(2)).  The connection then waits in
the listen backlog; a server that gives up its accept loop never serves that port again
while still saying "serving".  Here ``stageproof sim serve`` runs in a process of its own
with a lowered RLIMIT_NOFILE, real clients exhaust it over loopback, and the bench must say
so, keep accepting, and serve again once they are gone.
"""

from __future__ import annotations

import os
import re
import resource
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from harness.instruments.session import Session, resource_manager
from harness.io.profiles import load_profile
from tests.support.streams import LineCollector

pytestmark = pytest.mark.wire

REPO = Path(__file__).resolve().parents[2]
BOARD = REPO / "limits" / "demo-twin-preamp.toml"
#: Descriptors for the served process: enough to start (5 listeners, files written), a
#: few connections more.
NOFILE = 32


def _limit() -> None:  # runs in the child before exec
    hard = resource.getrlimit(resource.RLIMIT_NOFILE)[1]
    resource.setrlimit(resource.RLIMIT_NOFILE, (NOFILE, hard))


def test_accept_loop_survives_emfile(tmp_path):
    station = tmp_path / "station.toml"
    proc = subprocess.Popen(
        [
            sys.executable,
            "-m",
            "harness.cli.main",
            "sim",
            "serve",
            str(BOARD),
            "--station-out",
            str(station),
            "--fixture-out",
            str(tmp_path / "fixture.toml"),
        ],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        env=dict(os.environ, PYTHONPATH=str(REPO)),
        preexec_fn=_limit,
    )
    out, err = LineCollector(proc.stdout), LineCollector(proc.stderr)
    out.start()
    err.start()
    clients: list[socket.socket] = []
    try:
        out.wait_for("serving")
        port = int(re.search(r"generator\s+TCPIP::127\.0\.0\.1::(\d+)::SOCKET", out.text)[1])
        # Connect until the server runs out of descriptors (it says so); a connect that
        # times out has met a full listen backlog and is simply tried again.
        deadline = time.monotonic() + 60
        while "cannot accept connections" not in err.text and time.monotonic() < deadline:
            try:
                clients.append(socket.create_connection(("127.0.0.1", port), timeout=0.5))
            except TimeoutError:
                time.sleep(0.1)
        err.wait_for("cannot accept connections", timeout_s=1)
        assert "Too many open files" in err.text
        for c in clients:
            c.close()
        clients.clear()
        # The backlog drains as descriptors free up; then a new client is served.
        resource_str = f"TCPIP::127.0.0.1::{port}::SOCKET"
        session = Session(
            resource_str,
            load_profile("scpi-generator"),
            rm=resource_manager("@py"),
            timeout_ms=3000,
            retries=3,
        )
        with session:
            assert session.identity is not None
        err.wait_for("accepting connections again")
        assert proc.poll() is None  # still serving
    finally:
        for c in clients:
            c.close()
        proc.terminate()
        proc.wait(timeout=20)
        out.join(timeout=5)
        err.join(timeout=5)
        proc.stdout.close()
        proc.stderr.close()
