"""The line page's HTTP server: the standard library's threading HTTP server, GET only.

Why the standard library (``http.server.ThreadingHTTPServer``) and not a web framework:
the page has four read-only routes and a handful of viewers polling every two seconds;
``http.server`` serves that with no dependency for the stations to install, and nothing
here needs what a framework adds (sessions, forms, templates, async).  Its documentation
warns it is not hardened for the open internet, so it binds 127.0.0.1 unless told
otherwise, and the command warns when it is not.

Routes: ``/`` the page, ``/line.js`` and ``/line.css``, ``/api/line`` the figures as
strict JSON, ``/board/<run id>`` a board report.  Every other method is refused (405):
there is no write endpoint.  The store is opened read-only; every query is parameterised
in :mod:`harness.store`.
"""

from __future__ import annotations

import json
import logging
import threading
from datetime import time
from http import HTTPStatus
from http.server import BaseHTTPRequestHandler, ThreadingHTTPServer
from time import monotonic
from typing import Any
from urllib.parse import parse_qs, urlsplit

from harness.errors import ReportError, StageproofError, StoreError
from harness.report import html as h
from harness.report.stats import CPK_MIN_BOARDS, CPK_THRESHOLD
from harness.store import SQLStore, open_store
from harness.web.line import (
    DEFAULT_SHIFTS,
    LineQuery,
    line_status,
    resolve_window,
)
from harness.web.page import CSS, page_html, script

log = logging.getLogger(__name__)
log.addHandler(logging.NullHandler())

#: Longest query-string value accepted (a serial, a station name, a date).
MAX_PARAM = 200
_SECURITY = {
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cache-Control": "no-store",
}
_PAGE_CSP = "default-src 'none'; script-src 'self'; style-src 'self'; connect-src 'self'"
#: Board reports are self-contained pages with inline style, SVG and one inline script.
_REPORT_CSP = (
    "default-src 'none'; style-src 'unsafe-inline'; script-src 'unsafe-inline'; img-src data:"
)


#: Seconds one computed answer of /api/line is shared between viewers asking the same.
SHARE_S = 1.0


class LineServer(ThreadingHTTPServer):
    """Serves one results database read-only; reopens the store after a lost connection.
    Viewers polling the same window within :data:`SHARE_S` share one computation."""

    daemon_threads = True

    def __init__(self, address: tuple[str, int], db: str, shifts: tuple[time, ...]) -> None:
        self.db = db
        self.shifts = shifts
        self._store_lock = threading.Lock()
        self._store: SQLStore | None = open_store(db, readonly=True)  # fails here, at start
        self.location = self._store.location
        self._answers: dict[tuple, tuple[float, Any]] = {}
        self._answers_lock = threading.Lock()
        super().__init__(address, LineHandler)

    def line(self, q: LineQuery) -> Any:
        """The figures for ``q``, computed at most once per :data:`SHARE_S`."""
        window = resolve_window(q, shifts=self.shifts)
        key = (q, window)
        with self._answers_lock:
            now = monotonic()
            hit = self._answers.get(key)
            if hit is not None and now - hit[0] < SHARE_S:
                return hit[1]
            data = line_status(self.store(), q, window)
            self._answers = {k: v for k, v in self._answers.items() if now - v[0] < SHARE_S}
            self._answers[key] = (now, data)
            return data

    def store(self) -> SQLStore:
        with self._store_lock:
            if self._store is None:
                self._store = open_store(self.db, readonly=True)
            return self._store

    def drop_store(self) -> None:
        """After a store error: close, so the next request opens afresh."""
        with self._store_lock:
            if self._store is not None:
                self._store.close()
                self._store = None

    def server_close(self) -> None:
        super().server_close()
        self.drop_store()


