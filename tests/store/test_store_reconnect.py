"""A PostgreSQL station whose connection is dropped mid-run reconnects and goes on.

Real server (the tests' own cluster).  The drop is the server's own: another session ends
the store's backend with ``pg_terminate_backend`` (PostgreSQL manual §9.27.2, "Server
Signaling Functions"), as an administrator, a failover or an idle-session kill would; a
session-level advisory lock ends with its session (§13.3.5, "Advisory Locks"), so the run
looks abandoned until the store takes its lock back.
"""

from __future__ import annotations

import pytest
from store_worker import header

from harness.errors import StoreError
from harness.store import MeasurementRow, SweepPointRow, open_store
from harness.store.postgres import LOCK_SPACE
from tests.support.db import raw_sql

KILL_OTHERS = (
    "SELECT pg_terminate_backend(pid) FROM pg_stat_activity "
    "WHERE datname = current_database() AND pid <> pg_backend_pid()"
)


def _m(name: str, value: float) -> MeasurementRow:
    return MeasurementRow("A", name, value, "dB", 19.0, 21.0, 0.02, "pass", "nominal")


def _lock_is_free(url: str, run_id: int) -> bool:
    taken = raw_sql(url, "SELECT pg_try_advisory_lock(%s, %s)", (LOCK_SPACE, run_id))[0][0]
    if taken:
        raw_sql(url, "SELECT pg_advisory_unlock(%s, %s)", (LOCK_SPACE, run_id))
    return bool(taken)


def test_a_dropped_connection_is_reopened_and_nothing_is_lost_or_doubled(pg_url: str) -> None:
    with open_store(pg_url) as store:
        run_id = store.begin_run(header("SN-R1"))
        store.add_measurement(run_id, _m("gain", 20.0))
        assert raw_sql(pg_url, KILL_OTHERS)
        assert _lock_is_free(pg_url, run_id)  # the session, and with it the lock, is gone
        store.add_measurement(run_id, _m("gain@100Hz", 19.5))
        assert not _lock_is_free(pg_url, run_id)  # taken back with the new connection
        raw_sql(pg_url, KILL_OTHERS)
        store.add_sweep_point(run_id, SweepPointRow("A", "clip", 0.1, 20.0, 0.1, 0.2, False))
        raw_sql(pg_url, KILL_OTHERS)
        store.finish_run(run_id, "complete", "PASS")
        assert [(m.name, m.value) for m in store.measurements(run_id)] == [
            ("gain", 20.0),
            ("gain@100Hz", 19.5),
        ]
        assert len(store.sweep_points(run_id)) == 1
        row = store.get_run(run_id)
        assert (row.status, row.verdict) == ("complete", "PASS")


def test_a_run_recovered_as_aborted_in_the_gap_is_not_written_to(pg_url: str) -> None:
    with open_store(pg_url) as store:
        run_id = store.begin_run(header("SN-R2"))
        store.add_measurement(run_id, _m("gain", 20.0))
        raw_sql(pg_url, KILL_OTHERS)
        with open_store(pg_url) as other:  # another station finds the run's owner gone
            assert other.recover_aborted() == [run_id]
        with pytest.raises(StoreError, match=f"run {run_id} is aborted, not running"):
            store.add_measurement(run_id, _m("gain@100Hz", 19.5))
        assert [m.name for m in store.measurements(run_id)] == ["gain"]
