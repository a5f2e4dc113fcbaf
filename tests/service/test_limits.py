"""Server limits: body size (413 from the ASGI middleware), files, windows, samples, queued jobs
(429), and a full disk (507) — each with a message and nothing left behind."""
from __future__ import annotations

import errno
import io
import os

from burstlens.service.testing import TINY, burst_npz, corpus_files


def _nothing_left(tmp_path) -> bool:
    data = tmp_path / "data"
    return os.listdir(data / "tmp") == [] and os.listdir(data / "blobs" / "corpora") == []


def test_declared_body_over_limit_is_413(make_client, tmp_path):
    """A Content-Length over the limit is refused before the body is read (RFC 9110 §15.5.14)."""
    client = make_client(max_body_bytes=50_000)
    response = client.post("/v1/corpora", files=corpus_files(1))
    assert response.status_code == 413
    assert "50000" in response.json()["detail"]
    assert _nothing_left(tmp_path)


def test_streamed_body_over_limit_is_413(make_client, tmp_path):
    """A body without Content-Length (chunked) is counted as it streams and cut off with 413,
    not the 400 a raise inside receive() would give (docs/design.md §7)."""
    client = make_client(max_body_bytes=50_000)
    body = b"--b\r\nContent-Disposition: form-data; name=\"files\"; filename=\"x.npz\"\r\n\r\n"

    def chunks():
        yield body
        for _ in range(40):
            yield b"\0" * 4096

    response = client.post("/v1/corpora", content=chunks(),
                           headers={"content-type": "multipart/form-data; boundary=b"})
    assert response.status_code == 413
    assert _nothing_left(tmp_path)


def test_too_many_files_is_413(make_client, tmp_path):
    """More files than max_files in one upload: 413 naming the limit, nothing kept (docs/design.md §7)."""
    client = make_client(max_files=2)
    response = client.post("/v1/corpora", files=corpus_files(3))
    assert response.status_code == 413 and "2 files" in response.json()["detail"]
    assert _nothing_left(tmp_path)


def test_too_many_windows_is_413(make_client, tmp_path):
    """A corpus with more windows than max_windows: 413 with both numbers in the message
    (docs/design.md §7)."""
    client = make_client(max_windows=3)
    response = client.post("/v1/corpora", files=corpus_files(1))
    assert response.status_code == 413
    assert "limit of 3" in response.json()["detail"]
    assert _nothing_left(tmp_path)


def test_too_many_samples_is_413(make_client, tmp_path):
    """A corpus with more samples than max_samples (12 s at 1 kHz = 12000): 413 (docs/design.md §7)."""
    client = make_client(max_samples=10_000)
    response = client.post("/v1/corpora", files=corpus_files(1))
    assert response.status_code == 413
    assert "12000 samples" in response.json()["detail"]
    assert _nothing_left(tmp_path)


def test_queued_jobs_per_tenant_is_429(make_client):
    """Past max_queued_jobs queued jobs, a new one is a 429 (RFC 6585 §4, Too Many Requests);
    cancelling one makes room."""
    client = make_client(max_queued_jobs=2)
    corpus = client.post("/v1/corpora", files=corpus_files(1)).json()
    ids = []
    for seed in range(2):
        response = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                                 "settings": {**TINY, "seed": seed}})
        assert response.status_code == 201
        ids.append(response.json()["id"])
    response = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY})
    assert response.status_code == 429 and "limit 2" in response.json()["detail"]
    client.post(f"/v1/jobs/{ids[0]}/withdraw")
    assert client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}).status_code == 201


def test_disk_full_is_507(make_client, tmp_path, monkeypatch):
    """ENOSPC while storing an upload: 507 Insufficient Storage (RFC 4918 §11.5) with a
    message, and the partial upload is removed."""
    from burstlens.service import uploads as uploads_module

    class FullDisk(io.FileIO):
        def write(self, data):
            raise OSError(errno.ENOSPC, "No space left on device")

    monkeypatch.setattr(uploads_module, "open", FullDisk, raising=False)
    client = make_client()
    response = client.post("/v1/corpora", files=corpus_files(1))
    assert response.status_code == 507
    assert "disk is full" in response.json()["detail"]
    assert _nothing_left(tmp_path)


def test_not_multipart_is_415(make_client):
    """A corpus upload that is not multipart/form-data: 415 saying what is expected
    (RFC 9110 §15.5.16)."""
    client = make_client()
    response = client.post("/v1/corpora", content=burst_npz(),
                           headers={"content-type": "application/octet-stream"})
    assert response.status_code == 415 and "multipart" in response.json()["detail"]
