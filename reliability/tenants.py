"""Experiment 5 — tenants: every route tried with another tenant's ids and with bad credentials.

Promise (docs/design.md §7): every corpus and job belongs to the token's tenant and another tenant gets
404 (exactly as for an id that does not exist, so there is no existence oracle: OWASP API
Security Top 10, "Broken Object Level Authorization"); a missing, wrong or revoked token is a
401 carrying ``WWW-Authenticate: Bearer`` (RFC 6750 §3); Idempotency-Keys are scoped to the
tenant.

Method: tokens are made with ``burstlens tokens add`` (alice, bob, and a second token of alice's
that is revoked with ``burstlens tokens revoke`` while the server runs, after it was shown to
work). Alice uploads a corpus under a distinctive file name and has a done, a working and a
queued job. Then every route of ``/openapi.json`` (plus the HTML pages) is called with alice's ids
by bob, with no token, a wrong token, alice's revoked token, a non-Bearer scheme and an empty
Bearer. A leak is any answer that lets the caller past the check (bob: anything but 404 on
alice's ids, or alice's ids in a listing; bad credentials: anything but 401 with the challenge on
/v1), any answer carrying one of alice's secrets (ids, file name, token) that the request did not
itself carry, a 404 for alice's id that differs from the 404 for an unknown id, or any change to
alice's resources.
"""
from __future__ import annotations

import json
import secrets
import tempfile
import time
from pathlib import Path

import httpx

from reliability.harness import (FINAL, SMALL, burst_npz, cli_token, corpus_files, LiveServer,
                                 remove_tree, Row, wait_until)

GOAL = "0 leaks; 401 always with WWW-Authenticate: Bearer"
LONG_JOB = {"channels": 4, "evaluations": 5000, "time_limit_s": 600, "refine": False,
            "bootstrap": 0, "seed": 9, "window_s": 0.128}
SECRET_NAME = "alice-private-site-7.npz"


def _request_for(method: str, template: str, ids: dict) -> dict:
    """httpx keyword arguments for one route with alice's ids filled in."""
    path = template
    for name, value in ids.items():
        path = path.replace("{" + name + "}", value)
    kw: dict = {"method": method, "url": path}
    if (method, template) == ("POST", "/v1/corpora"):
        kw["files"] = corpus_files(1, seed=3)
    elif (method, template) == ("POST", "/v1/jobs"):
        kw["json"] = {"corpus_id": ids["corpus_id"], "settings": SMALL}
    elif (method, template) in (("POST", "/v1/jobs/{job_id}/checks"),
                                ("POST", "/v1/jobs/{job_id}/transforms")):
        kw["json"] = {"corpus_id": ids["corpus_id"]}
    elif (method, template) == ("POST", "/v1/transform"):
        kw["data"] = {"job_id": ids["job_id"]}
        kw["files"] = corpus_files(1, seed=4)
    return kw


def _other_path_values(schema: dict) -> dict:
    """A valid value for every path parameter that is not an id (the first of its enum)."""
    values = {}
    for ops in schema["paths"].values():
        for op in ops.values():
            for param in op.get("parameters", []) if isinstance(op, dict) else []:
                if param.get("in") != "path" or param["name"] in ("corpus_id", "job_id"):
                    continue
                node = param.get("schema", {})
                for _ in range(5):  # follow $ref into components
                    if "$ref" not in node:
                        break
                    target = schema
                    for key in node["$ref"].lstrip("#/").split("/"):
                        target = target[key]
                    node = target
                options = node.get("enum") or [o.get("const") for o in node.get("anyOf", [])
                                               if "const" in o] or ["x"]
                values[param["name"]] = str(options[0])
    return values


