"""Workers in process with the real search: a job's life, retries, checkpoints, cancel."""
from __future__ import annotations

import io
from typing import get_args

import numpy as np
import pytest

from burstlens.service.testing import TINY, corpus_files, settings_for, wait_for

from burstlens.service.dependencies import get_settings
from burstlens.service.report import PLOT_NAMES
from burstlens.service.routers.jobs import PlotName
from burstlens.service.worker import Worker


@pytest.fixture(scope="module")
def shared(tmp_path_factory):
    """One store for the module: a corpus and a finished reference job on it (TINY)."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app

    settings = settings_for(tmp_path_factory.mktemp("worker"))
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        corpus_id = client.post("/v1/corpora", files=corpus_files(2)).json()["id"]
        job = _submit(client, TINY, corpus_id)
        assert _worker(client).run(exit_when_idle=True) == 0
        yield client, corpus_id, job["id"]


def _submit(client, settings=TINY, corpus_id=None):
    if corpus_id is None:
        corpus_id = client.post("/v1/corpora", files=corpus_files(2)).json()["id"]
    response = client.post("/v1/jobs", json={"corpus_id": corpus_id, "settings": settings})
    assert response.status_code == 201, response.text
    return response.json()


def _worker(client, **hooks) -> Worker:
    return Worker(client.app.state.settings, **hooks)


def _channels(client, job_id):
    return client.get(f"/v1/jobs/{job_id}/filterbank").json()["channels"]


def test_job_full_life(shared):
    """A queued job is claimed, reports progress, succeeds with the filterbank JSON (docs/design.md §8),
    diagnostics, report, its PNG plots (PNG signature, ISO/IEC 15948) and an evaluation audit
    log; /v1/transform applies it as an NPZ with plain (non-object) arrays (docs/design.md §7–8)."""
    client, _, job_id = shared
    job = {"id": job_id}
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert (done["state"], done["attempts"], done["error"]) == ("done", 1, None)
    assert done["progress"]["fraction"] == 1.0 and done["progress"]["stage"] == "judge"
    # the job leads with the scorecard, in words and in numbers (docs/design.md §7)
    assert list(done["summary"])[:2] == ["scorecard", "scorecard_rows"]
    assert done["summary"]["scorecard"][0].startswith(("The tuned filterbank", "The returned spectrogram"))
    filterbank = client.get(f"/v1/jobs/{job['id']}/filterbank").json()
    assert (filterbank["format"], filterbank["version"]) == ("burstlens-filterbank", 3)
    assert len(filterbank["channels"]) == TINY["channels"]
    assert filterbank["window_samples"] == 256
    assert filterbank["job"] == {"id": job["id"], "settings": TINY}
    diagnostics = client.get(f"/v1/jobs/{job['id']}/diagnostics").json()
    assert diagnostics["stop_reason"] and "gain_bits" in diagnostics
    assert done["summary"]["gain_bits"] == diagnostics["gain_bits"]
    report = client.get(f"/v1/jobs/{job['id']}/report")
    assert report.status_code == 200 and report.headers["content-type"].startswith("text/html")
    assert get_args(PlotName) == PLOT_NAMES
    for name in PLOT_NAMES:
        png = client.get(f"/v1/jobs/{job['id']}/plots/{name}.png")
        assert png.status_code == 200 and png.content.startswith(b"\x89PNG\r\n\x1a\n"), name
    store = client.app.state.store
    assert len(store.job_evaluations(job["id"])) == len(diagnostics["evaluations"])
    metrics = client.get("/metrics").text
    assert 'burstlens_jobs{state="done"}' in metrics
    assert "burstlens_evaluations_total 0\n" not in metrics

    npz = client.post("/v1/transform", data={"job_id": job["id"]}, files=corpus_files(1, seed=5))
    assert npz.status_code == 200, npz.text
    arrays = np.load(io.BytesIO(npz.content), allow_pickle=False)
    m = len(arrays["window_offset_s"])
    assert arrays["representation"].dtype == np.float32
    assert arrays["representation"].shape == (m, TINY["channels"], 256)
    assert arrays["times_s"].shape == (256,) and arrays["center_hz"].shape == (TINY["channels"],)
    assert list(arrays["window_file"]) == ["trace0.npz"] * m


def test_transform_with_filterbank_json(shared):
    """POST /v1/transform with the filterbank JSON itself gives the same NPZ as with the job id;
    a malformed filterbank is a 422 naming it, an output over the limit a 413 (docs/design.md §7)."""
    client, _, job_id = shared
    job = {"id": job_id}
    filterbank = client.get(f"/v1/jobs/{job['id']}/filterbank").text
    by_json = client.post("/v1/transform", data={"filterbank": filterbank}, files=corpus_files(1, 5))
    by_id = client.post("/v1/transform", data={"job_id": job["id"]}, files=corpus_files(1, 5))
    a = np.load(io.BytesIO(by_json.content))["representation"]
    b = np.load(io.BytesIO(by_id.content))["representation"]
    np.testing.assert_array_equal(a, b)
    bad = client.post("/v1/transform", data={"filterbank": '{"format": "x"}'}, files=corpus_files(1))
    assert bad.status_code == 422 and "filterbank" in bad.json()["detail"]
    small = client.app.state.settings.model_copy(update={"max_transform_values": 1000})
    client.app.dependency_overrides[get_settings] = lambda: small
    try:
        big = client.post("/v1/transform", data={"job_id": job["id"]}, files=corpus_files(1, 5))
    finally:
        client.app.dependency_overrides.clear()
    assert big.status_code == 413 and "limit of 1000" in big.json()["detail"]


def test_crashing_job_fails_after_attempts_without_blocking_others(shared):
    """A job whose search always raises (band above the Nyquist frequency, found only once the
    corpus is read) is retried up to max_attempts and then failed with the last error; a job
    queued after it still runs (docs/design.md §7)."""
    client, corpus_id, _ = shared
    assert client.app.state.settings.max_attempts == 3
    bad = _submit(client, {**TINY, "band_hz": [10.0, 4000.0]}, corpus_id)
    good = _submit(client, TINY, corpus_id)
    _worker(client).run(exit_when_idle=True)
    bad = client.get(f"/v1/jobs/{bad['id']}").json()
    assert (bad["state"], bad["attempts"]) == ("error", 3)
    assert "Nyquist" in bad["error"] and "3 attempts" in bad["error"]
    assert client.get(f"/v1/jobs/{good['id']}").json()["state"] == "done"


def _stopped_after_checkpoints(client, count: int) -> Worker:
    """A worker that behaves as if SIGTERM arrived during its ``count``-th checkpoint (the
    checkpoint is saved, then the attempt ends), through the worker's ``on_checkpoint`` hook."""
    def on_checkpoint(run, seq):
        if seq == count:
            run.worker.request_stop()

    return _worker(client, on_checkpoint=on_checkpoint)


