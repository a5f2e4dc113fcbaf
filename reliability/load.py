"""Experiment 6 — load: many tenants submit jobs while many clients poll, against 2 workers.

Promise (docs/design.md §7): the queue is light and the compute is heavy — one host with the API, the
store and two workers finishes every job while clients poll, answers status quickly, limits
waiting jobs per tenant with a 429 that says so (the limit is ``max_queued_jobs``), and never
makes a request or a worker wait out a locked store.

Method: first a quota probe on its own ``serve --workers 0`` (nothing is claimed, so the count is
exact): a tenant's ``max_queued_jobs`` submissions are 201, the next is 429 naming the limit,
another tenant is not affected, and a withdrawal frees a place. Then the load: ``serve --workers
2`` with the same limit and the deployment's default lease (30 s); each tenant uploads a small
corpus and submits its jobs from its own thread (a 429 is waited out and retried with the same
Idempotency-Key, as a client would), while each poller calls ``GET /v1/jobs/{id}`` on a random
known job every ``poll_s`` (the interval of ``burstlens.service.client.Client.wait``, 1 s, from
a random start phase) until every job is final or the time is up. The corpora and the clients'
one TLS context are made before the threads start, so the generator's own start-up work (GIL
held for seconds) is not timed as the server's answer. Meanwhile the waiting jobs of
each tenant are counted in the store every half second: none may ever exceed the limit.

Every job is the cheapest search the settings allow (:data:`JOB`: 2 channels, one family
evaluation, no refinement, no chirp, no bootstrap) on one 12 s trace; what remains of its cost is
mostly the worker's report (five figures), which no setting skips.

Goals: every job ``done``; no error (an answer other than 200/201/429, or a failed connection);
``GET /v1/jobs/{id}`` p99 within ``p99_goal_ms``; 429s exactly at the limit; no lock timeout
in the server's and workers' log (:func:`lock_timeouts`: SQLite's "database is locked" or the
API's busy 503), nor a 503 answer.
"""
from __future__ import annotations

import os
import random
import re
import ssl
import sys
import tempfile
import threading
import time
from collections import Counter
from contextlib import contextmanager
from pathlib import Path

import httpx

from reliability.harness import (cli_token, corpus_files, db_rows, FINAL, LiveServer, percentile,
                                 remove_tree, Row)

# The cheapest search the settings allow (search.settings: channels ≥ 2, evaluations ≥ 1).
JOB = {"channels": 2, "evaluations": 1, "bootstrap": 0, "refine": False, "chirp": False,
       "seed": 3, "window_s": 0.128}
LEASE_S = 30.0  # the deployment's default lease (ServiceSettings.lease_s), not the tests' 3 s

# SQLite's busy errors ("database is locked", "database table is locked", SQLITE_BUSY) and the
# API's answer to them (service/app.py: "the job store is busy")
LOCK_TIMEOUT = re.compile(r"database (table )?is locked|SQLITE_BUSY|job store is busy",
                          re.IGNORECASE)


def lock_timeouts(lines) -> list[str]:
    """The log lines that report a lock timeout: SQLite's busy errors or the API's busy 503."""
    return [line.rstrip("\n") for line in lines if LOCK_TIMEOUT.search(line)]


@contextmanager
def output_to(path: Path):
    """Point this process's stdout and stderr (descriptors 1 and 2) at ``path`` for the block, so
    a process started inside it, and the processes it starts (the server's workers), log there."""
    sys.stdout.flush()
    sys.stderr.flush()
    saved = os.dup(1), os.dup(2)
    with open(path, "ab") as log:
        os.dup2(log.fileno(), 1)
        os.dup2(log.fileno(), 2)
    try:
        yield
    finally:
        sys.stdout.flush()
        sys.stderr.flush()
        for fd, copy in zip((1, 2), saved, strict=True):
            os.dup2(copy, fd)
            os.close(copy)


def _message(response: httpx.Response) -> str:
    try:
        return str(response.json()["detail"])
    except (ValueError, KeyError, TypeError):
        return ""