def run(time_budget_s: float = 240.0) -> list[Row]:
    tmp = Path(tempfile.mkdtemp(prefix="bl-tenant-"))
    data = tmp / "data"
    started = time.monotonic()
    details: list[str] = []
    tried = leaks = challenge_missing = 0
    server = None
    try:
        alice = cli_token(data, "add", "alice")
        alice_old = cli_token(data, "add", "alice-laptop", "--tenant", "alice")
        bob = cli_token(data, "add", "bob")
        server = LiveServer(data, workers=1, BURSTLENS_AUTH_FAILURES_ALLOWED="1000000").start()
        as_alice = {"Authorization": f"Bearer {alice}"}
        client = httpx.Client(base_url=server.url, timeout=60.0)

        # alice's resources
        response = client.post("/v1/corpora", headers=as_alice, files=[
            ("files", (SECRET_NAME, burst_npz(11), "application/octet-stream"))])
        response.raise_for_status()
        corpus_id = response.json()["id"]

        def submit(settings, key=None):
            headers = dict(as_alice, **({"Idempotency-Key": key} if key else {}))
            response = client.post("/v1/jobs", headers=headers,
                                   json={"corpus_id": corpus_id, "settings": settings})
            response.raise_for_status()
            return response.json()["id"]

        done_job = submit(SMALL, key="alice-key-1")
        wait_until(lambda: client.get(f"/v1/jobs/{done_job}", headers=as_alice).json()["state"]
                   in FINAL, 180)
        if client.get(f"/v1/jobs/{done_job}", headers=as_alice).json()["state"] != "done":
            raise RuntimeError("alice's first job did not succeed")
        running_job = submit(LONG_JOB)
        wait_until(lambda: client.get(f"/v1/jobs/{running_job}", headers=as_alice)
                   .json()["state"] == "working", 60)
        queued_job = submit(SMALL)
        secrets_of_alice = {corpus_id, done_job, running_job, queued_job, SECRET_NAME, alice,
                            alice_old}

        def state_of_alice() -> str:
            # alice's own control requests add jobs and corpora; only these must stay as they were
            mine = (done_job, running_job, queued_job)
            jobs = [client.get(f"/v1/jobs/{j}", headers=as_alice).json() for j in mine]
            # a job that ends by itself during the attacks (its search may stall early) is
            # unchanged by them; a cancel or a failure is what an attack could cause
            states = sorted((j["id"], j["state"] if j["state"] in ("withdrawn", "error") else "alive",
                             j["withdraw_requested"]) for j in jobs)
            corpus = client.get(f"/v1/corpora/{corpus_id}", headers=as_alice)
            return json.dumps([states, corpus.status_code, corpus.json()], sort_keys=True)

        before = state_of_alice()
        # the revoked token worked before it was revoked (so its refusal below means something)
        if client.get(f"/v1/jobs/{done_job}", headers={"Authorization": f"Bearer {alice_old}"}
                      ).status_code != 200:
            details.append("alice's second token did not work before revocation")
        cli_token(data, "revoke", "alice-laptop")

        schema = client.get("/openapi.json").json()
        routes = [(m.upper(), p) for p, ops in schema["paths"].items() for m in ops
                  if m in ("get", "post", "put", "patch", "delete")]
        routes += [("GET", "/"), ("GET", "/docs")]
        extra = _other_path_values(schema)
        callers = {
            "bob (other tenant)": {"Authorization": f"Bearer {bob}"},
            "no token": {},
            "wrong token": {"Authorization": f"Bearer bl_{secrets.token_urlsafe(32)}"},
            "revoked token": {"Authorization": f"Bearer {alice_old}"},
            "Basic scheme": {"Authorization": f"Basic {alice}"},
            "empty Bearer": {"Authorization": "Bearer"},
        }
        ids_for = {"/v1/jobs/{job_id}/withdraw": queued_job}
        controls_failed = 0
        for method, template in routes:
            guarded = template.startswith("/v1/") and template != "/v1/health"  # liveness: public
            ids = {"corpus_id": corpus_id, "job_id": ids_for.get(template, done_job)}
            if guarded and method in ("GET", "POST") and not template.endswith("/withdraw"):
                # control: alice herself gets through, so the refusals below mean something
                own = client.request(headers=as_alice, **_request_for(method, template,
                                                                      {**extra, **ids}))
                tried += 1
                if own.status_code in (401, 403, 404, 422):
                    controls_failed += 1
                    details.append(f"control: alice's own {method} {template} answered "
                                   f"{own.status_code} {own.text[:120]!r}")
            for who, headers in callers.items():
                ids = {"corpus_id": corpus_id, "job_id": ids_for.get(template, done_job)}
                kw = _request_for(method, template, {**extra, **ids})
                response = client.request(headers=headers, **kw)
                tried += 1
                sent = kw["url"] + json.dumps(kw.get("json")) + json.dumps(kw.get("data"))
                carried = {s for s in secrets_of_alice if s in response.text and s not in sent}
                problem = None
                if carried:
                    problem = f"answer carries alice's {sorted(carried)}"
                elif not guarded:
                    pass  # public pages: only what they carry matters
                elif who.startswith("bob"):
                    uses_ids = "{" in template or (method, template) in (("POST", "/v1/jobs"),
                                                                          ("POST", "/v1/transform"))
                    if uses_ids and response.status_code != 404:
                        problem = f"answered {response.status_code}, expected 404"
                    elif uses_ids:
                        # an unknown id of the same shape must answer the very same way
                        fake = {k: secrets.token_hex(16) for k in ids}
                        kw2 = _request_for(method, template, {**extra, **fake})
                        other = client.request(headers=headers, **kw2)
                        tried += 1
                        text1, text2 = response.text, other.text
                        for k in ids:
                            text1, text2 = text1.replace(ids[k], "<id>"), text2.replace(fake[k], "<id>")
                        if (response.status_code, text1) != (other.status_code, text2):
                            problem = (f"404 for alice's id differs from an unknown id's: "
                                       f"{text1[:120]!r} vs {other.status_code} {text2[:120]!r}")
                else:
                    if response.status_code != 401:
                        problem = f"answered {response.status_code}, expected 401"
                    elif response.headers.get("www-authenticate", "").split(" ")[0] != "Bearer":
                        challenge_missing += 1
                        details.append(f"{method} {template} [{who}]: 401 without "
                                       "WWW-Authenticate: Bearer")
                if problem:
                    leaks += 1
                    details.append(f"{method} {template} [{who}]: {problem}")

        # idempotency keys are per tenant
        as_bob = callers["bob (other tenant)"]
        bob_corpus = client.post("/v1/corpora", headers=as_bob,
                                 files=corpus_files(1, seed=5)).json()["id"]
        for body in ({"corpus_id": corpus_id, "settings": SMALL},
                     {"corpus_id": bob_corpus, "settings": SMALL}):
            response = client.post("/v1/jobs", json=body,
                                   headers=dict(as_bob, **{"Idempotency-Key": "alice-key-1"}))
            tried += 1
            if done_job in response.text or response.status_code == 200:
                leaks += 1
                details.append(f"bob reusing alice's Idempotency-Key got {response.status_code} "
                               f"{response.text[:160]!r}")
        listing = client.get("/v1/jobs", headers=as_bob)
        tried += 1
        if any(s in listing.text for s in secrets_of_alice):
            leaks += 1
            details.append("bob's job list shows alice's jobs")
        after = state_of_alice()
        if after != before:
            leaks += 1
            details.append("alice's resources changed during the attacks")
        for job_id in (running_job, queued_job):
            client.post(f"/v1/jobs/{job_id}/withdraw", headers=as_alice)
        client.close()
        counts = (f"{len(routes)} routes × {len(callers)} callers (bob with alice's ids, no token, "
                  f"wrong, revoked, Basic, empty Bearer) + oracle and key checks = {tried} requests")
        result = (f"leaks {leaks}; 401 without challenge {challenge_missing}; owner's controls "
                  f"refused {controls_failed} ({time.monotonic() - started:.0f} s)")
        return [Row("5 tenants and tokens", counts, result, GOAL,
                    leaks == 0 and challenge_missing == 0 and controls_failed == 0, details)]
    except Exception as exc:
        details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
        return [Row("5 tenants and tokens", f"{tried} requests", "experiment aborted", GOAL, False,
                    details)]
    finally:
        if server is not None:
            server.stop()
        remove_tree(tmp)
