"""Real processes on loopback: `burstlens serve`, `burstlens worker`, kill -9, SIGTERM, restarts.

Each fault test compares the interrupted job's filterbank with an uninterrupted run of the same
corpus and settings (computed in process), channel by channel and exactly (docs/design.md §5: a resumed
job ends with the same filterbank as an uninterrupted one).
"""
from __future__ import annotations

import io
import json
import os
import signal
import sqlite3
import subprocess
import sys
from pathlib import Path

import httpx
import numpy as np
import pytest

from burstlens.service.testing import TINY, burst_npz, service_env, settings_for, wait_for

from burstlens.service.cli import main as cli
from burstlens.service.client import Client

ROOT = Path(__file__).resolve().parents[2]  # the checkout: the working folder of the commands

pytestmark = pytest.mark.slow

# About 13 rounds, each checkpointed, so a fault at round 4 lands mid-job.
FAULT = TINY
# Queued jobs that only have to get done.
LIGHT = {"channels": 4, "evaluations": 4, "bootstrap": 0, "refine": False, "window_s": 0.256}


@pytest.fixture(scope="module")
def corpus_paths(tmp_path_factory):
    folder = tmp_path_factory.mktemp("corpus")
    paths = []
    for i in range(2):
        path = folder / f"trace{i}.npz"
        path.write_bytes(burst_npz(i))
        paths.append(path)
    return paths


