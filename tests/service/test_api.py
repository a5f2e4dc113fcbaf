"""The /v1 API in process: corpora, job submission, idempotency, validation, errors, metrics."""
from __future__ import annotations

from http import HTTPStatus

import os

from burstlens.service.testing import TINY, corpus_files

from burstlens.service.dependencies import get_store


def _upload(client, count=2, seed=0):
    response = client.post("/v1/corpora", files=corpus_files(count, seed))
    assert response.status_code == 201, response.text
    return response.json()


def test_corpus_upload_is_checked_and_described(make_client, tmp_path):
    """An upload answers with its id after the corpus reader has read it: windows found, the
    sampling rate, and the client's file names (only for display; common practice)."""
    client = make_client()
    corpus = _upload(client)
    assert corpus["summary"]["n_windows"] > 0
    assert corpus["summary"]["sampling_rate_hz"] == 1000.0
    assert [f["name"] for f in corpus["files"]] == ["trace0.npz", "trace1.npz"]
    assert client.get(f"/v1/corpora/{corpus['id']}").json() == corpus


def test_uploaded_file_names_are_never_paths(make_client, tmp_path):
    """A file named with '..' or '/' is stored under a server-chosen name inside the corpus
    folder; nothing is written outside it (OWASP, "Unrestricted File Upload": never use the
    client's file name as a path)."""
    client = make_client()
    files = corpus_files(1)
    name, body, kind = files[0][1]
    response = client.post("/v1/corpora", files=[("files", ("../../../escape.npz", body, kind))])
    assert response.status_code == 201, response.text
    corpus = response.json()
    assert corpus["files"][0]["name"] == "escape.npz"
    stored = os.listdir(tmp_path / "data" / "blobs" / "corpora" / corpus["id"])
    assert stored == ["0000.npz"]
    assert not list(tmp_path.rglob("escape.npz"))


def test_rejected_upload_leaves_nothing(make_client, tmp_path):
    """A file the reader cannot read is a 422 naming the client's file, and no trace of the
    upload stays on disk or in the store (docs/design.md §6: nothing half-ingested is kept)."""
    client = make_client()
    good = corpus_files(1)[0]
    response = client.post("/v1/corpora", files=[good, ("files", ("junk.sac", b"\x00\x01" * 400,
                                                                    "application/octet-stream"))])
    assert response.status_code == 422
    message = response.json()["detail"]
    assert "junk.sac" in message and str(tmp_path) not in message
    data = tmp_path / "data"
    assert os.listdir(data / "tmp") == [] and os.listdir(data / "blobs" / "corpora") == []


def test_delete_corpus(make_client):
    """DELETE removes the corpus (then 404), and is refused with 409 while a queued job uses it
    (docs/design.md §7; RFC 9110 §15.5.10, 409 Conflict)."""
    client = make_client()
    corpus = _upload(client)
    job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}).json()
    assert client.delete(f"/v1/corpora/{corpus['id']}").status_code == 409
    client.post(f"/v1/jobs/{job['id']}/withdraw")
    assert client.delete(f"/v1/corpora/{corpus['id']}").status_code == 204
    assert client.get(f"/v1/corpora/{corpus['id']}").status_code == 404


def test_job_is_queued_and_listed(make_client):
    """POST /v1/jobs answers 201 with id, state, progress, attempts and error (docs/design.md §7)."""
    client = make_client()
    corpus = _upload(client)
    response = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY})
    assert response.status_code == 201
    job = response.json()
    assert {"id", "state", "progress", "attempts", "error"} <= set(job)
    assert job["state"] == "waiting" and job["attempts"] == 0 and job["error"] is None
    assert response.headers["location"] == f"/v1/jobs/{job['id']}"
    listed = client.get("/v1/jobs").json()["jobs"]
    assert [j["id"] for j in listed] == [job["id"]]
    assert client.get("/v1/jobs", params={"state": "working"}).json()["jobs"] == []


