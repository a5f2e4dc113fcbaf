"""Experiment 3 — disk trouble: the data dir on a small filesystem that fills up.

Promise (docs/design.md §7): blobs are written to a temp file, fsynced and renamed, and a job is
acknowledged only after COMMIT; so when the disk fills, new uploads are refused with a clear
507 (or 413 past the body limit), a running job fails with a reason instead of hanging or
half-writing, and nothing acknowledged before is lost or damaged.

Method (needs root): a tmpfs of a few MB (``mount -t tmpfs -o size=4m``) holds the data dir of a
``serve --workers 1``. Before the disk fills: one corpus and one done job are acknowledged
(their file digests and filterbank kept), and a long job is running. Then a filler file takes
every free byte. While full: uploads, an upload over the body limit, a job submission and reads of
the acknowledged resources; the running job must end ``failed`` with a reason. After the filler is
removed: the acknowledged corpus files are byte-identical, the done job's filterbank is
identical, ``PRAGMA integrity_check`` is ok and a new upload succeeds. The tmpfs is unmounted at
the end. If ``mount`` is refused the experiment is skipped with the reason.
"""
from __future__ import annotations

import errno
import hashlib
import subprocess
import tempfile
import time
from collections import Counter
from pathlib import Path

import httpx

from reliability.harness import (FINAL, SMALL, burst_npz, comparable, corpus_files, db_rows,
                                 integrity_check, LiveServer, remove_tree, Row, wait_until)

GOAL = "uploads 507/413 with message, running job failed with reason, 0 acknowledged lost, 0 5xx"
NAME = "3 disk full (tmpfs)"
LONG_JOB = {"channels": 4, "evaluations": 5000, "time_limit_s": 600, "refine": False,
            "bootstrap": 0, "seed": 5, "window_s": 0.128}
SPACE_WORDS = ("no space", "disk is full", "errno 28", "enospc", "disk full", "database or disk")


def _mount(point: Path, size_mb: int) -> str | None:
    """Mount a tmpfs of ``size_mb`` MiB at ``point``; None on success, else why it failed."""
    try:
        out = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={size_mb}m", "tmpfs", str(point)],
                             capture_output=True, text=True, timeout=30)
    except (OSError, subprocess.TimeoutExpired) as exc:
        return f"{type(exc).__name__}: {exc}"
    return None if out.returncode == 0 else (out.stderr.strip() or f"mount exit {out.returncode}")


def _umount(point: Path) -> bool:
    for _ in range(10):
        if subprocess.run(["umount", str(point)], capture_output=True).returncode == 0:
            return True
        time.sleep(0.5)
    return subprocess.run(["umount", "-l", str(point)], capture_output=True).returncode == 0


def _fill(path: Path) -> int:
    """Write zeros to ``path`` until the filesystem refuses; returns the bytes written."""
    chunk = b"\0" * 65536
    written = 0
    with open(path, "wb", buffering=0) as fh:
        for size in (65536, 4096, 512, 1):
            while True:
                try:
                    fh.write(chunk[:size])
                except OSError as exc:
                    if exc.errno != errno.ENOSPC:
                        raise
                    break
                written += size
    return written


def _message(response: httpx.Response) -> str:
    try:
        return str(response.json()["detail"])
    except (ValueError, KeyError, TypeError):
        return ""


