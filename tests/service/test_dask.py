"""Scale-out through a real Dask cluster: `burstlens serve --dask ADDR` against a LocalCluster.

The cluster is ``distributed.LocalCluster`` with two single-threaded worker processes on
loopback, on ephemeral ports, no dashboard. Tiny corpora and budgets keep each job a few seconds.
"""
from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from pathlib import Path

import httpx
import pytest
from burstlens.service.testing import TINY, corpus_files, free_port, service_env, settings_for, wait_for

from burstlens.service.dask_backend import DaskUnavailable, connect

ROOT = Path(__file__).resolve().parents[2]  # the checkout: the working folder of the commands

pytestmark = pytest.mark.timeout(240)


@pytest.fixture(scope="module")
def cluster():
    """A 2-process LocalCluster on 127.0.0.1 and a client to reach its workers."""
    from distributed import Client, LocalCluster

    with LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", scheduler_port=0) as local, Client(local) as client:
        client.wait_for_workers(2, timeout=60)
        yield local, client


def upload_and_queue(http: httpx.Client, url: str, headers=None) -> str:
    corpus = http.post(f"{url}/v1/corpora", files=corpus_files(2, seed=0))
    assert corpus.status_code == 201, corpus.text
    job = http.post(f"{url}/v1/jobs", json={"corpus_id": corpus.json()["id"], "settings": TINY})
    assert job.status_code == 201, job.text
    return job.json()["id"]


def finished(http: httpx.Client, url: str, job_id: str) -> dict:
    view = http.get(f"{url}/v1/jobs/{job_id}").json()
    return view if view["state"] in ("done", "error", "withdrawn") else None


def comparable(filterbank: dict) -> dict:
    """The filterbank JSON without what records who ran it and how the work was spread (the
    job's id and the parallelism setting, `n_jobs`); channels, objective and the rest must match."""
    out = {k: v for k, v in filterbank.items() if k != "job"}
    out["settings"] = {k: v for k, v in out.get("settings", {}).items() if k not in ("jobs", "n_jobs")}
    assert out["channels"], "a filterbank without channels"
    return out


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The filterbank of the tiny job run by the service's worker with no Dask at all."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app
    from burstlens.service.worker import Worker

    data = tmp_path_factory.mktemp("local") / "data"
    with TestClient(create_app(settings_for(data))) as http:
        job_id = upload_and_queue(http, "")
        Worker(settings_for(data)).run(max_jobs=1, exit_when_idle=True)
        view = http.get(f"/v1/jobs/{job_id}").json()
        assert view["state"] == "done", view
        return comparable(http.get(f"/v1/jobs/{job_id}/filterbank").json())


@pytest.fixture(scope="module")
def dask_server(tmp_path_factory, cluster):
    """`burstlens serve --dask <scheduler>` with one local job worker, stopped at teardown."""
    port = free_port()
    proc = subprocess.Popen(
        [sys.executable, "-m", "burstlens.service.cli", "serve", "--host", "127.0.0.1", "--port", str(port),
         "--data-dir", str(tmp_path_factory.mktemp("dask") / "data"), "--workers", "1", "--dask",
         cluster[0].scheduler_address, "--log-level", "warning"], cwd=ROOT, env=service_env())
    url = f"http://127.0.0.1:{port}"

    def up():
        assert proc.poll() is None, f"serve exited with {proc.returncode}"
        try:
            return httpx.get(url + "/v1/health", timeout=1.0).status_code == 200
        except httpx.TransportError:
            return False

    try:
        wait_for(up, timeout=60)
        yield url
    finally:
        proc.send_signal(signal.SIGTERM)
        try:
            proc.wait(timeout=90)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait()


def test_dask_job_gives_the_same_filterbank(dask_server, reference):
    """A job whose evaluations run on the Dask cluster ends with exactly the filterbank of the
    same job run without Dask (docs/design.md §5: deterministic however the work is spread)."""
    with httpx.Client(timeout=30) as http:
        job_id = upload_and_queue(http, dask_server)
        view = wait_for(lambda: finished(http, dask_server, job_id), timeout=150, interval=0.2)
        assert view["state"] == "done", view
        filterbank = http.get(f"{dask_server}/v1/jobs/{job_id}/filterbank").json()
        assert comparable(filterbank) == reference


def test_losing_a_dask_worker_mid_job_gives_the_same_filterbank(dask_server, cluster, reference):
    """With one of the two Dask worker processes killed (SIGKILL) while the job runs, the job
    still succeeds with exactly the filterbank of the run without Dask: the lost worker's tasks
    are rerun by Dask (distributed docs, "Resilience") or the round is redone from the job's
    checkpoint; the nanny starts a fresh worker process."""
    _, client = cluster
    with httpx.Client(timeout=30) as http:
        job_id = upload_and_queue(http, dask_server)

        def running_with_evaluations():
            view = http.get(f"{dask_server}/v1/jobs/{job_id}").json()
            return view if view["state"] == "working" and view["progress"].get("evaluations") else None

        at_kill = wait_for(running_with_evaluations, timeout=120, interval=0.05)
        victim = sorted(client.run(os.getpid).values())[0]
        os.kill(victim, signal.SIGKILL)
        assert at_kill["progress"].get("fraction", 0.0) < 1.0
        view = wait_for(lambda: finished(http, dask_server, job_id), timeout=180, interval=0.2)
        assert view["state"] == "done", view
        assert victim not in client.run(os.getpid).values()
        filterbank = http.get(f"{dask_server}/v1/jobs/{job_id}/filterbank").json()
        assert comparable(filterbank) == reference


