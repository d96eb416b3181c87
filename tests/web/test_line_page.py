"""The line page: served by `stageproof web`, rendered by real headless Chromium.

Checks: the page renders and its figures equal those counted here from the store's
rows; a run stored while the page is open appears within seconds without a reload; a
serial holding markup shows as text and runs nothing; the server answers no write method
(RFC 9110 §15.5.6, 405 Method Not Allowed with Allow); JSON is strict (RFC 8259 has no
NaN); filters are bound, so SQL text in a filter matches nothing.
"""

from __future__ import annotations

import json
import threading
import urllib.error
import urllib.request
from collections.abc import Iterator
from pathlib import Path

import pytest

from harness.store import MeasurementRow, RunHeader, open_store
from harness.web import make_server
from tests.support.cdp import Browser

EVIL = "SN-<script>window.pwned=1</script>"


def _header(serial: str, station: str, part: str = "PN-7") -> RunHeader:
    return RunHeader(
        serial=serial,
        part_number=part,
        board_name="demo board",
        board_file="limits/demo-twin-preamp.toml",
        board_digest="0" * 64,
        limits_json="{}",
        limits_digest="1" * 64,
        station=station,
        fixture="fx",
        operator="op",
    )


def _run(url: str, serial: str, station: str, verdict: str, gain: float) -> int:
    with open_store(url) as store:
        run_id = store.begin_run(_header(serial, station))
        store.add_measurement(
            run_id,
            MeasurementRow(
                "left",
                "gain",
                gain,
                "dB",
                19.0,
                21.0,
                0.05,
                "pass" if verdict == "PASS" else "fail",
                "gain",
            ),
        )
        store.finish_run(run_id, "complete", verdict)
        return run_id


@pytest.fixture
def line_db(tmp_path: Path) -> str:
    db = str(tmp_path / "line.db")
    _run(db, "SN-1", "st-a", "PASS", 20.0)
    _run(db, "SN-2", "st-a", "FAIL", 22.0)
    _run(db, "SN-2", "st-b", "PASS", 20.1)
    _run(db, EVIL, "st-b", "PASS", 19.9)
    return db


@pytest.fixture
def server(line_db: str) -> Iterator[str]:
    srv = make_server(line_db, "127.0.0.1", 0)
    thread = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.1})
    thread.start()
    try:
        yield f"http://127.0.0.1:{srv.server_address[1]}"
    finally:
        srv.shutdown()
        thread.join(timeout=10)
        srv.server_close()


def _get(url: str) -> tuple[int, bytes, dict[str, str]]:
    try:
        with urllib.request.urlopen(url, timeout=10) as r:
            return r.status, r.read(), dict(r.headers)
    except urllib.error.HTTPError as exc:
        with exc:
            return exc.code, exc.read(), dict(exc.headers)


@pytest.mark.browser
def test_line_page_in_chromium(chromium: str, server: str, line_db: str, tmp_path: Path) -> None:
    browser = Browser(chromium, tmp_path / "profile")
    try:
        browser.goto(f"{server}/?window=range&since=2000-01-01")
        browser.wait_for("!!document.body && document.body.dataset.state === 'live'")
        rows = browser.eval(
            "[...document.querySelectorAll('#stations tbody tr')]"
            ".map(tr => [...tr.cells].map(c => c.textContent))"
        )
        # counted by hand from the four runs: st-a tested SN-1 (PASS) and SN-2 (FAIL);
        # st-b tested SN-2 (PASS, its first test at st-b) and the markup serial (PASS)
        assert rows == [
            ["st-a", "2", "2", "50.0 % (1)", "50.0 % (1)", "0"],
            ["st-b", "2", "2", "100.0 % (2)", "100.0 % (2)", "0"],
        ]
        with open_store(line_db, readonly=True) as store:
            stored = sorted(r.serial for r in store.list_runs())
        shown = browser.eval(
            "[...document.querySelectorAll('#latest td.serial')].map(td => td.textContent)"
        )
        assert sorted(shown) == stored
        # the markup serial is text: present verbatim, no script element, nothing ran
        assert EVIL in shown
        assert browser.eval("document.querySelectorAll('main script').length") == 0
        assert browser.eval("typeof window.pwned") == "undefined"
        links = browser.eval(
            "[...document.querySelectorAll('#latest a')].map(a => a.getAttribute('href'))"
        )
        assert all(link.startswith("/board/") for link in links) and len(links) == 4
        status, body, _ = _get(server + links[0])
        assert status == 200 and b"Board report" in body and b"<script>window.pwned" not in body

        browser.eval("window.stayedLoaded = 42")
        new_id = _run(line_db, "SN-NEW", "st-c", "FAIL", 23.0)
        browser.wait_for(
            "[...document.querySelectorAll('#latest td.serial')]"
            ".some(td => td.textContent === 'SN-NEW')",
            timeout=10.0,
        )
        assert browser.eval("window.stayedLoaded") == 42  # no reload happened
        assert browser.eval(f"!!document.querySelector('#latest tr[data-run-id=\"{new_id}\"]')")
        stations = browser.eval(
            "[...document.querySelectorAll('#stations tbody tr td:first-child')]"
            ".map(td => td.textContent)"
        )
        assert stations == ["st-a", "st-b", "st-c"]
    finally:
        browser.close()