def quota_probe(tmp: Path, limit: int) -> tuple[bool, list[str]]:
    """Exact check of the per-tenant queue limit on a server whose jobs are never claimed."""
    data = tmp / "quota"
    tokens = [cli_token(data, "add", f"q{i}") for i in range(2)]
    server = LiveServer(data, workers=0, BURSTLENS_MAX_QUEUED_JOBS=str(limit)).start()
    notes: list[str] = []
    try:
        with httpx.Client(base_url=server.url, timeout=60.0) as client:
            heads = [{"Authorization": f"Bearer {t}"} for t in tokens]
            corpora = [client.post("/v1/corpora", headers=h, files=corpus_files(1)).json()["id"]
                       for h in heads]

            def submit(i):
                return client.post("/v1/jobs", headers=heads[i],
                                   json={"corpus_id": corpora[i], "settings": JOB})

            codes = [submit(0).status_code for _ in range(limit)]
            over = submit(0)
            other = submit(1).status_code
            queued = client.get("/v1/jobs", headers=heads[0], params={"state": "waiting"})
            first = queued.json()["jobs"][0]
            client.post(f"/v1/jobs/{first['id']}/withdraw", headers=heads[0])
            freed = submit(0).status_code
            again = submit(0).status_code
            ok = (codes == [201] * limit and over.status_code == 429 and str(limit) in _message(over)
                  and other == 201 and freed == 201 and again == 429)
            if not ok:
                notes.append(f"quota probe (limit {limit}): first {limit} → {codes}, next → "
                             f"{over.status_code} {_message(over)!r}, other tenant → {other}, "
                             f"after a withdrawal → {freed}, then → {again}")
            return ok, notes
    finally:
        server.stop()