def test_unreachable_scheduler_is_a_clear_error_at_connect():
    """Connecting to an address where no scheduler listens fails within the timeout with a
    message naming the address and what to do, not a hang (common practice)."""
    address = f"tcp://127.0.0.1:{free_port()}"
    started = time.monotonic()
    with pytest.raises(DaskUnavailable) as caught:
        connect(address, timeout_s=2.0)
    assert time.monotonic() - started < 30.0
    message = str(caught.value)
    assert address in message and "dask scheduler" in message
    with pytest.raises(DaskUnavailable, match="not a Dask scheduler address"):
        connect("127.0.0.1 8786")


@pytest.mark.parametrize("command", ["serve", "worker"])
def test_unreachable_scheduler_is_a_startup_error(tmp_path, command):
    """`burstlens serve|worker --dask ADDR` with nothing listening at ADDR exits with status 2
    at startup and says which address it could not reach (common practice: fail fast on bad
    configuration)."""
    address = f"tcp://127.0.0.1:{free_port()}"
    argv = [sys.executable, "-m", "burstlens.service.cli", command, "--data-dir", str(tmp_path / "data"),
            "--dask", address]
    if command == "serve":
        argv += ["--port", str(free_port()), "--workers", "1"]
    done = subprocess.run(argv, cwd=ROOT, env=service_env(), capture_output=True, text=True,
                          timeout=120)
    assert done.returncode == 2, done.stderr[-2000:]
    assert address in done.stderr
    assert "Traceback" not in done.stderr


def _where() -> str:
    from distributed import get_worker

    return get_worker().address


def test_evaluations_on_runs_joblib_on_the_cluster_and_reconnects(cluster):
    """Inside evaluations_on(client), joblib's calls run on the cluster's workers (joblib's Dask
    backend, joblib docs "Using Dask for single-machine parallel computing"); ensure_client
    keeps a live client and replaces a closed one."""
    import joblib

    from burstlens.service.dask_backend import ensure_client, evaluations_on

    local, _ = cluster
    client = connect(local.scheduler_address)
    try:
        with evaluations_on(client):
            places = joblib.Parallel(n_jobs=-1)(joblib.delayed(_where)() for _ in range(8))
        assert set(places) <= set(client.nthreads()) and places
        assert ensure_client(client, local.scheduler_address) is client
        client.close()
        fresh = ensure_client(client, local.scheduler_address)
        assert fresh is not client and fresh.status == "running"
        fresh.close()
    finally:
        client.close()


def test_a_cluster_without_workers_fails_the_call_instead_of_waiting():
    """With a scheduler but no worker, a joblib call inside evaluations_on raises after the
    configured wait instead of blocking forever (joblib's Dask backend wait_for_workers_timeout)."""
    import joblib
    from distributed import LocalCluster

    from burstlens.service.dask_backend import evaluations_on

    with LocalCluster(n_workers=0, processes=False, protocol="tcp://", host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", scheduler_port=0) as empty:
        client = connect(empty.scheduler_address)
        try:
            started = time.monotonic()
            with (pytest.raises(TimeoutError, match="no worker"),
                  evaluations_on(client, wait_for_workers_s=1.0)):
                joblib.Parallel(n_jobs=-1)(joblib.delayed(abs)(-1) for _ in range(2))
            assert time.monotonic() - started < 30.0
        finally:
            client.close()


def _prepared_chunks() -> int:
    """Window chunks prepared in this process (search.fit.evaluate caches one per chunk it scored)."""
    from burstlens.search.fit import evaluate

    return len(evaluate._PREPARED)


def test_a_one_thread_cluster_runs_the_search_on_the_cluster(tmp_path):
    """On a cluster with a single worker thread (what a 2-worker cluster is while one worker
    restarts) a fit inside evaluations_on still runs on the cluster and gives the filterbank of
    a serial fit (joblib runs a batch in-process when its backend reports one worker, which
    would hand the task the scattered windows' Future; common practice: never branch on the
    cluster's size)."""
    from distributed import LocalCluster

    from burstlens.service.testing import burst_npz

    from burstlens.search import read_corpus
    from burstlens.search.optimize import FilterbankSearch
    from burstlens.service.dask_backend import evaluations_on

    path = tmp_path / "trace.npz"
    path.write_bytes(burst_npz(0))
    corpus = read_corpus([path])
    options = {"channels": 4, "evaluations": 4, "bootstrap": 0, "refine": False, "seed": 1}
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address="127.0.0.1:0", scheduler_port=0) as one:
        client = connect(one.scheduler_address)
        try:
            with evaluations_on(client):
                on_cluster = FilterbankSearch(**options, jobs=-1).fit(corpus)
            ran_there = client.run(_prepared_chunks)
        finally:
            client.close()
    serial = FilterbankSearch(**options, jobs=1).fit(corpus)
    assert list(ran_there.values())[0] > 0, "no chunk was prepared on the Dask worker"
    assert comparable(on_cluster.filterbank_.to_json()) == comparable(serial.filterbank_.to_json())