def test_idempotency_key(make_client):
    """Same key and body → the same job (200); same key, other body → 422; empty key → 400
    (IETF draft "The Idempotency-Key HTTP Header Field")."""
    client = make_client()
    corpus = _upload(client)
    body = {"corpus_id": corpus["id"], "settings": TINY}
    first = client.post("/v1/jobs", json=body, headers={"Idempotency-Key": "order-1"})
    again = client.post("/v1/jobs", json=body, headers={"Idempotency-Key": "order-1"})
    assert (first.status_code, again.status_code) == (201, 200)
    assert first.json()["id"] == again.json()["id"]
    other = client.post("/v1/jobs", json={**body, "settings": {**TINY, "seed": 99}},
                        headers={"Idempotency-Key": "order-1"})
    assert other.status_code == 422 and "Idempotency-Key" in other.json()["detail"]
    assert client.post("/v1/jobs", json=body, headers={"Idempotency-Key": ""}).status_code == 400
    assert len(client.get("/v1/jobs").json()["jobs"]) == 1


def test_unknown_setting_is_named(make_client):
    """Unknown keys in settings are a 422 whose message names each of them (docs/design.md §7)."""
    client = make_client()
    corpus = _upload(client)
    response = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                             "settings": {"chanels": 8, "bogus": 1}})
    assert response.status_code == 422
    message = response.json()["detail"]
    assert "settings.chanels" in message and "settings.bogus" in message


def test_invalid_setting_values(make_client):
    """Out-of-range values are a 422 naming the field, including the engine's own checks
    (bootstrap = 1 is refused by search.settings)."""
    client = make_client()
    corpus = _upload(client)
    for settings, field in (({"band_hz": [500, 100]}, "band_hz"), ({"channels": 0}, "channels"),
                            ({"bootstrap": 1}, "bootstrap"), ({"cell_area": [0, 2]}, "cell_area")):
        response = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": settings})
        assert response.status_code == 422, settings
        assert field in response.json()["detail"]


def test_the_api_takes_every_criterion_field_the_engine_does(make_client):
    """The criterion of POST /v1/jobs has the engine's fields, no fewer (a setting keeps one
    name from the command line to the report, docs/design.md §7): ``reduce`` is accepted and
    recorded, and a reducer the engine lacks is a 422 naming it."""
    from burstlens.search.criteria_options import CRITERION_DEFAULTS
    from burstlens.service.models import CriterionSettings

    assert set(CriterionSettings.model_fields) == set(CRITERION_DEFAULTS)
    client = make_client()
    corpus = _upload(client)
    criterion = {"name": "renyi", "reduce": "median"}
    response = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                             "settings": {**TINY, "criterion": criterion}})
    assert response.status_code == 201, response.text
    assert response.json()["settings"]["criterion"] == criterion
    wrong = client.post("/v1/jobs", json={"corpus_id": corpus["id"],
                                          "settings": {**TINY, "criterion": {"reduce": "mode"}}})
    assert wrong.status_code == 422 and "reduce" in wrong.json()["detail"]


def test_job_takes_the_corpus_options(make_client):
    """A job's settings take every corpus option by its CLI name in snake_case (docs/design.md §7): a job
    with sta_s is accepted and records it; an out-of-range trigger_on, or one that leaves the
    default off threshold above it, is a 422 naming the setting."""
    client = make_client()
    corpus = _upload(client)
    settings = {**TINY, "sta_s": 0.02, "lta_s": 0.5, "bandpass_hz": [10, 400], "components": "z"}
    response = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": settings})
    assert response.status_code == 201, response.text
    assert response.json()["settings"] == {**settings, "sta_s": 0.02, "bandpass_hz": [10.0, 400.0],
                                           "components": "Z"}
    for bad, field in (({"trigger_on": -2}, "trigger_on"), ({"trigger_on": 1.2}, "trigger_off"),
                       ({"trigger": "fastest"}, "trigger"), ({"pre_trigger": 1}, "pre_trigger")):
        response = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": bad})
        assert response.status_code == 422, bad
        assert field in response.json()["detail"]


