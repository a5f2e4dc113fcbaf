"""Seeded subset of reliability experiment 6: tenants submit while clients poll, 2 workers."""
import sqlite3

import pytest

from reliability import load


def test_lock_timeouts_finds_sqlites_own_busy_error_and_nothing_else(tmp_path):
    """The log scan flags the message SQLite itself raises when a second writer meets a held
    write lock (SQLite docs, "Result and Error Codes": SQLITE_BUSY, "database is locked"), as a
    worker logs it, and the API's busy 503, but not a job's ordinary progress lines."""
    path = tmp_path / "busy.sqlite3"
    holder = sqlite3.connect(path, isolation_level=None)
    other = sqlite3.connect(path, isolation_level=None, timeout=0.0)
    holder.execute("CREATE TABLE t (x)")
    holder.execute("BEGIN IMMEDIATE")
    with pytest.raises(sqlite3.OperationalError) as busy:
        other.execute("BEGIN IMMEDIATE")
    holder.execute("ROLLBACK")
    holder.close()
    other.close()
    lines = [
        "2026-12-04 15:00:00,000 INFO burstlens.worker: job 1f: attempt 1 by vm:1:a\n",
        f"2026-12-04 15:00:01,000 WARNING burstlens.worker: cannot claim a job ({busy.value}); "
        "retrying in 0.4 s\n",
        "2026-12-04 15:00:02,000 INFO burstlens.worker: job 1f: done\n",
        '{"status": 503, "detail": "the job store is busy; retry shortly"}\n',
    ]
    assert load.lock_timeouts(lines) == [lines[1].rstrip("\n"), lines[3].rstrip("\n")]


@pytest.mark.slow
def test_jobs_all_finish_under_polling_and_the_queue_limit_is_429():
    """Every submitted job is done while pollers read its status, no request errs, no lock
    timeout reaches the log, and the per-tenant queue limit answers 429 naming the limit exactly
    at limit + 1 waiting jobs, other tenants unaffected, a withdrawal freeing a place, and no
    tenant ever has more waiting (docs/design.md §7: waiting jobs per tenant → 429; RFC 6585 §4, 429 Too
    Many Requests). The latency bound here is loose (1 s): this subset shares the machine with
    the rest of the suite; the campaign's row holds the 100 ms goal."""
    row, = load.run(tenants=2, jobs_per_tenant=2, pollers=4, workers=2, max_queued=1,
                    poll_s=0.1, p99_goal_ms=1000.0, seed=7, time_budget_s=240)
    assert row.met, (row.counts, row.result, row.details)