def run(size_mb: int = 4, uploads: int = 5, job_wait_s: float = 90.0,
        time_budget_s: float = 240.0) -> list[Row]:
    """Run the experiment; ``job_wait_s`` bounds the wait for the running job to fail."""
    tmp = Path(tempfile.mkdtemp(prefix="bl-disk-"))
    point = tmp / "mnt"
    point.mkdir()
    why = _mount(point, size_mb)
    if why is not None:
        remove_tree(tmp)
        return [Row(NAME, "-", f"skipped: mount -t tmpfs refused ({why})", GOAL, None)]
    started = time.monotonic()
    details: list[str] = []
    statuses: Counter = Counter()
    server = None
    try:
        data = point / "data"
        server = LiveServer(data, workers=1, BURSTLENS_MAX_BODY_BYTES=str(1_500_000),
                            BURSTLENS_LEASE_S="2").start()
        client = httpx.Client(base_url=server.url, timeout=60.0)

        def call(method: str, url: str, **kw) -> httpx.Response | None:
            try:
                try:
                    response = client.request(method, url, **kw)
                except httpx.TransportError:
                    if method != "GET":
                        raise
                    # the server closes a connection after a 500; a client retries a GET once
                    response = client.request(method, url, **kw)
            except httpx.HTTPError as exc:
                statuses["no answer"] += 1
                details.append(f"{method} {url} while full: no answer ({type(exc).__name__})")
                return None
            statuses[response.status_code] += 1
            if response.status_code >= 500 and response.status_code != 507:
                details.append(f"{method} {url} while full: {response.status_code} "
                               f"{response.text[:200]!r}")
            return response

        def state_of(job_id: str) -> dict:
            try:
                return client.get(f"/v1/jobs/{job_id}").json()
            except httpx.TransportError:  # see call(): one retry on a fresh connection
                return client.get(f"/v1/jobs/{job_id}").json()

        # acknowledged before the disk fills
        response = client.post("/v1/corpora", files=corpus_files(1))
        response.raise_for_status()
        corpus = response.json()
        corpus_files_sha = {f["sha256"] for f in corpus["files"]}
        job1 = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": SMALL}).json()
        if not wait_until(lambda: client.get(f"/v1/jobs/{job1['id']}").json()["state"] in FINAL, 180):
            raise RuntimeError("the job before the fill did not finish in 180 s")
        filterbank1 = client.get(f"/v1/jobs/{job1['id']}/filterbank")
        if filterbank1.status_code != 200:
            raise RuntimeError(f"the job before the fill did not succeed: "
                               f"{client.get('/v1/jobs/' + job1['id']).json()}")
        filterbank1 = comparable(filterbank1.json(), job1["id"])
        long_job = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                                 "settings": LONG_JOB}).json()
        wait_until(lambda: (client.get(f"/v1/jobs/{long_job['id']}").json()["progress"]
                            .get("round") or 0) >= 2, 120)
        if client.get(f"/v1/jobs/{long_job['id']}").json()["state"] != "working":
            details.append("the long job was not running when the disk filled")

        # fill the disk
        filler = point / "filler"
        filled = _fill(filler)
        upload_ok = 0
        for k in range(uploads):
            response = call("POST", "/v1/corpora", files=corpus_files(1, seed=10 + k))
            if response is not None and response.status_code in (507, 413) and _message(response):
                upload_ok += 1
            elif response is not None:
                details.append(f"upload {k} while full: {response.status_code} {_message(response)!r}")
        big = [("files", ("big.npz", burst_npz(7, seconds=240.0), "application/octet-stream"))]
        response = call("POST", "/v1/corpora", files=big)
        over_limit_ok = response is not None and response.status_code == 413 and bool(_message(response))
        if not over_limit_ok:
            details.append(f"upload over the body limit while full: "
                           f"{None if response is None else response.status_code}")
        response = call("POST", "/v1/jobs", json={"corpus_id": corpus["id"], "settings": SMALL})
        submitted_full = None
        if response is not None and response.status_code == 201:
            submitted_full = response.json()["id"]
        for url in (f"/v1/corpora/{corpus['id']}", f"/v1/jobs/{job1['id']}",
                    f"/v1/jobs/{job1['id']}/filterbank", "/v1/health"):
            response = call("GET", url)
            if response is not None and response.status_code != 200:
                details.append(f"GET {url} while full: {response.status_code}")
        left_s = time_budget_s - (time.monotonic() - started)
        wait_until(lambda: state_of(long_job["id"])["state"] in FINAL,
                   min(job_wait_s, max(10.0, left_s)), interval=0.5)
        long_done = state_of(long_job["id"])
        reason = long_done.get("error") or ""
        job_failed_ok = long_done["state"] == "error" and any(w in reason.lower() for w in SPACE_WORDS)
        if not job_failed_ok:
            details.append(f"running job while full: state {long_done['state']}, error {reason!r}")
        server_alive = server.proc.poll() is None

        # free the space: nothing acknowledged may be lost
        filler.unlink()
        client.close()  # a fresh connection: the server may have closed ours after a 500
        client = httpx.Client(base_url=server.url, timeout=60.0)
        lost = []
        response = client.get(f"/v1/corpora/{corpus['id']}")
        if response.status_code != 200:
            lost.append(f"corpus {corpus['id']}: GET {response.status_code}")
        stored = data / "blobs" / "corpora" / corpus["id"]
        on_disk = {hashlib.sha256(p.read_bytes()).hexdigest() for p in stored.glob("*")} \
            if stored.is_dir() else set()
        if on_disk != corpus_files_sha:
            lost.append(f"corpus {corpus['id']}: stored files differ from the acknowledged ones")
        response = client.get(f"/v1/jobs/{job1['id']}/filterbank")
        if response.status_code != 200 or comparable(response.json(), job1["id"]) != filterbank1:
            lost.append(f"job {job1['id']}: filterbank {response.status_code}, changed or gone")
        for job_id in filter(None, (long_job["id"], submitted_full)):
            if not db_rows(data, "SELECT 1 FROM jobs WHERE id = ?", (job_id,)):
                lost.append(f"job {job_id}: acknowledged but gone")
        details += lost
        integrity = integrity_check(data)
        if integrity != "ok":
            details.append(f"integrity_check: {integrity}")
        recovered = client.post("/v1/corpora", files=corpus_files(1, seed=42)).status_code == 201
        if not recovered:
            details.append("an upload after the space was freed did not succeed")
        client.close()
        fivexx = sum(n for s, n in statuses.items() if isinstance(s, int) and s >= 500 and s != 507)
        counts = (f"{size_mb} MiB tmpfs, filler {filled // 1024} KiB; {uploads} uploads + 1 over the "
                  f"limit + 1 submit + 4 reads while full: {dict(sorted(statuses.items(), key=str))}")
        result = (f"uploads refused with message {upload_ok}/{uploads}, over limit 413 "
                  f"{'yes' if over_limit_ok else 'NO'}; running job {long_done['state']}"
                  f"{' with reason' if job_failed_ok else ''}; acknowledged lost {len(lost)}; "
                  f"5xx {fivexx}; integrity {integrity}; upload after freeing "
                  f"{'ok' if recovered else 'FAILED'} ({time.monotonic() - started:.0f} s)")
        met = (upload_ok == uploads and over_limit_ok and job_failed_ok and not lost and fivexx == 0
               and integrity == "ok" and recovered and server_alive)
        if not server_alive:
            details.append("the server process died while the disk was full")
        return [Row(NAME, counts, result, GOAL, met, details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row(NAME, dict(statuses).__repr__(), "experiment aborted", GOAL, False, details)]
    finally:
        if server is not None:
            server.stop()
        if not _umount(point):
            details.append(f"could not unmount {point}")
        remove_tree(tmp)