def test_upload_takes_the_corpus_options_and_records_them(make_client, tmp_path):
    """POST /v1/corpora takes the corpus options as form fields (text; a band as LO,HI): the
    upload check reads the corpus with them, the corpus records them as read_options (what jobs
    on it use unless their settings override) and its defaults say they were given. A bad one
    is a 422 naming it, and leaves nothing behind."""
    from burstlens.search.corpus.ingest import DEFAULT_TRIGGER, TRIGGERS

    kind = next(k for k in TRIGGERS if k != DEFAULT_TRIGGER)
    client = make_client()
    fields = {"sta_s": "0.02", "lta_s": "0.5", "trigger_on": "3", "trigger": kind,
              "bandpass_hz": "10,400", "max_windows": "40"}
    response = client.post("/v1/corpora", files=corpus_files(2), data=fields)
    assert response.status_code == 201, response.text
    summary = response.json()["summary"]
    recorded = {"sta_s": 0.02, "lta_s": 0.5, "trigger_on": 3.0, "trigger": kind,
                "bandpass_hz": [10.0, 400.0], "max_windows": 40}
    assert summary["read_options"] == summary["defaults"]["given"] == recorded
    assert summary["defaults"]["sta_s"] == 0.02 and summary["defaults"]["trigger"] == kind
    assert summary["defaults"]["sta_source"] == "given"
    data = tmp_path / "data"
    before = sorted(os.listdir(data / "blobs" / "corpora"))
    for bad, field in (({"trigger_on": "high"}, "trigger_on"), ({"bandpass_hz": "400,10"},
                                                                "bandpass_hz"),
                       ({"sta_s": "0.5", "lta_s": "0.1"}, "sta_s")):
        response = client.post("/v1/corpora", files=corpus_files(1), data=bad)
        assert response.status_code == 422, bad
        assert field in response.json()["detail"]
    assert sorted(os.listdir(data / "blobs" / "corpora")) == before and os.listdir(data / "tmp") == []
    # a job whose settings clash with the upload's options is refused now, not failed later
    corpus_id = client.post("/v1/corpora", files=corpus_files(2),
                           data={"trigger_on": "3"}).json()["id"]
    clash = client.post("/v1/jobs", json={"corpus_id": corpus_id,
                                          "settings": {**TINY, "trigger_off": 3.5}})
    assert clash.status_code == 422 and "trigger_off" in clash.json()["detail"]


def test_unknown_ids_are_404(make_client):
    """Unknown corpus and job ids answer 404 with a JSON error (docs/design.md §7)."""
    client = make_client()
    assert client.post("/v1/jobs", json={"corpus_id": "nope"}).status_code == 404
    for path in ("/v1/jobs/nope", "/v1/jobs/nope/filterbank", "/v1/corpora/nope"):
        response = client.get(path)
        assert response.status_code == 404 and "nope" in response.json()["detail"]
    assert client.post("/v1/jobs/nope/withdraw").status_code == 404


def test_results_before_success_are_409(make_client):
    """A queued job has no filterbank yet: 409 saying its state (RFC 9110 §15.5.10)."""
    client = make_client()
    corpus = _upload(client)
    job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}).json()
    for what in ("filterbank", "diagnostics", "report"):
        response = client.get(f"/v1/jobs/{job['id']}/{what}")
        assert response.status_code == 409 and "waiting" in response.json()["detail"]


def test_cancel_queued_job(make_client):
    """Cancelling a queued job ends it at once; cancelling it again is a 409 (docs/design.md §7)."""
    client = make_client()
    corpus = _upload(client)
    job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}).json()
    cancelled = client.post(f"/v1/jobs/{job['id']}/withdraw").json()
    assert cancelled["state"] == "withdrawn"
    assert client.post(f"/v1/jobs/{job['id']}/withdraw").status_code == 409


