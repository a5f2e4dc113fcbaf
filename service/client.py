"""HTTP client of the burstlens API (httpx), used by ``burstlens submit`` and ``make demo``.

    client = Client("http://127.0.0.1:8000", token="bl_...")
    corpus = client.upload_corpus(["site/day1.mseed", "site/day2.mseed"])
    job = client.submit_job(corpus["id"], {"channels": 48, "seed": 7})
    job = client.wait(job["id"], on_progress=print)
    client.download_results(job["id"], "out/")

Files are streamed from disk in the upload (httpx reads them in chunks). Errors come back as
:class:`ServiceError` carrying the HTTP status and the server's message.
"""
from __future__ import annotations

import time
import uuid
from collections.abc import Callable, Iterable
from contextlib import ExitStack
from pathlib import Path
from typing import Any

import httpx

from burstlens.service.results import DIAGNOSTICS_JSON, FILTERBANK_JSON, REPORT_HTML

FINAL_STATES = ("done", "error", "withdrawn")
RESULTS = {"filterbank": FILTERBANK_JSON, "diagnostics": DIAGNOSTICS_JSON, "report": REPORT_HTML}


class ServiceError(RuntimeError):
    """An error answer of the API: ``status`` and the server's ``message`` (the problem
    document's ``detail``, RFC 9457)."""

    def __init__(self, status: int, message: str):
        super().__init__(f"HTTP {status}: {message}")
        self.status = status
        self.message = message


def _message(response: httpx.Response) -> str:
    try:
        body = response.json()
    except ValueError:
        return response.text[:500] or response.reason_phrase
    if isinstance(body, dict) and "detail" in body:
        return str(body["detail"])
    return str(body)[:500]


