"""Slowing down token guessing: failed authentications counted per client address.

What counts. A refused request that presented an ``Authorization`` header — a wrong token, a
revoked token, or a malformed header — is one failure of the client address as the ASGI server
sees it (``request.client.host``; ``serve`` runs uvicorn with ``proxy_headers=False``, so behind a
reverse proxy every client is the proxy's address). A request with no header at all is not
counted: it tests no secret, and the browser page's first call is one.

The rule. Let F be ``auth_failures_allowed`` and W ``auth_failure_window_s``. At each failure, k
is the number of the address's failures in the last W seconds, this one included (a sliding
window). For k ≤ F the answer is the usual 401. For k > F it is 429 with
``Retry-After = min(W, 2^(k−F−1))`` seconds, rounded up to an integer: 1, 2, 4, … doubling with
each further failure in the window and never longer than the window itself. Failures older than W
no longer count, so an address that stops failing for W seconds is back to normal. A client that
obeys Retry-After gets about F + log2(W) + 1 guesses per window; one that ignores it is held
``auth_slow_answer_s`` seconds (at most Retry-After) before each 429 — an ``asyncio.sleep``,
which costs the server a suspended coroutine, not a thread — so each connection it opens tests at
most one guess per that delay.

Why a valid token is never refused, and why the 429 comes after the comparison. The only way to
tell the owner of a valid token from a guesser is to compare the presented token with the stored
ones. Refusing a slowed address before that comparison would therefore lock out every owner who
shares the address (a NAT, a proxy) — exactly the denial of service an attacker wants. So every
request's token is compared (in constant time, :func:`burstlens.service.auth.tenant_for_token`),
a match passes at once whatever the address's state, and the limiter only counts and answers the
failures. The price: a guesser who ignores Retry-After still learns, per request, whether that
guess was right, so the limiter cannot reduce the number of guesses tested, only their rate per
connection (the delay above) and their cost to honest clients. The defence against guessing
proper is the token space: 256 random bits, so even 10⁹ guesses a second for a century succeed
with probability below 2^−160. A success does not clear an address's failures: a tenant holding
a valid token of its own could otherwise interleave it with guesses at other tenants' tokens and
never be slowed.

State. Kept in memory, per API process (a restart forgets it; several API processes behind one
address would each count separately). At most ``auth_clients_tracked`` addresses are kept, in
order of their latest failure; past the cap the address whose latest failure is oldest is dropped,
and addresses with no failure in the last W seconds are dropped as they are met. Each address
keeps at most F + ⌈log2 W⌉ + 1 timestamps (enough for Retry-After to reach its cap), so an
attacker rotating addresses or hammering one cannot grow the state without bound. One lock
guards it, so threads may share a limiter.
"""
from __future__ import annotations

import math
import threading
import time
from collections import OrderedDict, deque
from dataclasses import dataclass
from typing import Annotated
from collections.abc import Callable

from fastapi import Depends, Request

from burstlens.service.dependencies import SettingsDep


@dataclass(frozen=True)
class Slowdown:
    """What the limiter says about one failure: ``failures`` in the window (this one included,
    saturating at the limiter's ``kept_per_client``), and, when ``slowed``, the ``retry_after_s``
    (integer seconds) to send in Retry-After; 0 when not slowed."""

    failures: int
    slowed: bool
    retry_after_s: int


def retry_after_s(failures: int, failures_allowed: int, window_s: float) -> int:
    """Retry-After (integer seconds) after ``failures`` failures in the window: 0 while
    ``failures ≤ failures_allowed``, then ``ceil(min(window_s, 2^(failures − failures_allowed − 1)))``
    (binary exponential backoff, capped at the window length; common practice)."""
    if failures <= failures_allowed:
        return 0
    excess = failures - failures_allowed - 1
    # 2**excess grows without bound; past log2(window) the cap applies anyway
    if excess >= math.log2(max(window_s, 1.0)):
        return math.ceil(window_s)
    return math.ceil(min(window_s, 2.0 ** excess))


class GuessLimiter:
    """Failed authentications per client address in a sliding window (module docstring: the
    rule, what counts, the bounds). ``clock`` gives seconds (``time.monotonic`` by default)."""

    def __init__(self, failures_allowed: int, window_s: float, clients_tracked: int,
                 clock: Callable[[], float] = time.monotonic):
        if int(failures_allowed) < 1:
            raise ValueError(f"failures_allowed must be at least 1, got {failures_allowed!r}")
        if not float(window_s) > 0:
            raise ValueError(f"window_s must be positive (seconds), got {window_s!r}")
        if int(clients_tracked) < 1:
            raise ValueError(f"clients_tracked must be at least 1, got {clients_tracked!r}")
        self.failures_allowed = int(failures_allowed)
        self.window_s = float(window_s)
        self.clients_tracked = int(clients_tracked)
        self.kept_per_client = (self.failures_allowed + 1
                                + math.ceil(math.log2(max(self.window_s, 1.0))))
        self._clock = clock
        self._lock = threading.Lock()
        self._failures: OrderedDict[str, deque[float]] = OrderedDict()  # oldest latest-failure first

    @classmethod
    def from_settings(cls, settings) -> GuessLimiter:
        return cls(settings.auth_failures_allowed, settings.auth_failure_window_s,
                   settings.auth_clients_tracked)

    def record_failure(self, client: str) -> Slowdown:
        """Count one failed authentication from ``client`` now and say whether it is slowed."""
        now = self._clock()
        horizon = now - self.window_s
        with self._lock:
            # entries are ordered by their latest failure, so the expired ones are at the front
            while self._failures and next(iter(self._failures.values()))[-1] <= horizon:
                self._failures.popitem(last=False)
            times = self._failures.pop(client, None)
            if times is None:
                times = deque(maxlen=self.kept_per_client)
            while times and times[0] <= horizon:
                times.popleft()
            times.append(now)
            self._failures[client] = times
            if len(self._failures) > self.clients_tracked:
                self._failures.popitem(last=False)
            count = len(times)
        wait = retry_after_s(count, self.failures_allowed, self.window_s)
        return Slowdown(failures=count, slowed=wait > 0, retry_after_s=wait)

    def failures(self, client: str) -> int:
        """Failures of ``client`` in the window now (0 if it is not tracked)."""
        horizon = self._clock() - self.window_s
        with self._lock:
            return sum(1 for t in self._failures.get(client, ()) if t > horizon)

    def __len__(self) -> int:
        """Addresses tracked now (expired ones included until they are met)."""
        with self._lock:
            return len(self._failures)


def client_address(request: Request) -> str:
    """The client's IP address as the ASGI server reports it (``"unknown"`` if it reports none)."""
    return request.client.host if request.client else "unknown"


async def get_guess_limiter(request: Request, settings: SettingsDep) -> GuessLimiter:
    """FastAPI dependency: the app's limiter (one per app, so one per API process), made from its
    settings on first use. It runs on the app's event loop, one thread, so the check-then-set
    cannot race."""
    limiter = getattr(request.app.state, "guess_limiter", None)
    if limiter is None:
        limiter = GuessLimiter.from_settings(settings)
        request.app.state.guess_limiter = limiter
    return limiter


GuessLimiterDep = Annotated[GuessLimiter, Depends(get_guess_limiter)]
