"""Property-based checks of the API against its own OpenAPI document (schemathesis).

Every operation is called with generated requests; no answer may be a 5xx, and every answer's
status code, content type, headers and body must be the ones the document declares.
"""
from __future__ import annotations

import atexit
import shutil
import tempfile
from pathlib import Path

import schemathesis
from hypothesis import HealthCheck, settings
from schemathesis.checks import (content_type_conformance, not_a_server_error,
                                 response_headers_conformance, response_schema_conformance,
                                 status_code_conformance)

from burstlens.service.testing import TINY, corpus_files, settings_for

CHECKS = [not_a_server_error, status_code_conformance, content_type_conformance,
          response_headers_conformance, response_schema_conformance]


def _seeded_app(data_dir):
    """The app over a fresh store holding one corpus and one queued job."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app

    app = create_app(settings_for(data_dir, max_queued_jobs=1000))
    with TestClient(app) as client:
        corpus = client.post("/v1/corpora", files=corpus_files(1)).json()
        client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY})
    return app


# Built at collection (schemathesis parametrizes from the document); removed at exit, also
# when the test itself is deselected.
DATA_DIR = Path(tempfile.mkdtemp(prefix="burstlens-schema-"))
atexit.register(shutil.rmtree, DATA_DIR, True)
schema = schemathesis.openapi.from_asgi("/openapi.json", _seeded_app(DATA_DIR))


@schema.parametrize()
@settings(max_examples=30, deadline=None, derandomize=True, database=None,
          suppress_health_check=list(HealthCheck))
def test_api_conforms_to_its_openapi(case):
    """No generated request gets a 5xx, and each response matches the declared status codes,
    media types, headers and schemas (schemathesis, property-based testing of OpenAPI
    documents; OpenAPI Specification 3.1)."""
    case.call_and_validate(checks=CHECKS)


def test_every_operation_has_its_own_id_summary_and_problem_errors():
    """Every operation of the document has an explicit operationId in our own camelCase (never
    the framework's generated `name_path_method` form, which contains underscores), a summary,
    and declares each 4xx/5xx answer as a problem document under application/problem+json with
    the `Problem` schema (RFC 9457, Nottingham, Wilde and Dalal, 2023, §3 and §6.1)."""
    document = schema.raw_schema
    problem = document["components"]["schemas"]["Problem"]
    assert set(problem["required"]) >= {"title", "status", "detail"}
    ids = []
    for path, item in document["paths"].items():
        for method, operation in item.items():
            where = f"{method.upper()} {path}"
            assert operation.get("summary"), f"{where}: no summary"
            op_id = operation.get("operationId", "")
            assert op_id and "_" not in op_id and op_id[0].islower(), f"{where}: id {op_id!r}"
            ids.append(op_id)
            for status, answer in operation["responses"].items():
                if status[0] in "45":
                    content = answer.get("content", {})
                    assert list(content) == ["application/problem+json"], f"{where} {status}"
                    assert content["application/problem+json"]["schema"] == {
                        "$ref": "#/components/schemas/Problem"}, f"{where} {status}"
    assert len(ids) == len(set(ids))