def run(tenants: int = 10, jobs_per_tenant: int = 50, pollers: int = 200, workers: int = 2,
        max_queued: int = 4, poll_s: float = 1.0, p99_goal_ms: float = 100.0,
        seed: int = 20261202, time_budget_s: float = 1800.0) -> list[Row]:
    """The experiment's one row (module docstring has the method and the goals).

    ``tenants`` × ``jobs_per_tenant`` jobs of :data:`JOB`; ``pollers`` threads each polling every
    ``poll_s`` seconds; ``workers`` worker processes; ``max_queued`` waiting jobs per tenant;
    ``p99_goal_ms`` the latency goal in milliseconds; ``seed`` picks the polled jobs; the load
    stops after ``time_budget_s`` seconds whether or not every job is final.
    """
    tmp = Path(tempfile.mkdtemp(prefix="bl-load-"))
    data = tmp / "data"
    log_path = tmp / "server.log"
    started = time.monotonic()
    details: list[str] = []
    server = None
    lock = threading.Lock()
    known: list[tuple[str, dict]] = []   # (job id, headers of its tenant)
    errors: Counter = Counter()
    rejected_429 = 0
    wrong_429 = 0
    latencies: list[float] = []
    most_waiting = 0                     # most waiting jobs of one tenant seen in the store
    goal = (f"all jobs done, 0 errors, GET p99 ≤ {p99_goal_ms:g} ms, 429 at the limit, "
            f"no lock timeouts")
    load_before = os.getloadavg()[0]
    try:
        quota_ok, notes = quota_probe(tmp, max_queued)
        details += notes
        tokens = [cli_token(data, "add", f"tenant{i}") for i in range(tenants)]
        with output_to(log_path):
            server = LiveServer(data, workers=workers, BURSTLENS_MAX_QUEUED_JOBS=str(max_queued),
                                BURSTLENS_LEASE_S=str(LEASE_S)).start()
        deadline = time.monotonic() + time_budget_s
        stop = threading.Event()
        # what the clients need is made before they start, not by each thread as it starts:
        # there, each tenant's corpus (NumPy) and each client's own TLS context (the CA
        # bundle parsed: tens of ms) would hold this process's GIL while the first polls are
        # timed, and the load generator's own start would read as the server's latency
        uploads = [corpus_files(1, seed=i) for i in range(tenants)]
        tls = ssl.create_default_context()  # never used over plain HTTP, but httpx makes one

        def submitter(i: int) -> None:
            nonlocal rejected_429, wrong_429
            head = {"Authorization": f"Bearer {tokens[i]}"}
            with httpx.Client(base_url=server.url, timeout=60.0, verify=tls) as client:
                try:
                    response = client.post("/v1/corpora", headers=head, files=uploads[i])
                except httpx.HTTPError as exc:
                    with lock:
                        errors[f"upload: {type(exc).__name__}"] += 1
                    return
                if response.status_code != 201:
                    with lock:
                        errors[f"upload: {response.status_code}"] += 1
                    return
                body = {"corpus_id": response.json()["id"], "settings": JOB}
                for k in range(jobs_per_tenant):
                    key = f"tenant{i}-job{k}"
                    while time.monotonic() < deadline:
                        try:
                            response = client.post("/v1/jobs", headers=dict(head, **{
                                "Idempotency-Key": key}), json=body)
                        except httpx.HTTPError as exc:
                            with lock:
                                errors[f"submit: {type(exc).__name__}"] += 1
                            time.sleep(0.5)
                            continue
                        if response.status_code in (200, 201):
                            with lock:
                                known.append((response.json()["id"], head))
                            break
                        if response.status_code == 429:
                            with lock:
                                rejected_429 += 1
                                wrong_429 += f"limit {max_queued}" not in _message(response)
                            time.sleep(0.5)
                            continue
                        with lock:
                            errors[f"submit: {response.status_code}"] += 1
                        break

        def poller(n: int) -> None:
            rng = random.Random(seed + n)
            # clients do not start in step: each begins at its own phase of the interval
            if stop.wait(rng.uniform(0.0, poll_s)):
                return
            with httpx.Client(base_url=server.url, timeout=60.0, verify=tls) as client:
                while not stop.is_set() and time.monotonic() < deadline:
                    with lock:
                        pick = rng.choice(known) if known else None
                    if pick is None:
                        stop.wait(poll_s)
                        continue
                    t0 = time.perf_counter()
                    try:
                        response = client.get(f"/v1/jobs/{pick[0]}", headers=pick[1])
                    except httpx.HTTPError as exc:
                        with lock:
                            errors[f"poll: {type(exc).__name__}"] += 1
                        continue
                    elapsed = time.perf_counter() - t0
                    with lock:
                        latencies.append(elapsed)
                        if response.status_code != 200:
                            errors[f"poll: {response.status_code}"] += 1
                    stop.wait(poll_s)

        threads = [threading.Thread(target=submitter, args=(i,)) for i in range(tenants)]
        threads += [threading.Thread(target=poller, args=(n,)) for n in range(pollers)]
        for thread in threads:
            thread.start()
        total = tenants * jobs_per_tenant
        while time.monotonic() < deadline:
            waiting = db_rows(data, "SELECT COUNT(*) AS n FROM jobs WHERE state = 'waiting' "
                                    "GROUP BY tenant")
            most_waiting = max([most_waiting] + [r["n"] for r in waiting])
            rows = db_rows(data, f"SELECT COUNT(*) AS n FROM jobs WHERE state IN {FINAL}")
            if len(known) == total and rows[0]["n"] == total:
                break
            time.sleep(0.5)
        stop.set()
        for thread in threads:
            thread.join(timeout=120)
        jobs_s = time.monotonic() - started
        states = Counter(r["state"] for r in db_rows(data, "SELECT state FROM jobs"))
        for row in db_rows(data, "SELECT id, error FROM jobs WHERE state = 'error' LIMIT 5"):
            details.append(f"job {row['id']} ended in error: {row['error']!r}")
        unfinished = {s: n for s, n in states.items() if s != "done"}
        if unfinished or len(known) < total:
            details.append(f"not done when the load stopped: {unfinished or 'none'} of those "
                           f"submitted; {total - len(known)} never submitted")
        server.stop()
        with open(log_path, errors="replace") as log:
            log_lines = log.readlines()
        os.write(2, "".join(log_lines).encode())  # the campaign's own log keeps the servers' output
        locked = lock_timeouts(log_lines)
        if locked:
            details.append(f"{len(locked)} lock timeouts in the log, first: {locked[0][:300]}")
        if errors:
            details.append(f"errors: {dict(errors)}")
        if wrong_429:
            details.append(f"{wrong_429} answers 429 did not name the limit {max_queued}")
        if most_waiting > max_queued:
            details.append(f"a tenant had {most_waiting} jobs waiting (limit {max_queued})")
        succeeded = states.get("done", 0)
        p50, p99 = percentile(latencies, 50) * 1000, percentile(latencies, 99) * 1000
        slowest = max(latencies, default=float("nan")) * 1000
        if not p99 <= p99_goal_ms:
            details.append(f"GET /v1/jobs/{{id}} p99 {p99:.1f} ms over the goal {p99_goal_ms:g} "
                           f"ms; {sum(t * 1000 > p99_goal_ms for t in latencies)} of "
                           f"{len(latencies)} polls over it, slowest {slowest:.0f} ms")
        n_errors = sum(errors.values())
        limit_held = quota_ok and wrong_429 == 0 and most_waiting <= max_queued
        # the latency goal is for this host alone: the load other processes put on it is part
        # of what was measured
        counts = (f"{tenants} tenants × {jobs_per_tenant} jobs, {pollers} pollers each every "
                  f"{poll_s:g} s, {workers} workers, queue limit {max_queued}: {len(latencies)} "
                  f"polls, {rejected_429} answers 429; host load average {load_before:.1f} "
                  f"before, {os.getloadavg()[0]:.1f} after")
        result = (f"{succeeded}/{total} done, {n_errors} errors; GET /v1/jobs/{{id}} p50 "
                  f"{p50:.1f} ms, p99 {p99:.1f} ms, max {slowest:.0f} ms; 429 at the limit "
                  f"{'yes' if limit_held else 'NO'} (most waiting per tenant {most_waiting}); "
                  f"{len(locked)} lock timeouts ({jobs_s:.0f} s)")
        met = (succeeded == total and n_errors == 0 and p99 <= p99_goal_ms and limit_held
               and not locked)
        return [Row("6 load", counts, result, goal, met, details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row("6 load", f"{len(known)} jobs submitted", "experiment aborted", goal, False,
                    details)]
    finally:
        if server is not None:
            server.stop()
        remove_tree(tmp)
