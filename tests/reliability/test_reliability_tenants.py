"""Reliability experiment 5: every route against another tenant's ids and bad credentials."""
import pytest

from reliability import tenants

pytestmark = pytest.mark.slow


def test_no_route_leaks_across_tenants_or_without_a_valid_token():
    """Bob gets 404 for each of alice's ids on every route, identical to the 404 for an unknown
    id; no token, a wrong, a revoked, a Basic or an empty Bearer token get 401 with
    ``WWW-Authenticate: Bearer`` on every /v1 route; no answer carries alice's ids, file names
    or tokens; Idempotency-Keys do not cross tenants; alice's resources are unchanged (docs/design.md §7;
    RFC 6750 §3; OWASP API Security Top 10, "Broken Object Level Authorization")."""
    row, = tenants.run(time_budget_s=200)
    assert row.met, (row.counts, row.result, row.details)
