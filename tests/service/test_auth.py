"""Bearer tokens, tenant scoping and the loopback-only rule without tokens."""
from __future__ import annotations

import hashlib

from burstlens.service.testing import TINY, corpus_files, settings_for

from burstlens.service.cli import main as cli


def _token(tmp_path, capsys, name: str, *extra: str) -> str:
    assert cli(["tokens", "--data-dir", str(tmp_path / "data"), "add", name, *extra]) == 0
    return capsys.readouterr().out.strip()


def test_tokens_are_stored_hashed(tmp_path, capsys):
    """`tokens add` prints the token once; the store keeps only its sha256 (OWASP, "Password
    Storage": never store secrets in clear; a 256-bit random token needs no slow hash)."""
    token = _token(tmp_path, capsys, "alice")
    assert len(token) > 40
    raw = (tmp_path / "data" / "burstlens.sqlite3").read_bytes()
    wal = tmp_path / "data" / "burstlens.sqlite3-wal"
    raw += wal.read_bytes() if wal.exists() else b""
    assert token.encode() not in raw
    assert hashlib.sha256(token.encode()).hexdigest().encode() in raw
    assert cli(["tokens", "--data-dir", str(tmp_path / "data"), "add", "alice"]) == 2  # unique


def test_missing_or_wrong_token_is_401_with_challenge(tmp_path, capsys, make_client):
    """With tokens stored, /v1 needs one: 401 with WWW-Authenticate: Bearer (RFC 6750 §3)."""
    token = _token(tmp_path, capsys, "alice")
    client = make_client()
    for headers in ({}, {"Authorization": "Bearer wrong"}, {"Authorization": f"Basic {token}"}):
        response = client.get("/v1/jobs", headers=headers)
        assert response.status_code == 401
        assert response.headers["www-authenticate"] == "Bearer"
    assert client.get("/v1/jobs", headers={"Authorization": f"Bearer {token}"}).status_code == 200


def test_revoked_token_is_refused(tmp_path, capsys, make_client):
    """A revoked token no longer authenticates (RFC 6750 §3.1, invalid_token)."""
    token = _token(tmp_path, capsys, "alice")
    _token(tmp_path, capsys, "bob")
    client = make_client()
    assert cli(["tokens", "--data-dir", str(tmp_path / "data"), "revoke", "alice"]) == 0
    assert client.get("/v1/jobs", headers={"Authorization": f"Bearer {token}"}).status_code == 401


def test_other_tenants_ids_are_404(tmp_path, capsys, make_client):
    """Another tenant's corpus and job ids answer 404 on every route, exactly as unknown ids do
    (no existence oracle; OWASP API Security Top 10, "Broken Object Level Authorization")."""
    alice = {"Authorization": f"Bearer {_token(tmp_path, capsys, 'alice')}"}
    bob = {"Authorization": f"Bearer {_token(tmp_path, capsys, 'bob')}"}
    client = make_client()
    corpus = client.post("/v1/corpora", files=corpus_files(1), headers=alice).json()
    job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY},
                      headers=alice).json()
    for method, path in (("GET", f"/v1/corpora/{corpus['id']}"), ("DELETE", f"/v1/corpora/{corpus['id']}"),
                         ("GET", f"/v1/jobs/{job['id']}"), ("POST", f"/v1/jobs/{job['id']}/withdraw"),
                         ("GET", f"/v1/jobs/{job['id']}/filterbank"),
                         ("GET", f"/v1/jobs/{job['id']}/report")):
        response = client.request(method, path, headers=bob)
        assert response.status_code == 404, (method, path)
    stolen = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}, headers=bob)
    assert stolen.status_code == 404
    assert client.get("/v1/jobs", headers=bob).json()["jobs"] == []
    assert client.get(f"/v1/jobs/{job['id']}", headers=alice).json()["state"] == "waiting"


