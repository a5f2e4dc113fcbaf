"""Seeded subset of reliability experiment 6: tenants submit while clients poll, 2 workers."""
import pytest

from reliability import load

pytestmark = pytest.mark.slow


def test_jobs_all_finish_under_polling_and_the_queue_limit_is_429():
    """Every submitted job succeeds while pollers read its status, no request errs, and the
    per-tenant queue limit answers 429 naming the limit exactly at limit + 1 queued jobs, other
    tenants unaffected, a cancel freeing a place (DESIGN §7: queued jobs per tenant → 429;
    RFC 6585 §4, 429 Too Many Requests)."""
    row, = load.run(tenants=2, jobs_per_tenant=2, pollers=4, workers=2, max_queued=1, seed=7,
                    time_budget_s=240)
    assert row.met, (row.counts, row.result, row.details)
