"""POST /v1/transform and `burstlens transform`: new files are cut as the tuning cut its corpus,
and both write one NPZ layout."""
from __future__ import annotations

import io

import numpy as np
import pytest

from burstlens.service.testing import TINY, burst_npz, corpus_files, settings_for

# A quick fit: the windowing under test, not the search, is what these jobs are for.
QUICK = {**TINY, "bootstrap": 0, "refine": False, "max_windows": 40}
FS, WINDOW_S = 1000.0, 0.256  # the rate of burst_npz and TINY's window length


@pytest.fixture(scope="module")
def tuned(tmp_path_factory):
    """Two finished jobs on burst traces: one whose settings ask for sliding windows, one on a
    corpus uploaded with the reading option windowing=sliding and settings that say nothing."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app
    from burstlens.service.worker import Worker

    settings = settings_for(tmp_path_factory.mktemp("transform"))
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        plain = client.post("/v1/corpora", files=corpus_files(2)).json()["id"]
        sliding = client.post("/v1/corpora", files=corpus_files(2),
                              data={"windowing": "sliding", "max_windows": "40"}).json()["id"]
        by_job = client.post("/v1/jobs", json={"corpus_id": plain, "settings": {
            **QUICK, "windowing": "sliding"}}).json()["id"]
        by_upload = client.post("/v1/jobs", json={"corpus_id": sliding,
                                                  "settings": QUICK}).json()["id"]
        Worker(settings).run(exit_when_idle=True)
        for job_id in (by_job, by_upload):
            assert client.get(f"/v1/jobs/{job_id}").json()["state"] == "done"
        yield client, by_job, by_upload


def _offsets(tmp_path, windowing: str) -> list[float]:
    """Window starts the corpus reader gives the new file (burst_npz seed 5) cut as asked."""
    from burstlens.search.corpus import read_corpus

    path = tmp_path / "new.npz"
    path.write_bytes(burst_npz(5))
    corpus = read_corpus([str(path)], windowing=windowing, sampling_rate_hz=FS, window_s=WINDOW_S)
    return [w["offset_s"] for w in corpus.window_meta]


def _transform(client, **fields) -> dict:
    response = client.post("/v1/transform", data=fields, files=corpus_files(1, seed=5))
    assert response.status_code == 200, response.text
    with np.load(io.BytesIO(response.content), allow_pickle=False) as npz:
        return {name: npz[name] for name in npz.files}


def test_transform_cuts_new_files_with_the_jobs_windowing(tuned, tmp_path):
    """A filterbank tuned on sliding windows (the job's setting windowing=sliding) transforms a
    new file into sliding windows too, given by job id or as the filterbank JSON; the request's
    own windowing overrides it. The three windowings give different windows on this file
    (6 bursts, 83 sliding), so the check tells them apart. Regression: the route read the
    windowing from a key the filterbank file never has and always cut bursts (issue 15)."""
    client, by_job, _ = tuned
    sliding, bursts = _offsets(tmp_path, "sliding"), _offsets(tmp_path, "bursts")
    assert len(sliding) != len(bursts)
    filterbank = client.get(f"/v1/jobs/{by_job}/filterbank").text
    for fields in ({"job_id": by_job}, {"filterbank": filterbank}):
        arrays = _transform(client, **fields)
        assert arrays["window_offset_s"].tolist() == sliding, fields.keys()
        assert arrays["representation"].shape == (len(sliding), TINY["channels"], 256)
    overridden = _transform(client, job_id=by_job, windowing="bursts")
    assert overridden["window_offset_s"].tolist() == bursts


def test_transform_uses_the_reading_options_of_the_jobs_corpus(tuned, tmp_path):
    """A job on a corpus uploaded with windowing=sliding (a reading option of the upload, which
    its jobs use unless their settings override it) was tuned on sliding windows, so its
    filterbank cuts new files into sliding windows, by job id or as its filterbank JSON."""
    client, _, by_upload = tuned
    sliding = _offsets(tmp_path, "sliding")
    filterbank = client.get(f"/v1/jobs/{by_upload}/filterbank").text
    for fields in ({"job_id": by_upload}, {"filterbank": filterbank}):
        assert _transform(client, **fields)["window_offset_s"].tolist() == sliding, fields.keys()


def test_route_and_command_write_the_same_npz(tuned, tmp_path, monkeypatch):
    """POST /v1/transform and `burstlens transform` on the same filterbank and file write the
    same members in the same order with equal arrays (one layout, search.documents.npz_members),
    the command also cutting the file as the job did."""
    from burstlens.service.cli import main

    client, by_job, _ = tuned
    filterbank = client.get(f"/v1/jobs/{by_job}/filterbank").text
    (tmp_path / "filterbank.json").write_text(filterbank)
    with np.load(io.BytesIO(burst_npz(5))) as trace:  # with a SEED id: the trace ids then do
        buffer = io.BytesIO()                        # not depend on the file's stored name
        np.savez(buffer, data=trace["data"], sampling_rate_hz=trace["sampling_rate_hz"],
                 trace_ids=np.array(["XX.NEW.00.HHZ"]))
    (tmp_path / "new.npz").write_bytes(buffer.getvalue())
    monkeypatch.chdir(tmp_path)  # the command records the path as given: "new.npz"
    assert main(["transform", "--filterbank", "filterbank.json", "new.npz",
                 "--out", "out.npz"]) == 0
    with np.load(tmp_path / "out.npz", allow_pickle=False) as npz:
        command = {name: npz[name] for name in npz.files}
    response = client.post("/v1/transform", data={"filterbank": filterbank},
                           files=[("files", ("new.npz", buffer.getvalue()))])
    assert response.status_code == 200, response.text
    with np.load(io.BytesIO(response.content), allow_pickle=False) as npz:
        route = {name: npz[name] for name in npz.files}
    assert len(route["window_file"]) > 6 and set(route["window_trace_id"]) == {"XX.NEW.00.HHZ"}
    assert list(command) == list(route)
    for name, array in route.items():
        assert command[name].dtype == array.dtype, name
        np.testing.assert_array_equal(command[name], array, err_msg=name)


def test_transform_leaves_no_file_in_the_data_dir(tuned):
    """The NPZ is written to the data dir's tmp/ and sent from there: once the response is
    sent the file is gone (its background task deletes it), as is the upload folder."""
    client, by_job, _ = tuned
    tmp_dir = client.app.state.store.tmp_dir
    arrays = _transform(client, job_id=by_job)
    assert arrays["representation"].shape[0] > 6
    assert list(tmp_dir.iterdir()) == []


def test_a_failed_transform_leaves_no_file_and_shows_no_internals(tuned, monkeypatch):
    """A transform failing in the middle of the NPZ (second chunk, one window per chunk) is a
    500 that names no internals (no exception text, no stack trace), and leaves neither the
    output nor a temp file in the data dir."""
    from burstlens.search import npz_stream
    from burstlens.search.tfd import transform

    client, by_job, _ = tuned
    calls = []

    def failing(chunk, filterbank):
        calls.append(len(chunk))
        if len(calls) == 2:
            raise RuntimeError("secret internals")
        return transform(chunk, filterbank)

    monkeypatch.setattr(npz_stream, "transform", failing)
    monkeypatch.setattr(npz_stream, "CHUNK_BYTES", 1)
    response = client.post("/v1/transform", data={"job_id": by_job}, files=corpus_files(1, seed=5))
    assert response.status_code == 500 and calls == [1, 1]
    assert "secret" not in response.text and "Traceback" not in response.text
    assert list(client.app.state.store.tmp_dir.iterdir()) == []


@pytest.mark.parametrize("spec_version", ["2.0", "2.4"])
def test_a_send_that_fails_still_deletes_the_file(tmp_path, spec_version):
    """When sending the NPZ fails part-way (the client went away: the server's send raises),
    the temp file is deleted all the same and the error goes on to the server; a full send
    deletes it through the background task. Both ASGI paths of the file response (2.0 listens
    for the disconnect, 2.4 relies on send raising) are covered."""
    import asyncio

    from starlette.background import BackgroundTask

    from burstlens.service.routers.transform import NPZ_MEDIA_TYPE, _TempFileResponse

    scope = {"type": "http", "method": "POST", "headers": [],
             "asgi": {"spec_version": spec_version}}

    async def receive():
        await asyncio.sleep(3600)  # the client stays connected while the body is sent

    def respond(path, send):
        response = _TempFileResponse(path, media_type=NPZ_MEDIA_TYPE,
                                     background=BackgroundTask(path.unlink, missing_ok=True))
        response.chunk_size = 4  # several body messages: the failure comes part-way
        asyncio.run(response(scope, receive, send))

    sent = []

    async def record(message):
        sent.append(message)

    async def gone(message):
        if message["type"] == "http.response.body":
            raise OSError("connection reset")

    for send in (record, gone):
        path = tmp_path / f"{send.__name__}.npz"
        path.write_bytes(b"0123456789")
        if send is gone:
            with pytest.raises(OSError, match="connection reset"):
                respond(path, send)
        else:
            respond(path, send)
            assert b"".join(m.get("body", b"") for m in sent) == b"0123456789"
        assert not path.exists(), send.__name__


def test_command_counts_windows_on_stderr_unless_quiet(tuned, tmp_path, monkeypatch, capsys):
    """`burstlens transform` draws a progress bar of the windows transformed on stderr (all M
    of them by the end), none with --quiet; stdout and the file are the same either way."""
    from burstlens.service.cli import main

    client, by_job, _ = tuned
    (tmp_path / "filterbank.json").write_text(client.get(f"/v1/jobs/{by_job}/filterbank").text)
    (tmp_path / "new.npz").write_bytes(burst_npz(5))
    monkeypatch.chdir(tmp_path)
    m = len(_offsets(tmp_path, "sliding"))
    outputs = []
    for name, extra in (("bar.npz", []), ("quiet.npz", ["--quiet"])):
        capsys.readouterr()
        assert main(["transform", "--filterbank", "filterbank.json", "new.npz",
                     "--out", name, *extra]) == 0
        outputs.append(capsys.readouterr())
    assert "transform" in outputs[0].err and f"{m}/{m}" in outputs[0].err
    assert outputs[1].err == ""
    assert outputs[0].out.replace("bar.npz", "quiet.npz") == outputs[1].out
    with np.load(tmp_path / "bar.npz") as bar, np.load(tmp_path / "quiet.npz") as quiet:
        for name in bar.files:
            np.testing.assert_array_equal(bar[name], quiet[name], err_msg=name)


def _disk_fills_on_second_chunk(monkeypatch):
    """The second chunk's write meets ENOSPC (one window per chunk), as a full disk would."""
    import errno

    from burstlens.search import npz_stream
    from burstlens.search.tfd import transform

    calls = []

    def filling(chunk, filterbank):
        calls.append(len(chunk))
        if len(calls) == 2:
            raise OSError(errno.ENOSPC, "No space left on device")
        return transform(chunk, filterbank)

    monkeypatch.setattr(npz_stream, "transform", filling)
    monkeypatch.setattr(npz_stream, "CHUNK_BYTES", 1)


def test_a_full_disk_is_507_and_leaves_nothing(tuned, monkeypatch):
    """A full disk while the NPZ is written is 507 Insufficient Storage (RFC 4918 §11.5) with a
    message for people, as for uploads, and the data dir's tmp/ holds nothing afterwards."""
    client, by_job, _ = tuned
    _disk_fills_on_second_chunk(monkeypatch)
    response = client.post("/v1/transform", data={"job_id": by_job}, files=corpus_files(1, seed=5))
    assert response.status_code == 507
    assert "disk is full" in response.json()["detail"]
    assert list(client.app.state.store.tmp_dir.iterdir()) == []


def test_command_names_the_output_on_a_full_disk(tuned, tmp_path, monkeypatch, capsys):
    """`burstlens transform` on a full disk: exit 2, one line naming --out and the cause, no
    traceback, and no output or temp file left in the folder (common practice for CLIs)."""
    from burstlens.service.cli import main

    client, by_job, _ = tuned
    (tmp_path / "filterbank.json").write_text(client.get(f"/v1/jobs/{by_job}/filterbank").text)
    (tmp_path / "new.npz").write_bytes(burst_npz(5))
    monkeypatch.chdir(tmp_path)
    _disk_fills_on_second_chunk(monkeypatch)
    assert main(["transform", "--filterbank", "filterbank.json", "new.npz", "--out", "out.npz",
                 "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "--out out.npz" in err and "No space left on device" in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["filterbank.json", "new.npz"]