def test_same_idempotency_key_is_per_tenant(tmp_path, capsys, make_client):
    """Two tenants using the same Idempotency-Key get two separate jobs (IETF draft "The
    Idempotency-Key HTTP Header Field": keys are scoped to the client)."""
    alice = {"Authorization": f"Bearer {_token(tmp_path, capsys, 'alice')}"}
    bob = {"Authorization": f"Bearer {_token(tmp_path, capsys, 'bob')}"}
    client = make_client()
    ids = []
    for headers in (alice, bob):
        corpus = client.post("/v1/corpora", files=corpus_files(1), headers=headers).json()
        job = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY},
                          headers={**headers, "Idempotency-Key": "k"})
        assert job.status_code == 201
        ids.append(job.json()["id"])
    assert ids[0] != ids[1]


def test_no_tokens_means_loopback_only(tmp_path, capsys):
    """Without any token stored, `serve` refuses a non-loopback address (exit 2, nothing bound)
    and names the way out; with a token it would be allowed (docs/design.md §7)."""
    from burstlens.service.serving import serve

    assert serve(settings_for(tmp_path / "data", host="0.0.0.0", workers=0)) == 2
    assert "tokens add" in capsys.readouterr().err


def test_public_address_keeps_auth_on_after_revocation(tmp_path, capsys):
    """Bound to a non-loopback address, the API stays closed even once every token is revoked:
    `serve` pins tokens_required (docs/design.md §7: no-token mode only on loopback)."""
    from burstlens.service.serving import bind_policy
    from burstlens.service.store import Store

    _token(tmp_path, capsys, "alice")
    store = Store(tmp_path / "data")
    public = bind_policy(settings_for(tmp_path / "data", host="192.0.2.10"), store)
    local = bind_policy(settings_for(tmp_path / "data", host="127.0.0.1"), store)
    assert (public.tokens_required, local.tokens_required) == (True, False)


def test_tokens_required_without_tokens_refuses_all(make_client):
    """tokens_required with no token stored: every /v1 call is a 401, /v1/health still answers
    (docs/design.md §7)."""
    client = make_client(tokens_required=True)
    assert client.get("/v1/jobs").status_code == 401
    assert client.get("/v1/health").json()["auth"] is True


# -- token guessing (service/guessing.py) -------------------------------------------------------

GUESSER, OWNER_ADDRESS, BYSTANDER = "203.0.113.7", "203.0.113.7", "198.51.100.9"  # RFC 5737


