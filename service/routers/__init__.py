"""API routers, one per resource: corpora, jobs, transform, health (plus the jobs page)."""
from __future__ import annotations

from burstlens.service.models import ErrorResponse


def errors(*codes: int, explicit: bool = False) -> dict:
    """OpenAPI ``responses`` entries for the error codes a route can answer.

    ``explicit``: for routes whose success is not JSON (HTML, NPZ, files), where FastAPI would
    document the error model under the success media type; errors are always JSON.
    """
    text = {400: "Bad request", 401: "Missing or invalid bearer token", 404: "Not found "
            "(or another tenant's)", 409: "Conflict with the resource's state", 413: "Too large",
            415: "Unsupported media type", 422: "Invalid input (the message names the field)",
            429: "Too many queued jobs", 500: "Internal error", 503: "Not available",
            507: "Insufficient storage"}
    if explicit:
        json_error = {"application/json": {"schema": {"$ref": "#/components/schemas/ErrorResponse"}}}
        return {code: {"description": text[code], "content": json_error} for code in codes}
    return {code: {"model": ErrorResponse, "description": text[code]} for code in codes}


# every /v1 route can answer these (503: store busy, 507: disk full)
COMMON = (401, 413, 422, 500, 503, 507)
