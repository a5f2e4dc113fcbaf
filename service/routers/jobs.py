"""/v1/jobs: submit a filterbank search, watch it, withdraw it, fetch its filterbank, diagnostics
and report; then checks (does the filterbank still fit new data?) and continuous transforms."""
from __future__ import annotations

import hashlib
import io
import json
import logging
from collections.abc import Iterator
from pathlib import Path
from typing import Literal

from fastapi import APIRouter, Depends, Header, HTTPException, Query, Response
from fastapi.responses import FileResponse, HTMLResponse, StreamingResponse

from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument
from burstlens.service.auth import TenantDep
from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.models import (CheckRequest, JobKind, JobList, JobRequest, JobState, JobView,
                                      TransformJobRequest)
from burstlens.service.routers import COMMON, errors
from burstlens.service.store import NotFound, Store, write_blob

log = logging.getLogger("burstlens.api")
router = APIRouter(prefix="/v1/jobs", tags=["jobs"])

MAX_KEY_LENGTH = 255
RESULT_FILES = {"filterbank": "filterbank.json", "diagnostics": "diagnostics.json",
                "report": "report.html", "windows": "windows.npy", "check": "check.json"}
ZARR_DIR = "store.zarr"
# the report's plots (service.report.PLOT_NAMES), each served as PNG
PlotName = Literal["tiling", "examples", "convergence", "channels", "baselines"]


