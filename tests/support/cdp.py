"""Drive headless Chromium over the DevTools protocol, with the standard library only.

The protocol runs over a WebSocket (RFC 6455): an HTTP Upgrade handshake whose
Sec-WebSocket-Accept is base64(SHA-1(key + the GUID of §1.3)), then frames; a client
masks every frame it sends (§5.3).  Only what the tests need: text frames, one at a time.
Commands are those of the Chrome DevTools Protocol (Target, Runtime domains).
"""

from __future__ import annotations

import base64
import hashlib
import json
import os
import re
import socket
import struct
import subprocess
import time
import urllib.request
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

_GUID = "258EAFA5-E914-47DA-95CA-C5AB0DC85B11"  # RFC 6455 §1.3
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
)


class WebSocket:
    def __init__(self, url: str, timeout: float = 30.0) -> None:
        parts = urlsplit(url)
        assert parts.hostname == "127.0.0.1", "tests talk only to 127.0.0.1"
        self.sock = socket.create_connection((parts.hostname, parts.port), timeout=timeout)
        key = base64.b64encode(os.urandom(16)).decode()
        self.sock.sendall(
            (
                f"GET {parts.path} HTTP/1.1\r\nHost: {parts.netloc}\r\nUpgrade: websocket\r\n"
                f"Connection: Upgrade\r\nSec-WebSocket-Key: {key}\r\n"
                "Sec-WebSocket-Version: 13\r\n\r\n"
            ).encode()
        )
        head = b""
        while b"\r\n\r\n" not in head:
            chunk = self.sock.recv(1)
            if not chunk:
                raise ConnectionError("DevTools closed during the handshake")
            head += chunk
        accept = base64.b64encode(hashlib.sha1((key + _GUID).encode()).digest()).decode()
        assert b" 101 " in head.split(b"\r\n")[0] and accept.encode() in head, head

    def _exact(self, n: int) -> bytes:
        out = b""
        while len(out) < n:
            chunk = self.sock.recv(n - len(out))
            if not chunk:
                raise ConnectionError("DevTools closed the connection")
            out += chunk
        return out

    def send(self, text: str) -> None:
        data = text.encode()
        n = len(data)
        head = bytes([0x81])
        if n < 126:
            head += bytes([0x80 | n])
        elif n < 65536:
            head += bytes([0x80 | 126]) + struct.pack(">H", n)
        else:
            head += bytes([0x80 | 127]) + struct.pack(">Q", n)
        mask = os.urandom(4)
        self.sock.sendall(head + mask + bytes(b ^ mask[i % 4] for i, b in enumerate(data)))

    def recv(self) -> str:
        payload = b""
        while True:
            b0, b1 = self._exact(2)
            n = b1 & 0x7F
            if n == 126:
                (n,) = struct.unpack(">H", self._exact(2))
            elif n == 127:
                (n,) = struct.unpack(">Q", self._exact(8))
            payload += self._exact(n)
            if b0 & 0x80:  # FIN
                return payload.decode()

    def close(self) -> None:
        self.sock.close()


class Browser:
    """One headless Chromium with one page, evaluated in over DevTools."""

    def __init__(self, binary: str, profile: Path) -> None:
        self.proc = subprocess.Popen(
            [
                binary,
                *FLAGS,
                f"--user-data-dir={profile}",
                "--remote-debugging-port=0",
                "--remote-debugging-address=127.0.0.1",
                "about:blank",
            ],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            text=True,
        )
        assert self.proc.stderr is not None
        port = None
        deadline = time.monotonic() + 60
        while port is None and time.monotonic() < deadline:
            line = self.proc.stderr.readline()
            if not line and self.proc.poll() is not None:
                raise RuntimeError("chromium exited before DevTools listened")
            m = re.search(r"ws://127\.0\.0\.1:(\d+)/", line)
            if m:
                port = int(m.group(1))
        assert port is not None, "chromium printed no DevTools address"
        with urllib.request.urlopen(f"http://127.0.0.1:{port}/json/list", timeout=10) as r:
            pages = [t for t in json.load(r) if t["type"] == "page"]
        self.ws = WebSocket(pages[0]["webSocketDebuggerUrl"])
        self._id = 0

    def call(self, method: str, **params: Any) -> dict[str, Any]:
        self._id += 1
        self.ws.send(json.dumps({"id": self._id, "method": method, "params": params}))
        while True:
            msg = json.loads(self.ws.recv())
            if msg.get("id") == self._id:
                if "error" in msg:
                    raise RuntimeError(msg["error"])
                return msg["result"]

    def goto(self, url: str) -> None:
        self.call("Page.navigate", url=url)

    def eval(self, expression: str) -> Any:
        res = self.call("Runtime.evaluate", expression=expression, returnByValue=True)
        if "exceptionDetails" in res:
            raise RuntimeError(res["exceptionDetails"])
        return res["result"].get("value")

    def wait_for(self, expression: str, timeout: float = 20.0) -> Any:
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            value = self.eval(expression)
            if value:
                return value
            time.sleep(0.1)
        raise AssertionError(f"timed out waiting for {expression}")

    def close(self) -> None:
        self.ws.close()
        self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        if self.proc.stderr:
            self.proc.stderr.close()
