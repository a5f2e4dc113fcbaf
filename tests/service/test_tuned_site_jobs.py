"""Checks and continuous transforms over HTTP: `POST /v1/jobs/{id}/checks` and
`POST /v1/jobs/{id}/transforms`, run by the job worker (service/tuned_site.py).

The site is generated (`burstlens.service.testing.drift_site_trace`, as for tests/service/
test_check_command.py): decaying tone bursts in red noise with a steady 50 Hz line. A search is
tuned once over the API; the properties checked are the API's contract (kinds, parents, states,
results) and that the worker's answers are the library's own: a check's answer is
`search.drift.check_drift`'s verdict, and a transform's store holds the same arrays as
`search.continuous.transform_continuous` run locally (itself tested against the one-pass
transform in tests/search/test_continuous.py).
"""
from __future__ import annotations

import io
import json

import numpy as np
import obspy
import pytest
from fastapi.testclient import TestClient
from burstlens.service.testing import drift_site_trace, settings_for

from burstlens.service.app import create_app
from burstlens.service.worker import Worker

FS = 1000.0
START = obspy.UTCDateTime(2026, 3, 9, 6, 0, 0)
SEARCH = {"channels": 16, "evaluations": 16, "refine": False, "bootstrap": 0, "seed": 1}


def npz_file(name: str, x: np.ndarray) -> tuple:
    buffer = io.BytesIO()
    np.savez(buffer, data=x, sampling_rate_hz=np.float64(FS))
    return ("files", (name, buffer.getvalue(), "application/octet-stream"))


def mseed_bytes(x: np.ndarray) -> bytes:
    trace = obspy.Trace(x.astype(np.float32), header={
        "network": "XX", "station": "KEEL", "location": "00", "channel": "HHZ",
        "sampling_rate": FS, "starttime": START})
    buffer = io.BytesIO()
    trace.write(buffer, format="MSEED")
    return buffer.getvalue()


@pytest.fixture(scope="module")
def site(tmp_path_factory):
    """A TestClient, its worker and a search that is done on the tuning corpus."""
    data = tmp_path_factory.mktemp("site") / "data"
    settings = settings_for(data)
    client = TestClient(create_app(settings), raise_server_exceptions=False)
    corpus = client.post("/v1/corpora", files=[npz_file("tuning.npz", drift_site_trace(1))]).json()
    search = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": SEARCH}).json()
    worker = Worker(settings)
    worker.run(exit_when_idle=True)
    assert client.get(f"/v1/jobs/{search['id']}").json()["state"] == "done"
    yield client, worker, search["id"], data
    client.close()


def upload(client, *files) -> str:
    response = client.post("/v1/corpora", files=list(files))
    assert response.status_code == 201, response.text
    return response.json()["id"]


def run_check(client, worker, search_id: str, x: np.ndarray) -> dict:
    corpus_id = upload(client, npz_file("week-2.npz", x))
    response = client.post(f"/v1/jobs/{search_id}/checks", json={"corpus_id": corpus_id})
    assert response.status_code == 201, response.text
    check = response.json()
    assert (check["kind"], check["parent_id"], check["state"]) == ("check", search_id, "waiting")
    worker.run(exit_when_idle=True)
    return client.get(f"/v1/jobs/{check['id']}").json()


def test_check_over_http_keeps_then_retunes_with_a_gauge_per_search(site):
    """Property: a check on new files from the same site ends `done` with verdict keep; bursts
    moved from 120 Hz to 250 Hz give retune naming the dominant frequency (the verdicts of
    `burstlens check` on the same site, tests/service/test_check_command.py). The answer is
    served at /check with the keys the CLI prints, the checks list the search's checks newest
    first, and the Prometheus gauge follows the latest check (text exposition format, common
    practice)."""
    client, worker, search_id, _ = site
    keep = run_check(client, worker, search_id, drift_site_trace(2))
    assert keep["state"] == "done", keep
    assert keep["summary"]["verdict"] == "keep" and keep["summary"]["files"] == ["week-2.npz"]
    answer = client.get(f"/v1/jobs/{keep['id']}/check").json()
    assert set(answer) >= {"verdict", "moved", "not_compared", "scorecard", "refit", "figures"}
    assert answer["verdict"] == "keep"
    metrics = client.get("/metrics").text
    assert f'burstlens_check_keep{{job="{search_id}",check="{keep["id"]}"}} 1' in metrics

    moved = run_check(client, worker, search_id, drift_site_trace(3, f_burst_hz=250.0))
    assert moved["summary"]["verdict"] == "retune"
    assert "dominant_frequency" in moved["summary"]["moved"]
    listed = client.get(f"/v1/jobs/{search_id}/checks").json()["jobs"]
    assert [j["id"] for j in listed] == [moved["id"], keep["id"]]
    metrics = client.get("/metrics").text
    assert f'burstlens_check_keep{{job="{search_id}",check="{moved["id"]}"}} 0' in metrics
    assert metrics.count("burstlens_check_keep{") == 1
    report = client.get(f"/v1/jobs/{search_id}/report")
    assert report.status_code == 200 and moved["id"][:8] in report.text


