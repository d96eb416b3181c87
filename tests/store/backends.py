"""Reading and editing a results database with the backend's own driver, outside the
store's code: sqlite3 (Python standard library) or psycopg (PostgreSQL's Python driver)."""

from __future__ import annotations

import sqlite3
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
