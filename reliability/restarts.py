"""Experiment 2 — restarts: kill -9 the whole server with queued, running and in-flight jobs.

Promise (docs/design.md §7): a job is acknowledged only after COMMIT (WAL, ``synchronous=FULL``); an
expired lease is reclaimed and the job resumes; the same Idempotency-Key and body give the same
job (IETF draft "The Idempotency-Key HTTP Header Field"), so a client that lost its answer can
retry without creating a second job.

Method: ``serve --workers 2``; each cycle queues a batch of jobs (each with its own
Idempotency-Key), waits until one runs, then starts a burst of submissions and one corpus upload
in threads and, at a seeded moment, SIGKILLs the server — in even cycles together with its worker
processes, in odd cycles alone (its workers are orphaned and must stop by themselves). The store
gets ``PRAGMA integrity_check`` while nothing runs, the server is started again on the same data
dir, and every submission whose answer was lost is retried with its key, as a client would. At the
end every job must be done exactly once: lost = an acknowledged key with no job or a job
that did not succeed; duplicated = a key with more than one job, or an acknowledged id that is not
the key's job. All results must be identical (same corpus and settings), and nothing may be left
orphaned in the data dir.
"""
from __future__ import annotations

import os
import random
import signal
import tempfile
import threading
import time
from collections import Counter
from pathlib import Path

import httpx

from reliability.harness import (SMALL, comparable, corpus_files, DataDirAudit, db_rows,
                                 integrity_check, LiveServer, remove_tree, Row, wait_until)

ENV = {"BURSTLENS_MAX_QUEUED_JOBS": "1000", "BURSTLENS_LEASE_S": "2"}


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:  # a zombie is gone for our purpose
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().split(")")[-1].split()[0] != "Z"
    except OSError:
        return False


