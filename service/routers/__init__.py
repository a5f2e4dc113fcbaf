"""API routers, one per resource: corpora, jobs, transform, health (plus the jobs page)."""
from __future__ import annotations

PROBLEM_MEDIA_TYPE = "application/problem+json"
_PROBLEM = {PROBLEM_MEDIA_TYPE: {"schema": {"$ref": "#/components/schemas/Problem"}}}

_TEXT = {400: "Bad request", 401: "Missing or invalid bearer token", 404: "Not found (or "
         "another tenant's)", 405: "Method not allowed", 409: "Conflict with the resource's state",
         413: "Too large", 415: "Unsupported media type", 422: "Invalid input (the detail names "
         "the field)", 429: "Too many requests (waiting jobs or failed sign-ins); see Retry-After",
         500: "Internal error", 503: "Not available", 507: "Insufficient storage"}


def errors(*codes: int) -> dict:
    """OpenAPI ``responses`` entries for the error codes a route can answer: each a problem
    document (RFC 9457) under ``application/problem+json``; the schema ``Problem`` is added to
    the document's components by ``service.app``."""
    return {code: {"description": _TEXT[code], "content": _PROBLEM} for code in codes}


# every /v1 route can answer these (503: store busy, 507: disk full)
COMMON = (401, 413, 422, 500, 503, 507)