class Client:
    def __init__(self, server: str, token: str | None = None, *, timeout_s: float = 60.0,
                 transport: httpx.BaseTransport | None = None):
        headers = {"Authorization": f"Bearer {token}"} if token else {}
        self.http = httpx.Client(base_url=server.rstrip("/"), headers=headers,
                                 timeout=httpx.Timeout(timeout_s, connect=10.0), transport=transport)

    def close(self) -> None:
        self.http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def _check(self, response: httpx.Response) -> httpx.Response:
        if response.status_code >= 400:
            raise ServiceError(response.status_code, _message(response))
        return response

    # -- resources --------------------------------------------------------------------------
    def health(self) -> dict:
        return self._check(self.http.get("/v1/health")).json()

    def upload_corpus(self, paths: Iterable[str | Path], **read_options: Any) -> dict:
        """Upload waveform files (streamed from disk) as one corpus; returns the corpus record."""
        paths = [Path(p) for p in paths]
        if not paths:
            raise ValueError("no files to upload")
        with ExitStack() as stack:
            files = [("files", (p.name, stack.enter_context(open(p, "rb")),
                                "application/octet-stream")) for p in paths]
            data = {k: str(v) for k, v in read_options.items() if v is not None}
            response = self.http.post("/v1/corpora", files=files, data=data,
                                      timeout=httpx.Timeout(None, connect=10.0))
        return self._check(response).json()

    def submit_job(self, corpus_id: str, settings: dict | None = None,
                   idempotency_key: str | None = None) -> dict:
        """Queue a search. A retry after a network error reuses the same Idempotency-Key, so
        the server never creates two jobs for one submission."""
        return self._submit("/v1/jobs", {"corpus_id": corpus_id, "settings": settings or {}},
                            idempotency_key)

    def submit_check(self, job_id: str, corpus_id: str, idempotency_key: str | None = None) -> dict:
        """Queue a check of search ``job_id``'s filterbank on the corpus ``corpus_id``."""
        return self._submit(f"/v1/jobs/{job_id}/checks", {"corpus_id": corpus_id}, idempotency_key)

    def submit_transform(self, job_id: str, corpus_id: str, time_step_s: float | None = None,
                         idempotency_key: str | None = None) -> dict:
        """Queue search ``job_id``'s filterbank over the continuous records of ``corpus_id``."""
        return self._submit(f"/v1/jobs/{job_id}/transforms",
                            {"corpus_id": corpus_id, "time_step_s": time_step_s}, idempotency_key)

    def _submit(self, route: str, body: dict, idempotency_key: str | None) -> dict:
        key = idempotency_key or uuid.uuid4().hex
        last: Exception | None = None
        for attempt in range(3):
            try:
                response = self.http.post(route, json=body, headers={"Idempotency-Key": key})
                return self._check(response).json()
            except httpx.TransportError as exc:
                last = exc
                time.sleep(0.5 * (attempt + 1))
        raise ServiceError(0, f"could not reach the server: {last}")

    def job(self, job_id: str) -> dict:
        return self._check(self.http.get(f"/v1/jobs/{job_id}")).json()

    def jobs(self, state: str | None = None) -> list[dict]:
        params = {"state": state} if state else {}
        return self._check(self.http.get("/v1/jobs", params=params)).json()["jobs"]

    def withdraw(self, job_id: str) -> dict:
        return self._check(self.http.post(f"/v1/jobs/{job_id}/withdraw")).json()

    def check_answer(self, check_id: str) -> dict:
        """The answer of a check that is done (as ``burstlens check --json`` prints it)."""
        return self._check(self.http.get(f"/v1/jobs/{check_id}/check")).json()

    def download_store(self, transform_id: str, out: str | Path) -> Path:
        """Save a transform's Zarr store as a zip at ``out`` (streamed; written whole or not
        at all)."""
        out = Path(out)
        part = out.with_name(out.name + ".part")
        with self.http.stream("GET", f"/v1/jobs/{transform_id}/store.zip",
                              timeout=httpx.Timeout(None, connect=10.0)) as response:
            if response.status_code >= 400:
                response.read()
                self._check(response)
            with open(part, "wb") as fh:
                for piece in response.iter_bytes():
                    fh.write(piece)
        part.replace(out)
        return out

    def wait(self, job_id: str, *, on_progress: Callable[[dict], None] | None = None,
             poll_s: float = 1.0, timeout_s: float | None = None) -> dict:
        """Poll until the job is final; ``on_progress(job)`` after each poll. Returns the job."""
        start = time.monotonic()
        while True:
            try:
                job = self.job(job_id)
            except httpx.TransportError:  # the server restarting: keep polling
                job = None
            if job is not None:
                if on_progress:
                    on_progress(job)
                if job["state"] in FINAL_STATES:
                    return job
            if timeout_s is not None and time.monotonic() - start > timeout_s:
                raise TimeoutError(f"job {job_id} not finished after {timeout_s} s")
            time.sleep(poll_s)

    def result(self, job_id: str, what: str) -> bytes:
        """Raw bytes of ``filterbank``, ``diagnostics`` or ``report``."""
        if what not in RESULTS:
            raise ValueError(f"unknown result {what!r}; one of {sorted(RESULTS)}")
        return self._check(self.http.get(f"/v1/jobs/{job_id}/{what}")).content

    def filterbank(self, job_id: str) -> dict:
        return self._check(self.http.get(f"/v1/jobs/{job_id}/filterbank")).json()

    def diagnostics(self, job_id: str) -> dict:
        return self._check(self.http.get(f"/v1/jobs/{job_id}/diagnostics")).json()

    def download_results(self, job_id: str, out_dir: str | Path) -> dict[str, Path]:
        """Save filterbank.json, diagnostics.json and report.html under ``out_dir``."""
        out = Path(out_dir)
        out.mkdir(parents=True, exist_ok=True)
        saved = {}
        for what, name in RESULTS.items():
            path = out / name
            path.write_bytes(self.result(job_id, what))
            saved[what] = path
        return saved

    def transform(self, paths: Iterable[str | Path], *, filterbank: dict | None = None,
                  job_id: str | None = None, **read_options: Any) -> bytes:
        """NPZ bytes of the filterbank (JSON or a job's) applied to the files."""
        import json

        data = {k: str(v) for k, v in read_options.items() if v is not None}
        if filterbank is not None:
            data["filterbank"] = json.dumps(filterbank)
        if job_id is not None:
            data["job_id"] = job_id
        with ExitStack() as stack:
            files = [("files", (Path(p).name, stack.enter_context(open(p, "rb")),
                                "application/octet-stream")) for p in paths]
            response = self.http.post("/v1/transform", files=files, data=data,
                                      timeout=httpx.Timeout(None, connect=10.0))
        return self._check(response).content
