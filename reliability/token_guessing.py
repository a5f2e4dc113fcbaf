"""Experiment 7 — token guessing: a guesser hammers the API while the token's owner works.

Promise (docs/design.md §7, service/guessing.py): repeated failed authentication from one address is
slowed — past ``auth_failures_allowed`` failures in the window each answer is a 429 with an
integer Retry-After, held ``auth_slow_answer_s`` before it is sent — and a valid token is never
refused, even from the guesser's own address; a wrong, a revoked and a malformed token are
refused in the same time.

Method: a data dir with 20 tokens, one of them revoked. Timing: on
``serve --workers 0`` with the limiter out of reach (failures allowed 10⁹), ``rounds`` requests
of each kind (wrong, revoked, malformed), interleaved in a seeded random order, timed at the
client; medians, and the Wilcoxon signed-rank test on the paired differences (Wilcoxon 1945;
scipy.stats.wilcoxon). Guessing: on a second server with the limiter at its shipped rule (10
failures allowed, 1 s hold) and a 60 s window, ``connections`` guesser threads send random tokens
of the right shape as fast as the answers come, ignoring Retry-After, for ``seconds`` seconds,
while the owner, from the same address (both are 127.0.0.1, as behind a NAT), lists its jobs
every 0.05 s. Guesses counted are answered guesses (each one was compared with the stored
tokens, so each was tested).
"""
from __future__ import annotations

import secrets
import tempfile
import threading
import time
from pathlib import Path

import httpx
import numpy as np

from burstlens.service.auth import create_token
from burstlens.service.store import Store
from reliability.harness import LiveServer, Row, percentile, remove_tree

GOAL = ("owner never refused; after the threshold ≤ 1 guess per connection per hold; "
        "wrong/revoked/malformed refusal times equal (Wilcoxon p > 0.001 or |Δ median| < 50 µs)")
ALLOWED, HOLD_S, WINDOW_S = 10, 1.0, 60.0


def refusal_times(url: str, kinds: dict[str, dict], rounds: int, seed: int) -> dict[str, np.ndarray]:
    """Seconds per request (client side) for each kind, kinds interleaved in a fresh seeded
    random order every round; 20 warm-up rounds are dropped."""
    rng = np.random.default_rng(seed)
    names = list(kinds)
    out = {name: np.empty(rounds) for name in names}
    with httpx.Client(base_url=url, timeout=30.0) as client:
        for r in range(-20, rounds):
            for i in rng.permutation(len(names)):
                t0 = time.perf_counter()
                status = client.get("/v1/jobs", headers=kinds[names[i]]).status_code
                elapsed = time.perf_counter() - t0
                if status != 401:
                    raise RuntimeError(f"{names[i]} token answered {status}, expected 401")
                if r >= 0:
                    out[names[i]][r] = elapsed
    return out


def guess_while_owner_works(url: str, owner_token: str, connections: int, seconds: float):
    """Guesser threads and the owner's poller for ``seconds``; returns (guess answers as
    (time since start, status, Retry-After) per connection, owner (status, seconds) list)."""
    stop = time.monotonic() + seconds
    start = time.monotonic()
    guesses: list[list[tuple[float, int, str | None]]] = [[] for _ in range(connections)]
    owner: list[tuple[int, float]] = []

    def guesser(k: int) -> None:
        with httpx.Client(base_url=url, timeout=30.0) as client:
            while time.monotonic() < stop:
                response = client.get("/v1/jobs", headers={
                    "Authorization": f"Bearer bl_{secrets.token_urlsafe(32)}"})
                guesses[k].append((time.monotonic() - start, response.status_code,
                                   response.headers.get("retry-after")))

    def poller() -> None:
        with httpx.Client(base_url=url, timeout=30.0) as client:
            while time.monotonic() < stop:
                t0 = time.perf_counter()
                status = client.get("/v1/jobs", headers={
                    "Authorization": f"Bearer {owner_token}"}).status_code
                owner.append((status, time.perf_counter() - t0))
                time.sleep(0.05)

    threads = [threading.Thread(target=guesser, args=(k,)) for k in range(connections)]
    threads.append(threading.Thread(target=poller))
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    return guesses, owner