def run(cycles: int = 2, batch: int = 3, burst: int = 3, seed: int = 20261202,
        time_budget_s: float = 420.0) -> list[Row]:
    rng = random.Random(seed)
    tmp = Path(tempfile.mkdtemp(prefix="bl-restart-"))
    data = tmp / "data"
    started = time.monotonic()
    details: list[str] = []
    acked: dict[str, str] = {}        # key -> job id from the first answer that carried one
    answers: dict[str, list] = {}     # key -> every answer (status or exception name)
    integrity: list[str] = []
    uploads = Counter()
    server = None
    body: dict = {}

    def submit(client: httpx.Client, key: str) -> None:
        try:
            response = client.post("/v1/jobs", json=body, headers={"Idempotency-Key": key})
            answers.setdefault(key, []).append(response.status_code)
            if response.status_code in (200, 201):
                job_id = response.json()["id"]
                if key in acked and acked[key] != job_id:
                    details.append(f"key {key}: first acknowledged as {acked[key]}, then as {job_id}")
                acked.setdefault(key, job_id)
        except httpx.HTTPError as exc:
            answers.setdefault(key, []).append(type(exc).__name__)

    def upload(client: httpx.Client, seed_: int) -> None:
        try:
            response = client.post("/v1/corpora", files=corpus_files(1, seed=seed_))
            uploads[f"upload {response.status_code}"] += 1
        except httpx.HTTPError:
            uploads["upload lost"] += 1

    try:
        server = LiveServer(data, workers=2, **ENV).start()
        client = httpx.Client(base_url=server.url, timeout=60.0)
        response = client.post("/v1/corpora", files=corpus_files(1))
        response.raise_for_status()
        body = {"corpus_id": response.json()["id"], "settings": SMALL}
        for cycle in range(cycles):
            if time.monotonic() - started > time_budget_s:
                details.append(f"time budget reached before cycle {cycle}")
                break
            for i in range(batch):
                submit(client, f"c{cycle}-queued-{i}")
            wait_until(lambda: db_rows(data, "SELECT 1 FROM jobs WHERE state = 'working'"), 60)
            flight = [threading.Thread(target=submit, args=(client, f"c{cycle}-inflight-{i}"))
                      for i in range(burst)]
            flight.append(threading.Thread(target=upload, args=(client, 100 + cycle)))
            for thread in flight:
                thread.start()
            time.sleep(rng.uniform(0.0, 0.25))
            with_workers = cycle % 2 == 0
            children = server.worker_pids()
            os.kill(server.proc.pid, signal.SIGKILL)
            if with_workers:
                for pid in children:
                    os.kill(pid, signal.SIGKILL)
            server.proc.wait()
            for thread in flight:
                thread.join(timeout=60)
            client.close()
            # orphans stop at their next heartbeat; give them a bounded time, then kill them
            if not wait_until(lambda children=children: not any(_alive(p) for p in children), 60):
                details.append(f"cycle {cycle}: orphaned workers still alive after 60 s; killed")
                for pid in children:
                    if _alive(pid):
                        os.kill(pid, signal.SIGKILL)
            integrity.append(integrity_check(data))
            server = LiveServer(data, workers=2, **ENV).start()
            client = httpx.Client(base_url=server.url, timeout=60.0)
            for key in list(answers):
                if key not in acked:  # the answer was lost: retry with the same key, as a client would
                    submit(client, key)
        keys = set(answers)
        wait_until(lambda: not db_rows(data, "SELECT 1 FROM jobs WHERE state NOT IN "
                                             "('done', 'error', 'withdrawn')"),
                   max(60.0, time_budget_s - (time.monotonic() - started)), interval=0.5)
        jobs = db_rows(data, "SELECT id, idempotency_key, state, attempts, error FROM jobs")
        by_key: dict[str, list[dict]] = {}
        for job in jobs:
            by_key.setdefault(job["idempotency_key"], []).append(job)
        lost = duplicated = 0
        for key in sorted(keys):
            rows = by_key.get(key, [])
            if key in acked and not rows:
                lost += 1
                details.append(f"key {key}: acknowledged as {acked[key]} but no job in the store")
            elif rows and rows[0]["state"] != "done":
                lost += 1
                details.append(f"key {key}: job {rows[0]['id']} ended {rows[0]['state']} "
                               f"(attempts {rows[0]['attempts']}, error {rows[0]['error']!r})")
            if len(rows) > 1:
                duplicated += len(rows) - 1
                details.append(f"key {key}: {len(rows)} jobs")
            if key in acked and rows and acked[key] not in {r["id"] for r in rows}:
                duplicated += 1
                details.append(f"key {key}: acknowledged id {acked[key]} is not the stored job")
            if key not in acked:
                lost += 1
                details.append(f"key {key}: never acknowledged, even on retry ({answers[key]})")
        strangers = [j for j in jobs if j["idempotency_key"] not in keys]
        duplicated += len(strangers)
        reference, different = None, 0
        for job in jobs:
            if job["state"] != "done":
                continue
            response = client.get(f"/v1/jobs/{job['id']}/filterbank")
            text = comparable(response.json() if response.status_code == 200 else None, job["id"])
            reference = reference or text
            different += text != reference
        if different:
            details.append(f"{different} done jobs differ from the first one's filterbank")
        attempts = Counter(j["attempts"] for j in jobs)
        integrity.append(integrity_check(data))
        client.close()
        server.stop()
        server = None
        orphans = DataDirAudit(data).orphans()
        details += [f"left behind: {o}" for o in orphans]
        retried = sum(1 for k in keys if len(answers[k]) > 1)
        bad_integrity = [r for r in integrity if r != "ok"]
        details += [f"integrity_check: {r}" for r in bad_integrity]
        counts = (f"{cycles} kill -9 ({(cycles + 1) // 2} with workers, {cycles // 2} serve only); "
                  f"{len(keys)} jobs ({len(acked)} acknowledged, {retried} retried by key); "
                  f"{sum(uploads.values())} uploads in flight; attempts "
                  f"{dict(sorted(attempts.items()))}")
        result = (f"lost {lost}, duplicated {duplicated}, differing results {different}, "
                  f"orphans {len(orphans)}; integrity_check "
                  f"{'ok' if not bad_integrity else 'FAILED'} ×{len(integrity)} "
                  f"({time.monotonic() - started:.0f} s)")
        met = lost == 0 and duplicated == 0 and not bad_integrity and different == 0 and not orphans
        return [Row("2 restarts (kill -9 server)", counts, result,
                    "0 lost, 0 duplicated, integrity ok", met, details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row("2 restarts (kill -9 server)", f"{len(answers)} jobs submitted",
                    "experiment aborted", "0 lost, 0 duplicated, integrity ok", False, details)]
    finally:
        if server is not None:
            server.stop()
        remove_tree(tmp)
