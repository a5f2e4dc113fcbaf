"""The token-guessing limiter's rule, bounds and thread safety, and the timing of refusals.

The limiter's rule is stated in service/guessing.py; its behaviour through the app (429,
Retry-After, the owner never refused) is tested in test_auth.py.
"""
from __future__ import annotations

import secrets
import sys
import threading

import numpy as np
import pytest
from burstlens.service.testing import settings_for

from burstlens.service.guessing import GuessLimiter, retry_after_s


class FakeClock:
    def __init__(self, now: float = 1000.0):
        self.now = now

    def __call__(self) -> float:
        return self.now


def test_retry_after_is_truncated_binary_exponential_backoff():
    """Retry-After is 0 up to the allowed failures, then 2^j seconds for the j-th failure past
    them (j = 0, 1, ...), truncated at the window and rounded up to whole seconds (truncated
    binary exponential backoff: Metcalfe & Boggs, "Ethernet: Distributed Packet Switching for
    Local Computer Networks", 1976; RFC 9110 §10.2.3: delay-seconds is a non-negative integer)."""
    allowed, window = 5, 100.5
    got = [retry_after_s(k, allowed, window) for k in range(1, 20)]
    expected = [0] * allowed + [int(np.ceil(min(window, 2.0 ** j))) for j in range(19 - allowed)]
    assert got == expected
    assert got[-1] == 101  # the cap, rounded up
    assert retry_after_s(10**6, allowed, window) == 101  # no overflow far past the cap


def test_window_slides():
    """Failures older than the window stop counting (a sliding window): after the window has
    passed since the last failure the address is back to the usual 401; a failure inside it
    still counts."""
    clock = FakeClock()
    limiter = GuessLimiter(failures_allowed=2, window_s=60.0, clients_tracked=10, clock=clock)
    assert [limiter.record_failure("a").slowed for _ in range(3)] == [False, False, True]
    clock.now += 30.0
    assert limiter.record_failure("a").failures == 4
    clock.now += 30.5  # the first three are now older than 60 s, the fourth is not
    assert limiter.failures("a") == 1
    verdict = limiter.record_failure("a")
    assert (verdict.failures, verdict.slowed, verdict.retry_after_s) == (2, False, 0)
    clock.now += 61.0
    assert limiter.failures("a") == 0


def test_state_is_capped_and_evicts_the_oldest():
    """An attacker rotating addresses cannot grow the state past `clients_tracked`: the address
    whose latest failure is oldest goes first; hammering one address keeps at most
    `kept_per_client` timestamps while its Retry-After stays at the cap."""
    clock = FakeClock()
    limiter = GuessLimiter(failures_allowed=3, window_s=600.0, clients_tracked=100, clock=clock)
    for i in range(10_000):
        clock.now += 0.001
        limiter.record_failure(f"10.{i // 65536}.{i // 256 % 256}.{i % 256}")
        assert len(limiter) <= 100
    assert limiter.failures("10.0.0.0") == 0  # evicted
    assert limiter.failures("10.0.39.15") == 1  # i = 9999, the newest, kept
    limiter.record_failure("10.0.39.14")  # refreshed: now the newest
    limiter.record_failure("192.0.2.1")  # one more address evicts the oldest (i = 9900)
    assert limiter.failures("10.0.38.172") == 0 and limiter.failures("10.0.39.14") == 2
    for _ in range(5000):
        verdict = limiter.record_failure("192.0.2.1")
    assert len(limiter._failures["192.0.2.1"]) == limiter.kept_per_client == 3 + 1 + 10
    assert verdict.retry_after_s == 600


def test_expired_addresses_are_dropped():
    """Addresses with no failure in the window are dropped when the limiter next records one,
    so a quiet limiter does not keep yesterday's attackers."""
    clock = FakeClock()
    limiter = GuessLimiter(failures_allowed=3, window_s=60.0, clients_tracked=1000, clock=clock)
    for i in range(50):
        limiter.record_failure(f"198.51.100.{i}")
    clock.now += 61.0
    limiter.record_failure("203.0.113.1")
    assert len(limiter) == 1


def test_counts_are_exact_under_threads():
    """Eight threads recording failures at once lose none (one lock guards the state): every
    address ends with exactly the failures recorded for it. A tiny switch interval makes the
    interpreter change threads often, so a missing lock would show."""
    old = sys.getswitchinterval()
    sys.setswitchinterval(1e-6)
    try:
        limiter = GuessLimiter(failures_allowed=100_000, window_s=3600.0, clients_tracked=1000)

        def hammer(k: int) -> None:
            for i in range(2000):
                limiter.record_failure(f"shared-{i % 4}")
                limiter.record_failure(f"own-{k}-{i % 50}")

        threads = [threading.Thread(target=hammer, args=(k,)) for k in range(8)]
        for t in threads:
            t.start()
        for t in threads:
            t.join()
    finally:
        sys.setswitchinterval(old)
    assert [limiter.failures(f"shared-{j}") for j in range(4)] == [4000] * 4
    assert all(limiter.failures(f"own-{k}-{j}") == 40 for k in range(8) for j in range(50))
    assert len(limiter) == 4 + 8 * 50


@pytest.mark.parametrize("field, value", [("failures_allowed", 0), ("window_s", 0.0),
                                          ("clients_tracked", 0)])