def test_resume_from_checkpoint_matches_uninterrupted(shared):
    """A job stopped after a checkpoint is released (attempt given back) and, resumed from the
    pickled state, ends with exactly the filterbank of an uninterrupted run (docs/design.md §5)."""
    client, corpus_id, reference_id = shared
    reference = {"id": reference_id}
    job = _submit(client, TINY, corpus_id)
    _stopped_after_checkpoints(client, 5).run(max_jobs=1)
    paused = client.get(f"/v1/jobs/{job['id']}").json()
    assert (paused["state"], paused["attempts"]) == ("waiting", 0)
    assert client.app.state.store.get_job(job["id"], None)["checkpoint_path"]
    _worker(client).run(exit_when_idle=True)
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert done["state"] == "done" and done["progress"]["resumed"] is True
    assert _channels(client, job["id"]) == _channels(client, reference["id"])


def test_torn_checkpoint_restarts_clean(shared):
    """A checkpoint whose bytes no longer match the sha256 kept in the store (a torn or altered
    file) is dropped: the job starts over and still ends with the uninterrupted result (a
    digest kept apart from the data detects a torn write; common practice)."""
    client, corpus_id, reference_id = shared
    reference = {"id": reference_id}
    job = _submit(client, TINY, corpus_id)
    _stopped_after_checkpoints(client, 5).run(max_jobs=1)
    store = client.app.state.store
    path = store.path(store.get_job(job["id"], None)["checkpoint_path"])
    path.write_bytes(path.read_bytes()[: path.stat().st_size // 2])
    _worker(client).run(exit_when_idle=True)
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert done["state"] == "done"
    assert done["progress"]["resumed"] is False and "sha256" in done["progress"]["checkpoint_problem"]
    assert _channels(client, job["id"]) == _channels(client, reference["id"])
    assert not list(path.parent.glob(f"{job['id']}-*"))  # checkpoints cleaned up


def test_cancel_running_job(shared):
    """Cancelling a running job reaches its worker through the heartbeat; the search stops at
    its next round and the job ends cancelled, its checkpoints removed (docs/design.md §7)."""
    client, corpus_id, reference_id = shared
    job = _submit(client, TINY, corpus_id)

    def on_progress(run, info):
        if info.get("round") == 2 and not run.beat.withdrawn:  # cancel mid-job, over HTTP
            assert client.post(f"/v1/jobs/{job['id']}/withdraw").json()["withdraw_requested"]
            wait_for(lambda: run.beat.withdrawn, timeout=30)

    assert _worker(client, on_progress=on_progress).run(max_jobs=1) == 0
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert (done["state"], done["stop_reason"]) == ("withdrawn", "withdrawn")
    full = client.get(f"/v1/jobs/{reference_id}").json()["progress"]["round"]
    assert done["progress"]["round"] <= 3 < full  # stopped within a round of the cancel
    checkpoints = client.app.state.store.blob_dir / "checkpoints"
    assert not list(checkpoints.glob(f"{job['id']}-*"))


def test_worker_start_sweeps_checkpoints_of_ended_jobs(shared):
    """A worker killed right after a job's final COMMIT leaves that job's checkpoint files (and
    a temp file of a checkpoint write); the next worker's start deletes them, and keeps those of
    a job still waiting (its resume needs them). A done job's row names no checkpoint."""
    client, corpus_id, done_id = shared
    store = client.app.state.store
    assert store.get_job(done_id, None)["checkpoint_path"] is None
    waiting = _submit(client, TINY, corpus_id)
    folder = store.blob_dir / "checkpoints"
    left = [folder / f"{done_id}-1-3.pkl", folder / f".{done_id}-1-4.pkl.x1.tmp"]
    kept = folder / f"{waiting['id']}-1-1.pkl"
    for path in (*left, kept):
        path.write_bytes(b"state")
    Worker(client.app.state.settings).run(max_jobs=0)
    assert not any(p.exists() for p in left) and kept.exists()
    client.post(f"/v1/jobs/{waiting['id']}/withdraw")
    kept.unlink()