def request_digest(body: JobRequest | CheckRequest | TransformJobRequest,
                   parent_id: str | None = None) -> str:
    """sha256 of the request in canonical JSON (key order and spacing do not matter)."""
    content = ({"corpus_id": body.corpus_id, "settings": body.settings.to_options()}
               if isinstance(body, JobRequest) else
               {"parent_id": parent_id, **body.model_dump(mode="json")})
    canonical = json.dumps(content, sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()


def idempotency_key_header(idempotency_key: str | None = Header(
        None, alias="Idempotency-Key",
        description="Retry-safe submission: the same key and body give the same job; the same "
                    "key with another body is a 422. An empty or blank key is a 400.",
        # documented, checked below: a bad key is a 400, not a validation 422
        json_schema_extra={"minLength": 1, "maxLength": MAX_KEY_LENGTH, "pattern": r"\S"})
        ) -> str | None:
    """The request's Idempotency-Key, stripped (400 when blank or too long)."""
    if idempotency_key is None:
        return None
    idempotency_key = idempotency_key.strip()
    if not idempotency_key:
        raise HTTPException(status_code=400, detail="Idempotency-Key must not be empty")
    if len(idempotency_key) > MAX_KEY_LENGTH:
        raise HTTPException(status_code=400, detail=f"Idempotency-Key longer than "
                                                    f"{MAX_KEY_LENGTH} characters")
    return idempotency_key


_SUBMITTED = {200: {"model": JobView, "description": "The job this Idempotency-Key already "
                    "created (same body)"}}


def check_settings(options: dict, read_options: dict | None = None) -> None:
    """The engine's own validation of the settings, before anything is queued (422 on error),
    with the corpus's own reading options (``read_options`` of its upload) under the job's, as
    the worker will merge them: a clash shows now, not as a failed job."""
    from burstlens.search.settings import check_corpus_options, split_settings

    try:
        corpus_options, _ = split_settings(dict(options))
        if read_options:
            check_corpus_options({**read_options, **corpus_options})
    except (ValueError, TypeError) as exc:
        raise HTTPException(status_code=422, detail=f"invalid settings: {exc}") from None


@router.post("", status_code=201, response_model=JobView, operation_id="submitSearch",
             summary="Submit a filterbank search on a corpus",
             responses={**_SUBMITTED, **errors(*COMMON, 400, 404, 429)})
def create_job(body: JobRequest, response: Response, store: StoreDep, settings: SettingsDep,
               tenant: TenantDep,
               idempotency_key: str | None = Depends(idempotency_key_header)) -> JobView:
    """Queue a search on an uploaded corpus. Answered only after the job is committed."""
    options = body.settings.to_options()
    try:
        read_options = store.get_corpus(body.corpus_id, tenant)["summary"].get("read_options")
    except NotFound:
        read_options = None     # create_job answers the 404 below
    check_settings(options, read_options)
    job, created = store.create_job(tenant, body.corpus_id, options,
                                    max_queued=settings.max_queued_jobs,
                                    idempotency_key=idempotency_key,
                                    request_sha256=request_digest(body))
    response.status_code = 201 if created else 200
    response.headers["Location"] = f"/v1/jobs/{job['id']}"
    return JobView.from_job(job)


@router.get("", response_model=JobList, operation_id="listJobs", summary="List this tenant's jobs",
            responses=errors(*COMMON))
def list_jobs(store: StoreDep, tenant: TenantDep,
              state: JobState | None = None, kind: JobKind | None = None,
              limit: int = Query(100, ge=1, le=1000)) -> JobList:
    """This tenant's jobs, newest first, optionally of one state or kind."""
    jobs = store.list_jobs(tenant, state=state, limit=limit, kind=kind)
    return JobList(jobs=[JobView.from_job(j) for j in jobs])


@router.get("/{job_id}", response_model=JobView, operation_id="readJob", summary="Read a job",
            responses=errors(*COMMON, 404))
async def get_job(job_id: str, store: StoreDep, tenant: TenantDep) -> JobView:
    """State, progress (stage, round, evaluations of budget, best objective), attempts, error."""
    # the route pollers hit: served on the event loop (one indexed SQLite read, ~20 µs)
    return JobView.from_job(store.get_job(job_id, tenant))


@router.post("/{job_id}/withdraw", response_model=JobView, operation_id="withdrawJob",
             summary="Withdraw a job", responses=errors(*COMMON, 404, 409))
def withdraw_job(job_id: str, store: StoreDep, tenant: TenantDep) -> JobView:
    """A waiting job is withdrawn at once; a working one stops at its worker's next heartbeat
    (a transform keeps what it wrote, resumable)."""
    return JobView.from_job(store.withdraw_job(job_id, tenant))


@router.post("/{job_id}/checks", status_code=201, response_model=JobView, operation_id="submitCheck",
             summary="Check the search's filterbank on new data",
             responses={**_SUBMITTED, **errors(*COMMON, 400, 404, 409, 429)})
def create_check(job_id: str, body: CheckRequest, response: Response, store: StoreDep,
                 settings: SettingsDep, tenant: TenantDep,
                 idempotency_key: str | None = Depends(idempotency_key_header)) -> JobView:
    """Queue a check of this search's filterbank on a newly uploaded corpus: read as the
    search read its corpus, judged against the new data's best plain spectrogram and a quick
    refit. When done, its summary says `keep` or `retune` and what moved;
    `GET /v1/jobs/{check}/check` has the figures."""
    return _submit_on_site("check", job_id, body, {}, response, store, settings, tenant,
                           idempotency_key)


@router.get("/{job_id}/checks", response_model=JobList, operation_id="listChecks",
            summary="List the checks of a search", responses=errors(*COMMON, 404))
def list_checks(job_id: str, store: StoreDep, tenant: TenantDep,
                limit: int = Query(100, ge=1, le=1000)) -> JobList:
    """This search's checks, newest first."""
    store.get_job(job_id, tenant)
    jobs = store.list_jobs(tenant, limit=limit, kind="check", parent_id=job_id)
    return JobList(jobs=[JobView.from_job(j) for j in jobs])


@router.post("/{job_id}/transforms", status_code=201, response_model=JobView,
             operation_id="submitContinuousTransform",
             summary="Transform continuous records with the search's filterbank",
             responses={**_SUBMITTED, **errors(*COMMON, 400, 404, 409, 429)})
def create_transform(job_id: str, body: TransformJobRequest, response: Response, store: StoreDep,
                     settings: SettingsDep, tenant: TenantDep,
                     idempotency_key: str | None = Depends(idempotency_key_header)) -> JobView:
    """Queue the search's filterbank over every trace of a newly uploaded corpus of continuous
    records (files with UTC start times), whole, into a Zarr store: one group per SEED id and
    part, UTC time and centre-frequency coordinates. `GET /v1/jobs/{transform}/store.zip`
    downloads it when done."""
    return _submit_on_site("transform", job_id, body, {"time_step_s": body.time_step_s},
                           response, store, settings, tenant, idempotency_key)


def _submit_on_site(kind: str, parent_id: str, body: CheckRequest | TransformJobRequest,
                    job_settings: dict, response: Response, store: Store, settings,
                    tenant: str, idempotency_key: str | None) -> JobView:
    job, created = store.create_job(tenant, body.corpus_id, job_settings,
                                    max_queued=settings.max_queued_jobs,
                                    idempotency_key=idempotency_key,
                                    request_sha256=request_digest(body, parent_id),
                                    kind=kind, parent_id=parent_id)
    response.status_code = 201 if created else 200
    response.headers["Location"] = f"/v1/jobs/{job['id']}"
    return JobView.from_job(job)


def _done(store: Store, job_id: str, tenant: str, kind: str = "search") -> dict:
    job = store.get_job(job_id, tenant)
    if job["kind"] != kind:
        raise HTTPException(status_code=409, detail=f"job {job_id!r} is a {job['kind']}; this "
                                                    f"result belongs to a {kind}")
    if job["state"] != "done":
        raise HTTPException(status_code=409, detail=f"job {job_id!r} is {job['state']}; results "
                                                    "exist once it is done")
    return job


def _result(store: Store, job_id: str, tenant: str, what: str) -> Path:
    return store.path(_done(store, job_id, tenant)["result_dir"]) / RESULT_FILES[what]


_JSON_OBJECT = {"content": {"application/json": {"schema": {"type": "object"}}}}


@router.get("/{job_id}/filterbank", response_class=FileResponse, operation_id="fetchFilterbank",
            summary="Fetch a search's filterbank",
            responses={200: {**_JSON_OBJECT, "description": "Filterbank JSON (burstlens-filterbank, "
                             "version 3)"}, **errors(*COMMON, 404, 409)})
def get_filterbank(job_id: str, store: StoreDep, tenant: TenantDep):
    """The tuned filterbank JSON itself (docs/design.md §8), ready for POST /v1/transform or the CLI."""
    return FileResponse(_result(store, job_id, tenant, "filterbank"), media_type="application/json")


@router.get("/{job_id}/diagnostics", response_class=FileResponse, operation_id="fetchDiagnostics",
            summary="Fetch a search's diagnostics",
            responses={200: {**_JSON_OBJECT, "description": "Diagnostics JSON"},
                       **errors(*COMMON, 404, 409)})
def get_diagnostics(job_id: str, store: StoreDep, tenant: TenantDep):
    """Stop reason, every evaluation, convergence, bootstrap intervals, baselines, gain in bits."""
    return FileResponse(_result(store, job_id, tenant, "diagnostics"), media_type="application/json")


@router.get("/{job_id}/report", response_class=HTMLResponse, operation_id="fetchReport",
            summary="Fetch a search's report page",
            responses={200: {"content": {"text/html": {}}, "description": "The search's report page"},
                       **errors(*COMMON, 404, 409)})
def get_report(job_id: str, store: StoreDep, tenant: TenantDep):
    """One self-contained HTML page explaining the result (plots inline), with a section for
    the checks done on later data."""
    path = _result(store, job_id, tenant, "report")
    done_checks = store.list_jobs(tenant, state="done", kind="check", parent_id=job_id, limit=1000)
    if done_checks:  # one page per set of checks: a check that ends later makes a new page
        path = path.with_name(f"report-after-{done_checks[0]['id']}.html")
    if not path.is_file():  # rendered on the first request, then kept
        try:
            from burstlens.service.report import render_report
        except ImportError:
            raise HTTPException(status_code=503,
                                detail="the report renderer is not installed") from None
        checks = _answers(store, done_checks)
        extra = {"checks": checks} if checks else {}
        write_blob(path, render_report(*_load_results(path.parent), **extra).encode("utf-8"))
    return HTMLResponse(path.read_text(encoding="utf-8"))


def _answers(store: Store, done_checks: list[dict]) -> list[dict]:
    """The answers of done checks, in their order: each its ``check.json`` with ``id``,
    ``finished_at`` (UTC, s) and ``files`` (the client's names)."""
    checks = []
    for check in done_checks:
        try:
            answer = json.loads((store.path(check["result_dir"]) / RESULT_FILES["check"]).read_text())
        except (OSError, ValueError, TypeError):
            log.warning("check %s: its answer is unreadable; left out of the report", check["id"])
            continue
        checks.append({**answer, "id": check["id"], "finished_at": check["ended_at"],
                       "files": (check["summary"] or {}).get("files", [])})
    return checks


@router.get("/{job_id}/check", response_class=FileResponse, operation_id="fetchCheck",
            summary="Fetch a check's answer",
            responses={200: {**_JSON_OBJECT, "description": "The check's answer: verdict (keep or "
                             "retune), moved, not_compared, scorecard, refit, figures"},
                       **errors(*COMMON, 404, 409)})
def get_check(job_id: str, store: StoreDep, tenant: TenantDep):
    """The answer of a check that is done, as `burstlens check --json` prints it."""
    job = _done(store, job_id, tenant, kind="check")
    return FileResponse(store.path(job["result_dir"]) / RESULT_FILES["check"],
                        media_type="application/json")


@router.get("/{job_id}/store.zip", response_class=StreamingResponse, operation_id="fetchZarrStore",
            summary="Download a transform's Zarr store",
            responses={200: {"content": {"application/zip": {"schema": {"type": "string",
                                                                        "format": "binary"}}},
                             "description": "The Zarr v3 store as a zip (entries stored, not "
                                            "compressed again)"},
                       **errors(*COMMON, 404, 409)})
def get_store_zip(job_id: str, store: StoreDep, tenant: TenantDep):
    """The Zarr store a transform wrote, streamed as a zip; open it with
    `xarray.open_zarr(zarr.storage.ZipStore(path, mode="r"), group=...)` or unzip it."""
    job = _done(store, job_id, tenant, kind="transform")
    folder = store.path(job["result_dir"]) / ZARR_DIR
    if not folder.is_dir():
        raise HTTPException(status_code=404, detail=f"job {job_id!r} wrote no store")
    return StreamingResponse(zip_stream(folder), media_type="application/zip", headers={
        "Content-Disposition": f'attachment; filename="{job_id}.zarr.zip"'})


def zip_stream(folder: Path, piece_bytes: int = 1 << 20) -> Iterator[bytes]:
    """A zip of every file under ``folder`` (names relative to it), made as it is sent: zipfile
    writes to a non-seekable sink with data descriptors, so nothing is held but one piece."""
    import zipfile

    class Sink(io.RawIOBase):
        def __init__(self):
            self.buffer = bytearray()

        def writable(self) -> bool:
            return True

        def write(self, data) -> int:
            self.buffer += data
            return len(data)

    sink = Sink()
    with zipfile.ZipFile(sink, "w", compression=zipfile.ZIP_STORED, allowZip64=True) as archive:
        for path in sorted(p for p in folder.rglob("*") if p.is_file()):
            with path.open("rb") as source, archive.open(path.relative_to(folder).as_posix(), "w",
                                                         force_zip64=True) as entry:
                while piece := source.read(piece_bytes):
                    entry.write(piece)
                    if len(sink.buffer) >= piece_bytes:
                        yield bytes(sink.buffer)
                        sink.buffer.clear()
    yield bytes(sink.buffer)


def _load_results(folder: Path) -> tuple[dict, dict, object | None, float | None]:
    """Stored filterbank and diagnostics JSON, plus the report's window sample if kept."""
    import numpy as np

    filterbank = FilterbankDocument(json.loads((folder / RESULT_FILES["filterbank"]).read_text()))
    diagnostics = DiagnosticsDocument(json.loads((folder / RESULT_FILES["diagnostics"]).read_text()))
    windows_path = folder / RESULT_FILES["windows"]
    windows = np.load(windows_path, allow_pickle=False) if windows_path.is_file() else None
    return filterbank.data, diagnostics.data, windows, filterbank.sampling_rate_hz


@router.get("/{job_id}/plots/{name}.png", response_class=Response, operation_id="fetchPlot",
            summary="Fetch one plot of a search's report", responses={
    200: {"content": {"image/png": {"schema": {"type": "string", "format": "binary"}}},
          "description": "One plot of the report"}, **errors(*COMMON, 404, 409)})
def get_plot(job_id: str, name: PlotName, store: StoreDep,
             tenant: TenantDep) -> Response:
    """A report plot as PNG: tiling, examples, convergence, channels or baselines."""
    folder = _result(store, job_id, tenant, "filterbank").parent
    path = folder / "plots" / f"{name}.png"
    if not path.is_file():  # drawn on first request, then kept
        try:
            from burstlens.service.report import report_plots
        except ImportError:
            raise HTTPException(status_code=503,
                                detail="the report renderer is not installed") from None
        for plot, png in report_plots(*_load_results(folder)).items():
            write_blob(folder / "plots" / f"{plot}.png", png)
    if not path.is_file():
        raise HTTPException(status_code=404, detail=f"plot {name!r} is not available for this job "
                                                    "(the report omits it; see the report's note)")
    return Response(path.read_bytes(), media_type="image/png")