def test_internal_errors_carry_no_stack_trace(make_client):
    """An unexpected exception becomes a JSON 500 with a reference, never a traceback
    (OWASP, "Improper Error Handling")."""
    client = make_client()

    class BrokenStore:
        def list_jobs(self, *args, **kwargs):
            raise RuntimeError("secret internal detail")

    client.app.dependency_overrides[get_store] = BrokenStore
    response = client.get("/v1/jobs")
    assert response.status_code == 500
    text = response.text
    assert "Traceback" not in text and "secret internal detail" not in text
    assert "reference" in response.json()["detail"]


def test_errors_are_problem_documents_everywhere(make_client):
    """Unknown routes, wrong methods, bad bodies and missing resources all answer a problem
    document: media type application/problem+json, members type, title, status (equal to the
    response's status) and detail (RFC 9457, Nottingham, Wilde and Dalal, 2023, §3.1 and §6.1)."""
    client = make_client()
    for response in (client.get("/v1/nothing"), client.put("/v1/jobs"),
                     client.post("/v1/jobs", json={"corpus_id": ""}),
                     client.get("/v1/jobs/nope")):
        assert response.status_code in (404, 405, 422)
        assert response.headers["content-type"].split(";")[0] == "application/problem+json"
        body = response.json()
        assert set(body) >= {"type", "title", "status", "detail"}
        assert body["status"] == response.status_code and body["type"] == "about:blank"
        assert body["title"] == HTTPStatus(response.status_code).phrase  # the reason phrase


def test_wrong_method_lists_every_allowed_method(make_client):
    """A 405 carries Allow with every method the path supports, also where several routes share
    the path (RFC 9110 §15.5.6, 405 Method Not Allowed: the origin server MUST generate an
    Allow header field listing the target resource's supported methods)."""
    client = make_client()
    corpus = _upload(client)
    for path, expected in ((f"/v1/corpora/{corpus['id']}", {"GET", "DELETE"}),
                           ("/v1/jobs", {"GET", "POST"}), ("/v1/corpora", {"POST"})):
        response = client.put(path)
        assert response.status_code == 405, path
        assert {m.strip() for m in response.headers["allow"].split(",")} == expected, path
        assert response.json()["status"] == 405


def test_metrics_and_health(make_client):
    """/metrics is Prometheus text with jobs by state and evaluation counters (Prometheus
    "Exposition formats", text format 0.0.4); /v1/health answers ok."""
    client = make_client()
    corpus = _upload(client)
    client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY})
    text = client.get("/metrics").text
    assert 'burstlens_jobs{state="waiting"} 1' in text
    assert "# TYPE burstlens_evaluations_total counter" in text
    assert "burstlens_evaluations_per_second" in text
    assert client.get("/v1/health").json()["status"] == "ok"


def test_jobs_page_is_served(make_client):
    """GET / serves the jobs page for people as HTML (docs/design.md §7)."""
    response = make_client().get("/")
    assert response.status_code == 200
    assert response.headers["content-type"].startswith("text/html")
    assert "/v1/jobs" in response.text


def test_store_trouble_is_503_or_507(make_client):
    """SQLite answering "database is locked" past its busy timeout is a 503 with Retry-After;
    "database or disk is full" is a 507 (RFC 9110 §15.6.4, RFC 4918 §11.5)."""
    import sqlite3

    client = make_client()
    for text, status, retry in (("database is locked", 503, "1"),
                                ("database or disk is full", 507, None)):
        class FailingStore:
            """Every store call (the token check included) meets the SQLite error."""

            def __getattr__(self, name, text=text):
                def fail(*args, **kwargs):
                    raise sqlite3.OperationalError(text)
                return fail

        client.app.dependency_overrides[get_store] = FailingStore
        response = client.get("/v1/jobs")
        assert response.status_code == status
        assert response.headers.get("retry-after") == retry
        assert response.json()["detail"]
