"""Reading and editing a results database with the backend's own driver, outside the
store's code: sqlite3 (Python standard library) or psycopg (PostgreSQL's Python driver)."""

from __future__ import annotations

import sqlite3
import subprocess
from collections.abc import Sequence
from typing import Any


def is_pg(url: str) -> bool:
    return url.startswith("postgresql://")


def raw_sql(url: str, sql: str, params: Sequence[Any] = ()) -> list[tuple]:
    """Run one statement with the backend's own driver, outside the store's code."""
    if url.startswith("postgresql://"):
        import psycopg

        with psycopg.connect(url, autocommit=True) as conn:
            cur = conn.execute(sql.replace("?", "%s"), tuple(params))
            return cur.fetchall() if cur.description else []
    conn = sqlite3.connect(url)
    try:
        cur = conn.execute(sql, tuple(params))
        rows = cur.fetchall()
        conn.commit()
        return rows
    finally:
        conn.close()


def stamp_newer_schema(url: str, version: int) -> None:
    """Mark the database as made by a newer schema: SQLite's PRAGMA user_version, or the
    PostgreSQL store's meta row."""
    if is_pg(url):
        raw_sql(url, "UPDATE meta SET value = ? WHERE key = 'schema_version'", (str(version),))
    else:
        raw_sql(url, f"PRAGMA user_version = {int(version)}")


def reap(child: subprocess.Popen) -> None:
    """Kill a worker still running and close its pipes."""
    if child.poll() is None:
        child.kill()
    child.wait()
    for stream in (child.stdin, child.stdout, child.stderr):
        if stream:
            stream.close()
