"""Bearer tokens, tenant scoping and the loopback-only rule without tokens."""
from __future__ import annotations

import hashlib

from service_helpers import TINY, corpus_files, settings_for

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
        assert "message" in response.json()["error"]
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
                         ("GET", f"/v1/jobs/{job['id']}"), ("POST", f"/v1/jobs/{job['id']}/cancel"),
                         ("GET", f"/v1/jobs/{job['id']}/filterbank"),
                         ("GET", f"/v1/jobs/{job['id']}/report")):
        response = client.request(method, path, headers=bob)
        assert response.status_code == 404, (method, path)
    stolen = client.post("/v1/jobs", json={"corpus_id": corpus["id"], "settings": TINY}, headers=bob)
    assert stolen.status_code == 404
    assert client.get("/v1/jobs", headers=bob).json()["jobs"] == []
    assert client.get(f"/v1/jobs/{job['id']}", headers=alice).json()["state"] == "queued"


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
    and names the way out; with a token it would be allowed (DESIGN §7)."""
    from burstlens.service.serving import serve

    assert serve(settings_for(tmp_path / "data", host="0.0.0.0", workers=0)) == 2
    assert "tokens add" in capsys.readouterr().err


def test_public_address_keeps_auth_on_after_revocation(tmp_path, capsys):
    """Bound to a non-loopback address, the API stays closed even once every token is revoked:
    `serve` pins tokens_required (DESIGN §7: no-token mode only on loopback)."""
    from burstlens.service.serving import bind_policy
    from burstlens.service.store import Store

    _token(tmp_path, capsys, "alice")
    store = Store(tmp_path / "data")
    public = bind_policy(settings_for(tmp_path / "data", host="192.0.2.10"), store)
    local = bind_policy(settings_for(tmp_path / "data", host="127.0.0.1"), store)
    assert (public.tokens_required, local.tokens_required) == (True, False)


def test_tokens_required_without_tokens_refuses_all(make_client):
    """tokens_required with no token stored: every /v1 call is a 401, /healthz still answers
    (DESIGN §7)."""
    client = make_client(tokens_required=True)
    assert client.get("/v1/jobs").status_code == 401
    assert client.get("/healthz").json()["auth"] is True
