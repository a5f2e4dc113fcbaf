"""Seeded subset of reliability experiment 2: kill -9 the server with jobs queued and in flight."""
import pytest

from reliability import restarts

pytestmark = pytest.mark.slow


def test_server_kill_loses_and_duplicates_nothing():
    """After SIGKILL of ``serve`` and its workers while jobs are queued, running and being
    submitted, a restart on the same data dir plus the client's retries with the same
    Idempotency-Key end with every job succeeded exactly once, identical results, no orphaned
    files and ``PRAGMA integrity_check`` ok (docs/design.md §7: acknowledged only after COMMIT, WAL with
    synchronous=FULL; SQLite documentation, "Atomic Commit In SQLite" and "PRAGMA
    integrity_check"; IETF draft "The Idempotency-Key HTTP Header Field")."""
    row, = restarts.run(cycles=1, batch=2, burst=2, seed=7, time_budget_s=300)
    assert row.met, (row.counts, row.result, row.details)
