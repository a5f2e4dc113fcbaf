"""/v1/jobs: queue a tuning job, watch it, cancel it, fetch its filterbank, diagnostics and report."""
from __future__ import annotations

import hashlib
import json
import logging
from pathlib import Path
from typing import Literal

from fastapi import APIRouter, Depends, Header, HTTPException, Query, Response
from fastapi.responses import FileResponse, HTMLResponse

from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument
from burstlens.service.auth import require_tenant
from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.models import JobList, JobRequest, JobView
from burstlens.service.routers import COMMON, errors
from burstlens.service.store import NotFound, Store, write_blob

log = logging.getLogger("burstlens.api")
router = APIRouter(prefix="/v1/jobs", tags=["jobs"])

MAX_KEY_LENGTH = 255
RESULT_FILES = {"filterbank": "filterbank.json", "diagnostics": "diagnostics.json",
                "report": "report.html", "windows": "windows.npy"}
# the report's plots (service.report.PLOT_NAMES), each served as PNG
PlotName = Literal["tiling", "examples", "convergence", "channels", "baselines"]


def request_digest(body: JobRequest) -> str:
    """sha256 of the request in canonical JSON (key order and spacing do not matter)."""
    canonical = json.dumps({"corpus_id": body.corpus_id, "settings": body.settings.to_options()},
                           sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(canonical.encode()).hexdigest()


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


@router.post("", status_code=201, response_model=JobView,
             responses={200: {"model": JobView, "description": "The job this Idempotency-Key "
                              "already created (same body)"}, **errors(*COMMON, 400, 404, 429)})
def create_job(body: JobRequest, response: Response, store: StoreDep, settings: SettingsDep,
               tenant: str = Depends(require_tenant),
               idempotency_key: str | None = Header(
                   None, alias="Idempotency-Key",
                   description="Retry-safe submission: the same key and body give the same job; "
                               "the same key with another body is a 422. An empty or blank "
                               "key is a 400.",
                   # documented, checked below: a bad key is a 400, not a validation 422
                   json_schema_extra={"minLength": 1, "maxLength": MAX_KEY_LENGTH,
                                      "pattern": r"\S"})) -> JobView:
    """Queue a tuning job on an uploaded corpus. Answered only after the job is committed."""
    if idempotency_key is not None:
        idempotency_key = idempotency_key.strip()
        if not idempotency_key:
            raise HTTPException(status_code=400, detail="Idempotency-Key must not be empty")
        if len(idempotency_key) > MAX_KEY_LENGTH:
            raise HTTPException(status_code=400, detail=f"Idempotency-Key longer than "
                                                        f"{MAX_KEY_LENGTH} characters")
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


@router.get("", response_model=JobList, responses=errors(*COMMON))
def list_jobs(store: StoreDep, tenant: str = Depends(require_tenant),
              state: Literal["queued", "running", "succeeded", "failed", "cancelled"] | None = None,
              limit: int = Query(100, ge=1, le=1000)) -> JobList:
    """This tenant's jobs, newest first."""
    jobs = store.list_jobs(tenant, state=state, limit=limit)
    return JobList(jobs=[JobView.from_job(j) for j in jobs])


@router.get("/{job_id}", response_model=JobView, responses=errors(*COMMON, 404))
def get_job(job_id: str, store: StoreDep, tenant: str = Depends(require_tenant)) -> JobView:
    """State, progress (stage, round, evaluations of budget, best objective), attempts, error."""
    return JobView.from_job(store.get_job(job_id, tenant))


@router.post("/{job_id}/cancel", response_model=JobView, responses=errors(*COMMON, 404, 409))
def cancel_job(job_id: str, store: StoreDep, tenant: str = Depends(require_tenant)) -> JobView:
    """Cancel: a queued job at once; a running one stops at its worker's next heartbeat."""
    return JobView.from_job(store.cancel_job(job_id, tenant))


def _result(store: Store, job_id: str, tenant: str, what: str) -> Path:
    job = store.get_job(job_id, tenant)
    if job["state"] != "succeeded":
        raise HTTPException(status_code=409, detail=f"job {job_id!r} is {job['state']}; results "
                                                    "exist once it has succeeded")
    return Path(job["result_dir"]) / RESULT_FILES[what]


_JSON_OBJECT = {"content": {"application/json": {"schema": {"type": "object"}}}}


@router.get("/{job_id}/filterbank", response_class=FileResponse,
            responses={200: {**_JSON_OBJECT, "description": "Filterbank JSON (burstlens-filterbank, "
                             "version 3)"}, **errors(*COMMON, 404, 409, explicit=True)})
def get_filterbank(job_id: str, store: StoreDep, tenant: str = Depends(require_tenant)):
    """The tuned filterbank JSON itself (DESIGN §8), ready for POST /v1/transform or the CLI."""
    return FileResponse(_result(store, job_id, tenant, "filterbank"), media_type="application/json")


@router.get("/{job_id}/diagnostics", response_class=FileResponse,
            responses={200: {**_JSON_OBJECT, "description": "Diagnostics JSON"},
                       **errors(*COMMON, 404, 409, explicit=True)})
def get_diagnostics(job_id: str, store: StoreDep, tenant: str = Depends(require_tenant)):
    """Stop reason, every evaluation, convergence, bootstrap intervals, baselines, gain in bits."""
    return FileResponse(_result(store, job_id, tenant, "diagnostics"), media_type="application/json")


@router.get("/{job_id}/report", response_class=HTMLResponse,
            responses={200: {"content": {"text/html": {}}, "description": "The job's report page"},
                       **errors(*COMMON, 404, 409, explicit=True)})
def get_report(job_id: str, store: StoreDep, tenant: str = Depends(require_tenant)):
    """One self-contained HTML page explaining the result (plots inline)."""
    path = _result(store, job_id, tenant, "report")
    if not path.is_file():  # rendered at success; render now if that failed or predates it
        try:
            from burstlens.service.report import render_report
        except ImportError:
            raise HTTPException(status_code=503,
                                detail="the report renderer is not installed") from None
        write_blob(path, render_report(*_load_results(path.parent)).encode("utf-8"))
    return HTMLResponse(path.read_text(encoding="utf-8"))


def _load_results(folder: Path) -> tuple[dict, dict, object | None, float | None]:
    """Stored filterbank and diagnostics JSON, plus the report's window sample if kept."""
    import numpy as np

    filterbank = FilterbankDocument(json.loads((folder / RESULT_FILES["filterbank"]).read_text()))
    diagnostics = DiagnosticsDocument(json.loads((folder / RESULT_FILES["diagnostics"]).read_text()))
    windows_path = folder / RESULT_FILES["windows"]
    windows = np.load(windows_path, allow_pickle=False) if windows_path.is_file() else None
    return filterbank.data, diagnostics.data, windows, filterbank.sampling_rate_hz


@router.get("/{job_id}/plots/{name}.png", response_class=Response, responses={
    200: {"content": {"image/png": {"schema": {"type": "string", "format": "binary"}}},
          "description": "One plot of the report"}, **errors(*COMMON, 404, 409, explicit=True)})
def get_plot(job_id: str, name: PlotName, store: StoreDep,
             tenant: str = Depends(require_tenant)) -> Response:
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
