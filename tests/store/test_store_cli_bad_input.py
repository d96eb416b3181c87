"""Bad database input on the command line: one line naming the problem and the fix,
exit status 2, never a traceback, nothing written (README, "Exit status")."""

from __future__ import annotations

import socket
from pathlib import Path

import pytest
from store_worker import header

from harness.cli.main import main
from harness.store import SCHEMA_VERSION, open_store
from tests.support.db import is_pg, raw_sql, stamp_newer_schema


def _fails(capsys: pytest.CaptureFixture[str], *argv: str) -> str:
    status = main(list(argv))
    err = capsys.readouterr().err.strip()
    assert status == 2, err
    assert len(err.splitlines()) == 1, err
    assert "Traceback" not in err and err.startswith("stageproof: error:")
    assert "(fix:" in err
    return err


def _closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def test_unreachable_server(capsys: pytest.CaptureFixture[str]) -> None:
    url = f"postgresql://line:pw@127.0.0.1:{_closed_port()}/results"
    err = _fails(capsys, "results", "--db", url)
    assert "cannot reach PostgreSQL server" in err and ":pw@" not in err
    _fails(capsys, "store", "copy", "--from", url, "--to", "x.db")


def test_wrong_credentials(pg_cluster, capsys: pytest.CaptureFixture[str]) -> None:
    url = pg_cluster.url(password="not-the-password")
    err = _fails(capsys, "results", "--db", url)
    assert "refused the user name or password" in err
    assert "not-the-password" not in err  # the password never reaches the screen


def test_unknown_scheme_writes_nothing(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch, capsys: pytest.CaptureFixture[str]
) -> None:
    monkeypatch.chdir(tmp_path)
    err = _fails(capsys, "results", "--db", "mysql://db/results")
    assert "unknown results store URL scheme 'mysql'" in err
    open_store(tmp_path / "a.db").close()
    _fails(capsys, "store", "copy", "--from", "a.db", "--to", "mongodb://db/x")
    assert sorted(p.name for p in tmp_path.iterdir() if p.suffix == ".db") == ["a.db"]


def test_newer_schema_writes_nothing(store_url: str, capsys: pytest.CaptureFixture[str]) -> None:
    with open_store(store_url) as store:
        store.finish_run(store.begin_run(header("SN-N")), "complete", "PASS")
    stamp_newer_schema(store_url, SCHEMA_VERSION + 1)
    before = raw_sql(store_url, "SELECT key, value FROM meta ORDER BY key")
    err = _fails(capsys, "results", "--db", store_url)
    assert "made by a newer version" in err
    _fails(capsys, "store", "copy", "--from", store_url, "--to", store_url + "-other.db")
    assert raw_sql(store_url, "SELECT key, value FROM meta ORDER BY key") == before


def test_copy_between_the_same_database(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    with open_store(store_url) as store:
        store.finish_run(store.begin_run(header("SN-S")), "complete", "PASS")
    same = store_url if is_pg(store_url) else f"sqlite:///{store_url}"
    before = raw_sql(store_url, "SELECT count(*), max(run_id) FROM runs")
    err = _fails(capsys, "store", "copy", "--from", store_url, "--to", same)
    assert "same database" in err
    assert raw_sql(store_url, "SELECT count(*), max(run_id) FROM runs") == before


def test_copy_reports_copied_and_skipped(
    store_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    station = tmp_path / "station.db"
    with open_store(station) as store:
        for _ in range(3):
            store.finish_run(store.begin_run(header("SN-K")), "complete", "PASS")
    assert main(["store", "copy", "--from", str(station), "--to", store_url]) == 0
    assert "copied 3 run(s)" in capsys.readouterr().out
    assert main(["store", "copy", "--from", str(station), "--to", store_url]) == 0
    out = capsys.readouterr().out
    assert "copied 0 run(s)" in out and "skipped 3 already there" in out


def test_web_warns_off_loopback() -> None:
    from harness.cli.cmd_web import _loopback

    assert _loopback("127.0.0.1") and _loopback("::1") and _loopback("localhost")
    assert not _loopback("0.0.0.0") and not _loopback("192.0.2.7")


def test_a_read_only_postgresql_role_reads_but_never_writes(
    pg_url: str, tmp_path: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    """A viewer role granted SELECT only (PostgreSQL manual, GRANT) can list and report;
    opening for writing fails in one line before anything is written."""
    with open_store(pg_url) as store:
        store.finish_run(store.begin_run(header("SN-V")), "complete", "PASS")
    role = "viewer_" + pg_url.rsplit("/", 1)[1]  # roles are cluster-wide: one per database
    raw_sql(pg_url, f"CREATE ROLE {role} LOGIN PASSWORD 'view-only'")
    raw_sql(pg_url, f"GRANT SELECT ON ALL TABLES IN SCHEMA public TO {role}")
    user = pg_url.split("//", 1)[1].split("@", 1)[0]
    viewer = pg_url.replace(f"//{user}@", f"//{role}:view-only@")
    assert main(["results", "--db", viewer, "--json"]) == 0
    assert '"SN-V"' in capsys.readouterr().out
    # the same database through another role is still the same database
    assert "same database" in _fails(capsys, "store", "copy", "--from", pg_url, "--to", viewer)
    station = tmp_path / "station.db"
    with open_store(station) as store:
        store.finish_run(store.begin_run(header("SN-W")), "complete", "PASS")
    before = raw_sql(pg_url, "SELECT key, value FROM meta ORDER BY key")
    err = _fails(capsys, "store", "copy", "--from", str(station), "--to", viewer)
    assert "may not write" in err
    assert raw_sql(pg_url, "SELECT key, value FROM meta ORDER BY key") == before
    assert raw_sql(pg_url, "SELECT count(*) FROM runs") == [(1,)]
