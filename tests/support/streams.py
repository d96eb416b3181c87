"""Reading a child process's output while it runs, so a test can wait for a line."""

from __future__ import annotations

import threading
import time
from typing import IO


class LineCollector(threading.Thread):
    """Collects a text stream line by line in the background; :meth:`wait_for` blocks until
    some text has appeared (or fails with what was seen)."""

    def __init__(self, stream: IO[str]) -> None:
        super().__init__(daemon=True)
        self.stream = stream
        self.text = ""

    def run(self) -> None:
        for line in self.stream:
            self.text += line

    def wait_for(self, what: str, timeout_s: float = 60.0) -> None:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if what in self.text:
                return
            time.sleep(0.02)
        raise AssertionError(f"{what!r} not seen; output so far:\n{self.text}")