def test_site_jobs_need_a_search_that_is_done(site):
    """Property: a check or transform names a search of this tenant that is done: an unknown
    id is a 404, a check as parent a 409, a check's results are refused at a search's routes
    and the reverse (409), each a problem document (RFC 9457)."""
    client, worker, search_id, _ = site
    corpus_id = upload(client, npz_file("more.npz", drift_site_trace(4, seconds=20.0)))
    assert client.post("/v1/jobs/nope/checks", json={"corpus_id": corpus_id}).status_code == 404
    check = client.post(f"/v1/jobs/{search_id}/checks", json={"corpus_id": corpus_id}).json()
    response = client.post(f"/v1/jobs/{check['id']}/transforms", json={"corpus_id": corpus_id})
    assert response.status_code == 409 and "needs a search that is done" in response.json()["detail"]
    assert client.get(f"/v1/jobs/{check['id']}/check").status_code == 409   # still waiting
    assert client.post(f"/v1/jobs/{check['id']}/withdraw").json()["state"] == "withdrawn"
    assert client.get(f"/v1/jobs/{search_id}/check").status_code == 409
    assert client.get(f"/v1/jobs/{search_id}/store.zip").status_code == 409


def test_transform_job_resumes_and_serves_the_local_store(site, tmp_path):
    """Property: a transform job stopped after its first chunk (the worker told to stop, as on
    SIGTERM) goes back to waiting, resumes, and ends `done`; its store, downloaded as a zip and
    opened with xarray over zarr's ZipStore, holds the same arrays as
    `transform_continuous` run locally on the same file with the same filterbank."""
    import xarray
    import zarr

    from burstlens.search.continuous import transform_continuous
    from burstlens.search.documents import FilterbankDocument

    client, worker, search_id, data = site
    raw = mseed_bytes(drift_site_trace(5, seconds=400.0))
    corpus_id = upload(client, ("files", ("KEEL.mseed", raw, "application/octet-stream")))
    job = client.post(f"/v1/jobs/{search_id}/transforms",
                      json={"corpus_id": corpus_id, "time_step_s": 0.004}).json()
    planned = []

    def stop_after_first_chunk(run, info):
        planned.append(info.get("of"))
        if info.get("chunks") == 1:
            run.worker.request_stop()

    stopping = Worker(settings_for(data), on_progress=stop_after_first_chunk)
    stopping.run(exit_when_idle=True)
    assert client.get(f"/v1/jobs/{job['id']}").json()["state"] == "waiting"
    worker.run(exit_when_idle=True)
    done = client.get(f"/v1/jobs/{job['id']}").json()
    assert done["state"] == "done", done
    assert done["summary"]["time_step_s"] == pytest.approx(0.004)
    # the second attempt planned only the chunks the first left: it resumed, not restarted
    assert planned[0] > done["progress"]["of"] == done["progress"]["chunks"] >= 1

    response = client.get(f"/v1/jobs/{job['id']}/store.zip")
    assert response.status_code == 200
    (tmp_path / "store.zip").write_bytes(response.content)
    wave = tmp_path / "KEEL.mseed"
    wave.write_bytes(raw)
    document = FilterbankDocument.read(client.get(f"/v1/jobs/{search_id}/filterbank").json())
    local = tmp_path / "local.zarr"
    transform_continuous([str(wave)], document, str(local), step_s=0.004)
    group = "XX.KEEL.00.HHZ/20260309T060000.000000Z"
    served = xarray.open_zarr(zarr.storage.ZipStore(tmp_path / "store.zip", mode="r"), group=group,
                              consolidated=False)
    mine = xarray.open_zarr(str(local), group=group, consolidated=False)
    assert served["image"].shape == mine["image"].shape
    np.testing.assert_array_equal(served["image"].values, mine["image"].values)
    np.testing.assert_array_equal(served["time"].values, mine["time"].values)
    assert json.loads(json.dumps(dict(served.attrs)))["filterbank_sha256"] == \
        mine.attrs["filterbank_sha256"]