class LineHandler(BaseHTTPRequestHandler):
    server: LineServer
    server_version = "stageproof-line"
    protocol_version = "HTTP/1.1"

    def log_message(self, format: str, *args: Any) -> None:
        log.info("%s %s", self.address_string(), format % args)

    # --- responses -------------------------------------------------------------------------

    def _send(self, status: int, body: bytes, ctype: str, csp: str = _PAGE_CSP) -> None:
        self.send_response(status)
        self.send_header("Content-Type", ctype)
        self.send_header("Content-Length", str(len(body)))
        self.send_header("Content-Security-Policy", csp)
        for k, v in _SECURITY.items():
            self.send_header(k, v)
        self.end_headers()
        if self.command != "HEAD":
            self.wfile.write(body)

    def _json(self, status: int, data: Any) -> None:
        body = json.dumps(data, allow_nan=False, separators=(",", ":")).encode()
        self._send(status, body, "application/json; charset=utf-8")

    def _text_page(self, status: int, title: str, text: str) -> None:
        body = (
            f"<!DOCTYPE html><html lang=en><head><meta charset=utf-8><title>{h.e(title)}"
            f"</title></head><body><h1>{h.e(title)}</h1><p>{h.e(text)}</p>"
            '<p><a href="/">line page</a></p></body></html>'
        ).encode()
        self._send(status, body, "text/html; charset=utf-8")

    def _refuse(self) -> None:
        self.send_response(HTTPStatus.METHOD_NOT_ALLOWED)
        self.send_header("Allow", "GET, HEAD")
        self.send_header("Content-Length", "0")
        self.end_headers()

    do_POST = do_PUT = do_DELETE = do_PATCH = do_OPTIONS = _refuse

    def do_HEAD(self) -> None:
        self.do_GET()

    # --- routes ----------------------------------------------------------------------------

    def do_GET(self) -> None:
        url = urlsplit(self.path)
        path = url.path
        try:
            if path in ("/", "/index.html"):
                page = page_html(CPK_MIN_BOARDS, CPK_THRESHOLD)
                self._send(200, page.encode(), "text/html; charset=utf-8")
            elif path == "/line.js":
                self._send(200, script().encode(), "text/javascript; charset=utf-8")
            elif path == "/line.css":
                self._send(200, CSS.encode(), "text/css; charset=utf-8")
            elif path == "/api/line":
                self._api(url.query)
            elif path.startswith("/board/"):
                self._board(path[len("/board/") :])
            else:
                self._text_page(404, "Not found", f"no page {path}")
        except StoreError as exc:
            self.server.drop_store()
            self._error(503, exc)
        except StageproofError as exc:
            self._error(400, exc)

    def _error(self, status: int, exc: Exception) -> None:
        if self.path.startswith("/api/"):
            self._json(status, {"error": str(exc)})
        else:
            self._text_page(status, "Cannot show this page", str(exc))

    def _query(self, text: str) -> LineQuery:
        raw = parse_qs(text, keep_blank_values=False, max_num_fields=20)
        values: dict[str, str] = {}
        for key in ("window", "since", "until", "station", "part"):
            if key in raw:
                v = raw[key][-1]
                if len(v) > MAX_PARAM:
                    raise StoreError(f"query value {key} is longer than {MAX_PARAM} characters")
                values[key] = v
        return LineQuery(**values)

    def _api(self, text: str) -> None:
        try:
            q = self._query(text)
        except ValueError as exc:  # too many fields
            self._json(400, {"error": str(exc)})
            return
        self._json(200, self.server.line(q))

    def _board(self, rest: str) -> None:
        from harness.report import board_plots, board_report_of, render_board_html

        if not rest.isdigit() or len(rest) > 18:
            self._text_page(404, "Not found", "a board report is /board/<run id>")
            return
        try:
            report = board_report_of(self.server.store(), run_id=int(rest))
        except ReportError as exc:  # no such run
            self._text_page(404, "No such run", str(exc))
            return
        page = render_board_html(report, board_plots(report))
        self._send(200, page.encode(), "text/html; charset=utf-8", csp=_REPORT_CSP)


def make_server(
    db: str, host: str = "127.0.0.1", port: int = 8080, shifts: tuple[time, ...] = DEFAULT_SHIFTS
) -> LineServer:
    """A line server bound to ``host:port`` (port 0: any free port), not yet serving."""
    try:
        return LineServer((host, port), db, shifts)
    except StoreError:  # the database, not the port (StoreError is an OSError too)
        raise
    except OSError as exc:
        raise StoreError(
            f"cannot listen on {host}:{port}: {exc.strerror or exc}",
            hint="choose another --port, or stop what is using it",
        ) from None