def run(seed: int = 20261202, rounds: int = 300, connections: int = 4,
        seconds: float = 4.0) -> list[Row]:
    from scipy.stats import wilcoxon

    tmp = Path(tempfile.mkdtemp(prefix="bl-guess-"))
    data = tmp / "data"
    details: list[str] = []
    servers: list[LiveServer] = []
    try:
        store = Store(data)  # in-process: 20 `burstlens tokens` runs would cost seconds
        owner_token = create_token(store, "owner")
        for i in range(18):
            create_token(store, f"tenant{i}")
        revoked = create_token(store, "old-laptop", tenant="owner")
        store.revoke_token("old-laptop")

        quiet = LiveServer(data, workers=0, BURSTLENS_AUTH_FAILURES_ALLOWED=str(10**9)).start()
        servers.append(quiet)
        kinds = {"wrong": {"Authorization": f"Bearer bl_{secrets.token_urlsafe(32)}"},
                 "revoked": {"Authorization": f"Bearer {revoked}"},
                 "malformed": {"Authorization": f"Basic {'A' * (len(revoked) - 3)}"}}
        times = refusal_times(quiet.url, kinds, rounds, seed)
        quiet.stop()
        medians = {k: float(np.median(v)) * 1e3 for k, v in times.items()}
        timing_ok = True
        pairs = []
        for a, b in (("wrong", "revoked"), ("wrong", "malformed"), ("revoked", "malformed")):
            diff = times[a] - times[b]
            p = float(wilcoxon(diff).pvalue)
            delta_us = float(np.median(diff)) * 1e6
            pairs.append(f"{a}−{b} {delta_us:+.0f} µs p={p:.2g}")
            if not (p > 0.001 or abs(delta_us) < 50):
                timing_ok = False
                details.append(f"refusal times differ: {a} vs {b}: median difference "
                               f"{delta_us:+.0f} µs, Wilcoxon p = {p:.2g}")

        slow = LiveServer(data, workers=0, BURSTLENS_AUTH_FAILURES_ALLOWED=str(ALLOWED),
                          BURSTLENS_AUTH_FAILURE_WINDOW_S=str(WINDOW_S),
                          BURSTLENS_AUTH_SLOW_ANSWER_S=str(HOLD_S)).start()
        servers.append(slow)
        guesses, owner = guess_while_owner_works(slow.url, owner_token, connections, seconds)
        answers = [g for conn in guesses for g in conn]
        n401 = sum(1 for _, status, _ in answers if status == 401)
        n429 = sum(1 for _, status, _ in answers if status == 429)
        other = len(answers) - n401 - n429
        waits = [int(ra) for _, status, ra in answers if status == 429 and ra is not None]
        if n429 and len(waits) != n429:
            details.append("a 429 came without Retry-After")
        if other:
            details.append(f"{other} guesses answered neither 401 nor 429")
        # each connection has one request in flight, held HOLD_S once slowed
        slowed_bound = connections * (seconds / HOLD_S + 1)
        rate_ok = n401 <= ALLOWED and n429 <= slowed_bound
        if not rate_ok:
            details.append(f"guesses: {n401} answered 401 (allowed {ALLOWED}), {n429} answered "
                           f"429 (bound {slowed_bound:.0f})")
        owner_ok_count = sum(1 for status, _ in owner if status == 200)
        owner_p50 = percentile([s for _, s in owner], 50) * 1e3
        owner_ok = bool(owner) and owner_ok_count == len(owner)
        if not owner_ok:
            details.append(f"owner refused: {sorted({s for s, _ in owner if s != 200})}")
        counts = (f"timing: {rounds} × 3 kinds, 20 tokens stored; guessing: {connections} "
                  f"connections × {seconds:.0f} s from the owner's address, owner polling "
                  f"every 0.05 s")
        result = (f"guesses {len(answers)} in {seconds:.0f} s ({len(answers) / seconds:.1f}/s; "
                  f"{n401}× 401 then {n429}× 429, Retry-After up to {max(waits, default=0)} s); "
                  f"owner {owner_ok_count}/{len(owner)} ok, p50 {owner_p50:.1f} ms; refusal "
                  f"medians wrong {medians['wrong']:.2f} / revoked {medians['revoked']:.2f} / "
                  f"malformed {medians['malformed']:.2f} ms ({'; '.join(pairs)})")
        met = timing_ok and rate_ok and owner_ok and not other and len(waits) == n429
        return [Row("7 token guessing", counts, result, GOAL, met, details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row("7 token guessing", "-", "experiment aborted", GOAL, False, details)]
    finally:
        for server in servers:
            server.stop()
        remove_tree(tmp)
