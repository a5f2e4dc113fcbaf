"""The FastAPI application: ``create_app(settings)`` wires store, auth, limits, routers and errors.

Every error leaves as a problem document (RFC 9457, "Problem Details for HTTP APIs", 2023):
``application/problem+json`` with ``type``, ``title``, ``status``, ``detail`` and ``instance``
(422s add ``errors``, one entry per invalid field). A 500 names no internals and carries no stack
trace (the log has it, under the same reference).
"""
from __future__ import annotations

import logging
import math
import sqlite3
import uuid

from http import HTTPStatus

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.openapi.utils import get_openapi
from fastapi.responses import JSONResponse
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.routing import Match

from burstlens.service.config import ServiceSettings
from burstlens.service.corpus_check import CorpusRejected, CorpusTooLarge
from burstlens.service.limits import BodySizeLimit
from burstlens.service.models import Problem
from burstlens.service.routers import PROBLEM_MEDIA_TYPE
from burstlens.service.store import Conflict, IdempotencyMismatch, LeaseLost, NotFound, QueueFull, Store

log = logging.getLogger("burstlens.api")

# the domain's errors and the status each answers with (routes raise them as they are;
# QueueFull, a 429 with Retry-After, has a handler of its own)
_DOMAIN_STATUS = {NotFound: 404, Conflict: 409, LeaseLost: 409,
                 IdempotencyMismatch: 422, CorpusRejected: 422, CorpusTooLarge: 413}

DESCRIPTION = """\
Tune a Gaussian-smoothed Wigner–Ville filterbank to a site's unlabeled microseismic corpus, then
apply it to new data.

Typical use: `POST /v1/corpora` (multipart `files`) → `POST /v1/jobs` with the corpus id and
settings → poll `GET /v1/jobs/{id}` until its state is `done` → `GET /v1/jobs/{id}/filterbank`.
Later: `POST /v1/jobs/{id}/checks` (does the filterbank still fit new data?) and
`POST /v1/jobs/{id}/transforms` (the filterbank over continuous records, into a Zarr store).
Authenticate with `Authorization: Bearer TOKEN` (tokens come from `burstlens tokens add NAME`).
Errors are problem documents (RFC 9457, `application/problem+json`: `type`, `title`, `status`,
`detail`).
"""


def problem_response(status: int, detail: str, request: Request | None = None,
                     headers: dict | None = None, errors: list | None = None) -> JSONResponse:
    """A problem document (RFC 9457) for ``status``, its title the status's reason phrase."""
    try:
        title = HTTPStatus(status).phrase
    except ValueError:
        title = "Error"
    body: dict = {"type": "about:blank", "title": title, "status": status, "detail": detail}
    if request is not None:
        body["instance"] = request.url.path
    if errors is not None:
        body["errors"] = errors
    return JSONResponse(body, status_code=status, headers=headers, media_type=PROBLEM_MEDIA_TYPE)


def _field_errors(exc: RequestValidationError) -> tuple[str, list[dict]]:
    fields, parts = [], []
    for err in exc.errors():
        loc = [str(x) for x in err.get("loc", ()) if x not in ("body",)]
        where = ".".join(loc) or "body"
        reason = err.get("msg", "invalid")
        if err.get("type") == "extra_forbidden":
            reason = "unknown key (not a setting)"
        elif err.get("type") == "json_invalid":
            where = "body"
            reason = f"not valid JSON ({(err.get('ctx') or {}).get('error', 'decode error')}, " \
                     f"at character {err.get('loc', ('', '?'))[-1]})"
        fields.append({"field": where, "reason": reason})
        parts.append(f"{where}: {reason}")
    return "invalid request: " + "; ".join(parts), fields


_METHODS = ("GET", "HEAD", "POST", "PUT", "PATCH", "DELETE", "OPTIONS")