@pytest.fixture(scope="module")
def reference(corpus_paths, tmp_path_factory):
    """The uninterrupted result of FAULT on the corpus, from an in-process worker."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app
    from burstlens.service.worker import Worker

    settings = settings_for(tmp_path_factory.mktemp("reference"))
    with TestClient(create_app(settings)) as client:
        files = [("files", (p.name, p.read_bytes())) for p in corpus_paths]
        corpus = client.post("/v1/corpora", files=files).json()
        job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": FAULT}).json()
        Worker(settings).run(exit_when_idle=True)
        assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "done"
        return client.get(f"/v1/jobs/{job['id']}/filterbank").json()["channels"]


def _round(client: Client, job_id: str) -> int:
    job = client.job(job_id)
    return (job["progress"].get("round") or 0) if job["state"] == "working" else 0


def _start_worker(data_dir) -> subprocess.Popen:
    return subprocess.Popen([sys.executable, "-m", "burstlens.service.cli", "worker", "--data-dir",
                             str(data_dir), "--log-level", "warning"], cwd=ROOT, env=service_env())


def test_full_life_over_http_with_submit(live_server, corpus_paths, tmp_path, capsys):
    """`burstlens submit --out` against a live server uploads, queues, follows the progress and
    downloads filterbank.json, diagnostics.json and report.html (docs/design.md §9); the client's
    transform returns the NPZ; SIGTERM then stops `serve` and its workers with exit code 0."""
    server = live_server(workers=1)
    out = tmp_path / "out"
    flags = ["--channels", "6", "--evaluations", "8", "--bootstrap", "2", "--seed", "3",
             "--window-s", "0.256"]
    assert cli(["submit", *map(str, corpus_paths), "--server", server.url, "--out", str(out),
                *flags]) == 0
    filterbank = json.loads((out / "filterbank.json").read_text())
    assert filterbank["format"] == "burstlens-filterbank" and len(filterbank["channels"]) == 6
    assert "stop_reason" in json.loads((out / "diagnostics.json").read_text())
    assert "<html" in (out / "report.html").read_text().lower()
    with Client(server.url) as client:
        (job,) = client.jobs()
        assert (job["state"], job["attempts"]) == ("done", 1)
        arrays = np.load(io.BytesIO(client.transform(corpus_paths[:1], job_id=job["id"])),
                         allow_pickle=False)
        assert arrays["representation"].shape[1:] == (6, 256)
    workers = server.worker_pids()
    assert server.stop(signal.SIGTERM) == 0
    assert not any(os.path.exists(f"/proc/{pid}") for pid in workers)


def test_kill_9_worker_is_reclaimed_and_resumes(live_server, corpus_paths, reference):
    """kill -9 of the worker mid-job: `serve` starts another worker, which reclaims the job once
    the lease has expired, resumes from the checkpoint and ends with exactly the uninterrupted
    filterbank (docs/design.md §7)."""
    server = live_server(workers=1)
    with Client(server.url) as client:
        corpus = client.upload_corpus(corpus_paths)
        job = client.submit_job(corpus["id"], FAULT)
        wait_for(lambda: _round(client, job["id"]) >= 2, interval=0.05)
        (pid,) = server.worker_pids()
        os.kill(pid, signal.SIGKILL)
        done = client.wait(job["id"], poll_s=0.2, timeout_s=120)
        assert (done["state"], done["attempts"]) == ("done", 2)
        assert done["progress"]["resumed"] is True
        assert client.filterbank(job["id"])["channels"] == reference


def test_sigterm_worker_exits_0_and_resume_is_identical(live_server, corpus_paths, reference):
    """SIGTERM to `burstlens worker` mid-job: it checkpoints, releases the job (no attempt used)
    and exits 0; the next worker resumes to exactly the uninterrupted filterbank (docs/design.md §7)."""
    server = live_server(workers=0)
    with Client(server.url) as client:
        corpus = client.upload_corpus(corpus_paths)
        job = client.submit_job(corpus["id"], FAULT)
        first = _start_worker(server.data_dir)
        try:
            wait_for(lambda: _round(client, job["id"]) >= 2, interval=0.05)
            first.send_signal(signal.SIGTERM)
            assert first.wait(timeout=60) == 0
        finally:
            first.kill() if first.poll() is None else None
        paused = client.job(job["id"])
        assert (paused["state"], paused["attempts"]) == ("waiting", 0)
        second = _start_worker(server.data_dir)
        try:
            done = client.wait(job["id"], poll_s=0.2, timeout_s=120)
        finally:
            second.send_signal(signal.SIGTERM)
            assert second.wait(timeout=60) == 0
        assert (done["state"], done["attempts"]) == ("done", 1)
        assert done["progress"]["resumed"] is True
        assert client.filterbank(job["id"])["channels"] == reference


def test_server_restart_loses_nothing(live_server, corpus_paths, tmp_path):
    """kill -9 of `serve` with one job running and two queued, then a new `serve` on the same
    data dir: the orphaned worker releases its job, and every job still ends succeeded."""
    server = live_server(workers=1)
    with Client(server.url) as client:
        corpus = client.upload_corpus(corpus_paths)
        ids = [client.submit_job(corpus["id"], FAULT)["id"]]
        ids += [client.submit_job(corpus["id"], {**LIGHT, "seed": seed})["id"] for seed in (1, 2)]
        wait_for(lambda: _round(client, ids[0]) >= 3, interval=0.05)
    server.stop(signal.SIGKILL)
    restarted = live_server(workers=1, data_dir=server.data_dir)
    with Client(restarted.url) as client:
        states = [client.wait(i, poll_s=0.3, timeout_s=180)["state"] for i in ids]
    assert states == ["done"] * 3


def test_enqueue_is_durable_and_streamed_limit_holds(live_server, corpus_paths):
    """The job is in the database once POST /v1/jobs has answered, even if the server is killed
    right after (a job is acknowledged only after COMMIT, docs/design.md §7). On the same real server a
    chunked upload over max_body_bytes is cut off with a 413."""
    server = live_server(workers=0, BURSTLENS_MAX_BODY_BYTES=1_000_000)
    with Client(server.url) as client:
        def chunks():
            yield (b"--b\r\nContent-Disposition: form-data; name=\"files\"; filename=\"x.npz\"\r\n"
                   b"\r\n")
            for _ in range(400):
                yield b"\0" * 8192

        big = httpx.post(server.url + "/v1/corpora", content=chunks(),
                         headers={"content-type": "multipart/form-data; boundary=b"}, timeout=30)
        assert big.status_code == 413
        corpus = client.upload_corpus(corpus_paths)
        job = client.submit_job(corpus["id"], FAULT)
    server.stop(signal.SIGKILL)
    db = sqlite3.connect(server.data_dir / "burstlens.sqlite3")
    row = db.execute("SELECT state, settings FROM jobs WHERE id = ?", (job["id"],)).fetchone()
    db.close()
    assert row[0] == "waiting" and json.loads(row[1]) == FAULT
    restarted = live_server(workers=0, data_dir=server.data_dir)
    with Client(restarted.url) as client:
        assert client.job(job["id"])["state"] == "waiting"
        assert client.withdraw(job["id"])["state"] == "withdrawn"