def test_bad_limiter_settings_are_refused(field, value):
    """A limiter that could never slow anyone, or keep anyone, is a ValueError naming the field."""
    kwargs = {"failures_allowed": 3, "window_s": 60.0, "clients_tracked": 10, field: value}
    with pytest.raises(ValueError, match=field):
        GuessLimiter(**kwargs)


def refusal_timings(client, kinds: dict[str, dict], rounds: int, seed: int) -> dict[str, np.ndarray]:
    """Seconds per request for each kind of header, ``rounds`` requests each, the kinds
    interleaved in a fresh random order every round so that drift on a busy machine falls on
    every kind alike; each round's requests are paired by index."""
    import time

    rng = np.random.default_rng(seed)
    names = list(kinds)
    out = {name: np.empty(rounds) for name in names}
    for r in range(-20, rounds):  # 20 warm-up rounds, not kept
        for i in rng.permutation(len(names)):
            t0 = time.perf_counter()
            response = client.get("/v1/jobs", headers=kinds[names[i]])
            elapsed = time.perf_counter() - t0
            assert response.status_code == 401
            if r >= 0:
                out[names[i]][r] = elapsed
    return out


def test_wrong_revoked_and_malformed_tokens_take_the_same_time(tmp_path):
    """Through the app, a wrong token, a revoked token and a malformed header are refused in
    the same time: for each pair, the Wilcoxon signed-rank test on the per-round paired
    differences does not reject equal medians at the 0.001 level, or the median difference is
    under 50 µs, below what a client can resolve through an HTTP stack whose own spread is
    milliseconds (Wilcoxon, "Individual Comparisons by Ranking Methods", 1945;
    scipy.stats.wilcoxon; the margin is common practice). The kinds are interleaved in random
    order so machine load falls on all alike. The sharper check, without HTTP, is the next test."""
    from fastapi.testclient import TestClient
    from scipy.stats import wilcoxon

    from burstlens.service.app import create_app
    from burstlens.service.auth import create_token
    from burstlens.service.store import Store

    store = Store(tmp_path / "data")
    for i in range(20):  # a realistic number of active tokens to compare against
        create_token(store, f"tenant{i}")
    revoked = create_token(store, "revoked")
    store.revoke_token("revoked")
    app = create_app(settings_for(tmp_path / "data", auth_failures_allowed=10**6))
    client = TestClient(app, raise_server_exceptions=False)
    same_length = len(revoked) - 3  # every token has the same length: bl_ + 43 characters
    kinds = {"wrong": {"Authorization": f"Bearer bl_{secrets.token_urlsafe(32)}"},
             "revoked": {"Authorization": f"Bearer {revoked}"},
             "malformed": {"Authorization": f"Basic {'A' * same_length}"}}
    times = refusal_timings(client, kinds, rounds=400, seed=25)
    for a, b in (("wrong", "revoked"), ("wrong", "malformed"), ("revoked", "malformed")):
        diff = times[a] - times[b]
        p = wilcoxon(diff).pvalue
        assert p > 0.001 or abs(np.median(diff)) < 50e-6, (a, b, p, np.median(diff))


def lookup_timings(store, headers: dict[str, str], rounds: int, seed: int) -> dict[str, np.ndarray]:
    """Seconds per :func:`authenticate` call for each header value, interleaved in a fresh
    random order every round (as :func:`refusal_timings`, without HTTP around it)."""
    import time

    from burstlens.service.auth import authenticate

    rng = np.random.default_rng(seed)
    names = list(headers)
    out = {name: np.empty(rounds) for name in names}
    for r in range(-50, rounds):
        for i in rng.permutation(len(names)):
            t0 = time.perf_counter()
            outcome = authenticate(store, True, headers[names[i]])
            elapsed = time.perf_counter() - t0
            assert outcome.tenant is None
            if r >= 0:
                out[names[i]][r] = elapsed
    return out


def test_token_lookup_takes_the_same_time_for_every_refusal(tmp_path):
    """The lookup alone (service/auth.py's authenticate, no HTTP noise around it, so a
    difference of a few microseconds shows): a wrong token, a revoked token, a malformed header
    and a missing one take the same time — for each pair the Wilcoxon signed-rank test on paired
    differences does not reject equal medians at the 0.001 level, or the median difference is
    under 1 µs, far below the jitter of any network path (Wilcoxon 1945; scipy.stats.wilcoxon;
    the margin is common practice: at 2000 rounds the test resolves tens of nanoseconds, which
    ordinary code differences such as hashing an empty string reach). A path that refused a
    malformed header before hashing and reading the active tokens (about 35 µs shorter on this
    machine) is reported here."""
    from scipy.stats import wilcoxon

    from burstlens.service.auth import create_token
    from burstlens.service.store import Store

    store = Store(tmp_path / "data")
    for i in range(20):
        create_token(store, f"tenant{i}")
    revoked = create_token(store, "revoked")
    store.revoke_token("revoked")
    headers = {"wrong": f"Bearer bl_{secrets.token_urlsafe(32)}", "revoked": f"Bearer {revoked}",
               "malformed": f"Basic {'A' * (len(revoked) - 3)}", "missing": None}
    times = lookup_timings(store, headers, rounds=2000, seed=25)
    names = list(headers)
    for i, a in enumerate(names):
        for b in names[i + 1:]:
            diff = times[a] - times[b]
            p = wilcoxon(diff).pvalue
            assert p > 0.001 or abs(np.median(diff)) < 1e-6, (a, b, p, np.median(diff))