def test_api_is_read_only_strict_and_parameterised(server: str) -> None:
    status, body, headers = _get(f"{server}/api/line?window=range&since=2000-01-01")
    assert status == 200
    data = json.loads(body, parse_constant=lambda c: pytest.fail(f"non-JSON constant {c}"))
    assert data["runs_in_window"] == 4
    assert headers["Content-Security-Policy"].startswith("default-src 'none'")
    (part,) = data["parts"]
    (gain,) = part["measurements"]
    assert gain["n"] == 3 and gain["flag"] == "too few boards" and gain["cpk"] is None
    assert data["failing"] == [
        {"part_number": "PN-7", "measurement": "left.gain", "failures": 1, "boards": 1}
    ]
    inject = "st-a' OR '1'='1"
    status, body, _ = _get(
        f"{server}/api/line?window=range&since=2000-01-01&station=" + urllib.request.quote(inject)
    )
    assert status == 200 and json.loads(body)["runs_in_window"] == 0
    for method in ("POST", "PUT", "DELETE", "PATCH"):
        req = urllib.request.Request(f"{server}/api/line", method=method, data=b"x")
        with pytest.raises(urllib.error.HTTPError) as err:
            urllib.request.urlopen(req, timeout=10)
        with err.value:
            assert err.value.code == 405 and err.value.headers["Allow"] == "GET, HEAD"
    status, body, _ = _get(f"{server}/api/line?window=range&since=yesterday")
    assert status == 400 and "not a date" in json.loads(body)["error"]
    assert _get(f"{server}/board/999")[0] == 404


def test_line_page_reads_postgresql(pg_url: str) -> None:
    _run(pg_url, "SN-PG", "st-pg", "PASS", 20.0)
    srv = make_server(pg_url, "127.0.0.1", 0)
    thread = threading.Thread(target=srv.serve_forever, kwargs={"poll_interval": 0.1})
    thread.start()
    try:
        base = f"http://127.0.0.1:{srv.server_address[1]}"
        status, body, _ = _get(f"{base}/api/line?window=today")
        data = json.loads(body)
        assert status == 200 and [r["serial"] for r in data["latest"]] == ["SN-PG"]
        assert data["stations"][0]["station"] == "st-pg"
        assert "line-secret" not in srv.location  # the password stays out of messages
    finally:
        srv.shutdown()
        thread.join(timeout=10)
        srv.server_close()


def test_an_unreachable_database_is_named_as_the_database_not_the_port(tmp_path: Path) -> None:
    """A database that cannot be opened is reported as such: the store's own one-line error,
    never "cannot listen on ..." (the store's error is an OSError too, like a bind failure)."""
    from harness.errors import StoreError

    with pytest.raises(StoreError) as info:
        make_server(str(tmp_path / "missing" / "results.db"), port=0)
    assert "cannot listen" not in str(info.value)
    assert "results database" in str(info.value)
