"""Experiment 6 — load: several tenants submit jobs while many clients poll, against 2 workers.

Promise (DESIGN §7): the queue is light and the compute is heavy — one host with the API, the
store and two workers finishes every job while clients poll, answers status quickly, and limits
queued jobs per tenant with a 429 that says so (the limit is ``max_queued_jobs``).

Method: first a quota probe on its own ``serve --workers 0`` (nothing is claimed, so the count is
exact): a tenant's ``max_queued_jobs`` submissions are 201, the next is 429 naming the limit,
another tenant is not affected, and a cancel frees a place. Then the load: ``serve --workers 2``
with the same limit; each tenant uploads a small corpus and submits its jobs from its own thread
(a 429 is waited out and retried with the same Idempotency-Key, as a client would), while the
pollers call ``GET /v1/jobs/{id}`` on random known jobs every 0.1 s until every job is final or
the time is up. Errors are answers other than 200/201/429 and failed connections.
"""
from __future__ import annotations

import random
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import httpx

from reliability.harness import (cli_token, corpus_files, db_rows, LiveServer, percentile,
                                 remove_tree, Row)

JOB = {"channels": 4, "evaluations": 6, "bootstrap": 0, "refine": False, "seed": 3,
       "window_s": 0.128}


def _message(response: httpx.Response) -> str:
    try:
        return str(response.json()["error"]["message"])
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
            queued = client.get("/v1/jobs", headers=heads[0], params={"state": "queued"})
            first = queued.json()["jobs"][0]
            client.post(f"/v1/jobs/{first['id']}/cancel", headers=heads[0])
            freed = submit(0).status_code
            again = submit(0).status_code
            ok = (codes == [201] * limit and over.status_code == 429 and str(limit) in _message(over)
                  and other == 201 and freed == 201 and again == 429)
            if not ok:
                notes.append(f"quota probe (limit {limit}): first {limit} → {codes}, next → "
                             f"{over.status_code} {_message(over)!r}, other tenant → {other}, "
                             f"after a cancel → {freed}, then → {again}")
            return ok, notes
    finally:
        server.stop()


def run(tenants: int = 5, jobs_per_tenant: int = 10, pollers: int = 20, workers: int = 2,
        max_queued: int = 4, seed: int = 20261202, time_budget_s: float = 600.0) -> list[Row]:
    tmp = Path(tempfile.mkdtemp(prefix="bl-load-"))
    data = tmp / "data"
    started = time.monotonic()
    details: list[str] = []
    server = None
    lock = threading.Lock()
    known: list[tuple[str, dict]] = []   # (job id, headers of its tenant)
    errors: Counter = Counter()
    rejected_429 = 0
    wrong_429 = 0
    latencies: list[float] = []
    polls = 0
    try:
        quota_ok, notes = quota_probe(tmp, max_queued)
        details += notes
        tokens = [cli_token(data, "add", f"tenant{i}") for i in range(tenants)]
        server = LiveServer(data, workers=workers, BURSTLENS_MAX_QUEUED_JOBS=str(max_queued)).start()
        deadline = time.monotonic() + time_budget_s
        stop = threading.Event()

        def submitter(i: int) -> None:
            nonlocal rejected_429, wrong_429
            head = {"Authorization": f"Bearer {tokens[i]}"}
            with httpx.Client(base_url=server.url, timeout=60.0) as client:
                try:
                    response = client.post("/v1/corpora", headers=head, files=corpus_files(1, seed=i))
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
            nonlocal polls
            rng = random.Random(seed + n)
            with httpx.Client(base_url=server.url, timeout=60.0) as client:
                while not stop.is_set() and time.monotonic() < deadline:
                    with lock:
                        pick = rng.choice(known) if known else None
                    if pick is None:
                        time.sleep(0.1)
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
                        polls += 1
                        latencies.append(elapsed)
                        if response.status_code != 200:
                            errors[f"poll: {response.status_code}"] += 1
                    time.sleep(0.1)

        threads = [threading.Thread(target=submitter, args=(i,)) for i in range(tenants)]
        threads += [threading.Thread(target=poller, args=(n,)) for n in range(pollers)]
        for thread in threads:
            thread.start()
        total = tenants * jobs_per_tenant
        while time.monotonic() < deadline:
            rows = db_rows(data, "SELECT COUNT(*) AS n FROM jobs WHERE state IN "
                                 "('succeeded', 'failed', 'cancelled')")
            if len(known) == total and rows[0]["n"] == total:
                break
            time.sleep(0.5)
        stop.set()
        for thread in threads:
            thread.join(timeout=120)
        states = Counter(r["state"] for r in db_rows(data, "SELECT state FROM jobs"))
        for row in db_rows(data, "SELECT id, state, error FROM jobs WHERE state != 'succeeded'"):
            details.append(f"job {row['id']} ended {row['state']}: {row['error']!r}")
        if errors:
            details.append(f"errors: {dict(errors)}")
        if wrong_429:
            details.append(f"{wrong_429} answers 429 did not name the limit {max_queued}")
        succeeded = states.get("succeeded", 0)
        elapsed = time.monotonic() - started
        p50, p99 = percentile(latencies, 50) * 1000, percentile(latencies, 99) * 1000
        n_errors = sum(errors.values())
        counts = (f"{tenants} tenants × {jobs_per_tenant} jobs, {pollers} pollers, {workers} workers, "
                  f"queue limit {max_queued}: {polls} polls, {rejected_429} answers 429")
        result = (f"{succeeded}/{total} succeeded, {n_errors} errors; GET /v1/jobs/{{id}} p50 "
                  f"{p50:.1f} ms, p99 {p99:.1f} ms; 429 as configured "
                  f"{'yes' if quota_ok and not wrong_429 else 'NO'} ({elapsed:.0f} s)")
        met = succeeded == total and n_errors == 0 and quota_ok and wrong_429 == 0
        return [Row("6 load", counts, result, "all jobs done, 0 errors, 429 at the limit", met,
                    details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row("6 load", f"{len(known)} jobs submitted", "experiment aborted",
                    "all jobs done, 0 errors, 429 at the limit", False, details)]
    finally:
        if server is not None:
            server.stop()
        remove_tree(tmp)