def _allowed_methods(request: Request) -> str:
    """Every method some route serves on this path: the router's own 405 names only the first
    route whose path matched, and a path served by several routes (GET and DELETE of a corpus)
    must list them all (RFC 9110 §15.5.6: a 405 carries Allow with the supported methods)."""
    allowed = [method for method in _METHODS
               if any(route.matches({**request.scope, "method": method})[0] == Match.FULL
                      for route in request.app.router.routes)]
    return ", ".join(allowed)


def install_error_handlers(app: FastAPI) -> None:
    @app.exception_handler(StarletteHTTPException)
    async def _http(request: Request, exc: StarletteHTTPException):
        headers = dict(getattr(exc, "headers", None) or {})
        if exc.status_code == 405:
            headers["Allow"] = _allowed_methods(request)
        return problem_response(exc.status_code, str(exc.detail), request, headers=headers or None)

    @app.exception_handler(RequestValidationError)
    async def _validation(request: Request, exc: RequestValidationError):
        message, fields = _field_errors(exc)
        return problem_response(422, message, request, errors=fields)

    for cls, status in _DOMAIN_STATUS.items():
        def make(status):
            async def _store(request: Request, exc: Exception):
                return problem_response(status, str(exc), request)
            return _store
        app.add_exception_handler(cls, make(status))

    @app.exception_handler(QueueFull)
    async def _queue_full(request: Request, exc: QueueFull):
        # a place frees when a worker claims a waiting job, which an idle worker tries every
        # poll_s; a 429 may say when to retry (RFC 6585 §4), in whole seconds (RFC 9110 §10.2.3)
        retry_after = max(1, math.ceil(request.app.state.settings.poll_s))
        return problem_response(429, str(exc), request, headers={"Retry-After": str(retry_after)})

    @app.exception_handler(sqlite3.OperationalError)
    async def _store_unavailable(request: Request, exc: sqlite3.OperationalError):
        text = str(exc).lower()
        if "full" in text:
            return problem_response(507, "the server's disk is full; nothing was stored", request)
        if "locked" in text or "busy" in text:
            return problem_response(503, "the job store is busy; retry shortly", request,
                                    headers={"Retry-After": "1"})
        return await _internal(request, exc)

    @app.exception_handler(Exception)
    async def _internal(request: Request, exc: Exception):
        ref = uuid.uuid4().hex[:12]
        log.exception("internal error %s on %s %s", ref, request.method, request.url.path)
        return problem_response(500, f"internal server error (reference {ref} in the server log)",
                                request)


def create_app(settings: ServiceSettings | None = None) -> FastAPI:
    """Build the API over ``settings.data_dir`` (creating the store if it does not exist).

    The app keeps its settings and store on ``app.state``; routes take them through
    ``service.dependencies`` (``get_settings``, ``get_store``), which tests override."""
    from burstlens.search import __version__
    from burstlens.service.routers import corpora, health, jobs, transform

    settings = settings or ServiceSettings()
    store = Store(settings.data_dir)
    store.sweep()
    app = FastAPI(title="burstlens", version=__version__, description=DESCRIPTION,
                  openapi_url="/openapi.json", docs_url=None, redoc_url=None)
    app.state.settings = settings
    app.state.store = store
    install_error_handlers(app)
    app.include_router(health.router)
    app.include_router(corpora.router)
    app.include_router(jobs.router)
    app.include_router(transform.router)
    app.add_middleware(BodySizeLimit, max_body_bytes=settings.max_body_bytes)
    app.openapi = lambda: _openapi(app)
    return app


def _openapi(app: FastAPI) -> dict:
    """The OpenAPI document, built once, with the ``Problem`` schema every error refers to."""
    if app.openapi_schema is None:
        document = get_openapi(title=app.title, version=app.version,
                               description=app.description, routes=app.routes)
        schemas = document.setdefault("components", {}).setdefault("schemas", {})
        problem = Problem.model_json_schema(ref_template="#/components/schemas/{model}")
        schemas.update(problem.pop("$defs", {}))
        schemas["Problem"] = problem
        app.openapi_schema = document
    return app.openapi_schema

