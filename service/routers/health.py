"""Liveness (GET /v1/health), Prometheus metrics and the jobs page for people (GET /)."""
from __future__ import annotations

from pathlib import Path

from fastapi import APIRouter, HTTPException
from fastapi.responses import FileResponse, PlainTextResponse

from burstlens.search import __version__
from burstlens.service.auth import auth_required
from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.models import Health
from burstlens.service.routers import errors

router = APIRouter(tags=["health"])

STATIC = Path(__file__).resolve().parent.parent / "static"


@router.get("/v1/health", response_model=Health, operation_id="readHealth",
            summary="Whether the API and its store answer", responses=errors(500, 503))
def health(store: StoreDep, settings: SettingsDep) -> Health:
    """The API is up and its store answers."""
    store.counts_by_state()
    return Health(status="ok", version=__version__,
                  auth=auth_required(store, settings.tokens_required))


@router.get("/metrics", response_class=PlainTextResponse, operation_id="readMetrics",
            summary="Service metrics in Prometheus text format", responses={
    200: {"content": {"text/plain": {"example": 'burstlens_jobs{state="waiting"} 2\n'}}},
    **errors(500, 503)})
def metrics(store: StoreDep) -> PlainTextResponse:
    """Prometheus text format: jobs by state, evaluations done and their throughput, and the
    last check of each search (verdict and time)."""
    counts = store.counts_by_state()
    total, rate = store.evaluation_totals(window_s=60.0)
    lines = ["# HELP burstlens_jobs Jobs in the store by state.", "# TYPE burstlens_jobs gauge"]
    lines += [f'burstlens_jobs{{state="{state}"}} {n}' for state, n in counts.items()]
    lines += ["# HELP burstlens_evaluations_total Candidate filterbank evaluations done.",
              "# TYPE burstlens_evaluations_total counter", f"burstlens_evaluations_total {total}",
              "# HELP burstlens_evaluations_per_second Evaluations per second over the last 60 s.",
              "# TYPE burstlens_evaluations_per_second gauge",
              f"burstlens_evaluations_per_second {rate:.6g}",
              "# HELP burstlens_workers_busy Workers holding a live lease.",
              "# TYPE burstlens_workers_busy gauge", f"burstlens_workers_busy {store.live_workers()}"]
    lines += check_gauges(store.last_checks())
    return PlainTextResponse("\n".join(lines) + "\n",
                             media_type="text/plain; version=0.0.4; charset=utf-8")


def check_gauges(last_checks: list[dict]) -> list[str]:
    """Two gauges per search with a check that is done: its latest check's verdict (1 keep,
    0 re-tune) and when that check ended (UTC, s), labelled with the search's id (and the
    check's id on the verdict)."""
    if not last_checks:
        return []
    lines = ["# HELP burstlens_check_keep Latest check of a search's filterbank on new data: "
             "1 keep, 0 re-tune.", "# TYPE burstlens_check_keep gauge"]
    lines += [f'burstlens_check_keep{{job="{c["parent_id"]}",check="{c["id"]}"}} '
              f'{1 if c["summary"].get("verdict") == "keep" else 0}' for c in last_checks]
    lines += ["# HELP burstlens_check_ended_seconds When the latest check of a search ended, "
              "UTC seconds since 1970.", "# TYPE burstlens_check_ended_seconds gauge"]
    lines += [f'burstlens_check_ended_seconds{{job="{c["parent_id"]}"}} {c["ended_at"]:.3f}'
              for c in last_checks]
    return lines


@router.get("/", response_class=FileResponse, include_in_schema=False)
def index() -> FileResponse:
    """The jobs page: a static page that calls the /v1 API from the browser."""
    page = STATIC / "index.html"
    if not page.is_file():
        raise HTTPException(status_code=503, detail="the jobs page is not installed")
    return FileResponse(page, media_type="text/html; charset=utf-8")