def _clients(tmp_path, *addresses: str, **overrides):
    """TestClients of one app (so one limiter), each seen by the server as coming from one of
    ``addresses``."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app

    app = create_app(settings_for(tmp_path / "data", **overrides))
    return [TestClient(app, client=(address, 40000 + i), raise_server_exceptions=False)
            for i, address in enumerate(addresses)]


def _wrong() -> dict:
    import secrets

    return {"Authorization": f"Bearer bl_{secrets.token_urlsafe(32)}"}


def test_guesses_past_the_threshold_get_429_with_growing_retry_after(tmp_path, capsys):
    """After `auth_failures_allowed` wrong tokens from one address in the window, each further
    wrong token is a 429 whose Retry-After is an integer number of seconds (RFC 6585 §4; RFC 9110
    §10.2.3, delay-seconds) doubling per failure, 1, 2, 4, 8, up to the window (truncated binary
    exponential backoff, common practice); another address is not slowed."""
    _token(tmp_path, capsys, "alice")
    guesser, bystander = _clients(tmp_path, GUESSER, BYSTANDER, auth_failures_allowed=3,
                                  auth_failure_window_s=10.0, auth_slow_answer_s=0.0)
    codes = [guesser.get("/v1/jobs", headers=_wrong()).status_code for _ in range(3)]
    assert codes == [401, 401, 401]
    waits = []
    for _ in range(6):
        response = guesser.get("/v1/jobs", headers=_wrong())
        assert response.status_code == 429
        waits.append(int(response.headers["retry-after"]))  # an integer, or this raises
    assert waits == [1, 2, 4, 8, 10, 10]
    assert bystander.get("/v1/jobs", headers=_wrong()).status_code == 401


def test_valid_token_from_a_slowed_address_passes(tmp_path, capsys):
    """The owner of a valid token sharing the guesser's address (a NAT) is never refused: a
    valid token gets 200 at once even while that address gets 429s, and its success does not
    clear the address's failures (else a tenant could interleave its own token with guesses;
    OWASP Authentication Cheat Sheet, "Account lockout": lockout must not become a denial of
    service)."""
    import time

    token = _token(tmp_path, capsys, "alice")
    guesser, owner = _clients(tmp_path, GUESSER, OWNER_ADDRESS, auth_failures_allowed=2,
                              auth_slow_answer_s=0.5)
    for _ in range(2):
        assert guesser.get("/v1/jobs", headers=_wrong()).status_code == 401
    t0 = time.perf_counter()
    slowed = guesser.get("/v1/jobs", headers=_wrong())
    slowed_s = time.perf_counter() - t0
    assert slowed.status_code == 429 and slowed.headers["retry-after"] == "1"
    assert slowed_s >= 0.5  # held auth_slow_answer_s (≤ Retry-After) before the answer
    t0 = time.perf_counter()
    assert owner.get("/v1/jobs", headers={"Authorization": f"Bearer {token}"}).status_code == 200
    assert time.perf_counter() - t0 < 0.5  # and the owner is not held
    after = guesser.get("/v1/jobs", headers=_wrong())
    assert (after.status_code, after.headers["retry-after"]) == (429, "2")


def test_revoked_and_malformed_count_missing_does_not(tmp_path, capsys):
    """A revoked token and a malformed header count as failures like a wrong token (each tells
    the server nothing it trusts); a request with no Authorization header is never slowed (it
    presents no secret; RFC 6750 §3.1: no error code for a request lacking credentials)."""
    _token(tmp_path, capsys, "alice")
    revoked = _token(tmp_path, capsys, "bob")
    assert cli(["tokens", "--data-dir", str(tmp_path / "data"), "revoke", "bob"]) == 0
    guesser, = _clients(tmp_path, GUESSER, auth_failures_allowed=2, auth_slow_answer_s=0.0)
    for _ in range(20):
        assert guesser.get("/v1/jobs").status_code == 401
    assert guesser.get("/v1/jobs", headers={"Authorization": f"Bearer {revoked}"}).status_code == 401
    assert guesser.get("/v1/jobs", headers={"Authorization": "Basic abc"}).status_code == 401
    for headers in ({"Authorization": f"Bearer {revoked}"}, {"Authorization": "Bearer"}):
        response = guesser.get("/v1/jobs", headers=headers)
        assert response.status_code == 429 and "retry-after" in response.headers
    assert guesser.get("/v1/jobs").status_code == 401


def test_limiter_settings_come_from_the_environment(monkeypatch, tmp_path):
    """The limiter's settings are read from BURSTLENS_* like every other service setting."""
    from burstlens.service.config import ServiceSettings
    from burstlens.service.guessing import GuessLimiter

    monkeypatch.setenv("BURSTLENS_AUTH_FAILURES_ALLOWED", "4")
    monkeypatch.setenv("BURSTLENS_AUTH_FAILURE_WINDOW_S", "30")
    monkeypatch.setenv("BURSTLENS_AUTH_CLIENTS_TRACKED", "77")
    monkeypatch.setenv("BURSTLENS_AUTH_SLOW_ANSWER_S", "0.25")
    settings = ServiceSettings(data_dir=tmp_path)
    assert (settings.auth_failures_allowed, settings.auth_failure_window_s,
            settings.auth_clients_tracked, settings.auth_slow_answer_s) == (4, 30.0, 77, 0.25)
    limiter = GuessLimiter.from_settings(settings)
    assert (limiter.failures_allowed, limiter.window_s, limiter.clients_tracked) == (4, 30.0, 77)
