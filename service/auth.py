"""Bearer tokens: created once, stored as a sha256 hash, compared in constant time.

A token is 32 random bytes (256 bits) from :mod:`secrets`, so a plain sha256 of it is as good as
a slow password hash: nobody can search a 2^256 space. Each token belongs to a tenant; every
corpus and job is scoped to the tenant of the token that created it.

With no active token stored (and ``tokens_required`` off) the API runs without authentication,
as the single tenant ``local``; ``burstlens serve`` then refuses any address but loopback.
"""
from __future__ import annotations

import hashlib
import secrets

from fastapi import HTTPException, Request

from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.store import Store

LOCAL_TENANT = "local"
TOKEN_PREFIX = "bl_"


def new_token() -> str:
    """A fresh bearer token (printed once by ``burstlens tokens add``, never stored in clear)."""
    return TOKEN_PREFIX + secrets.token_urlsafe(32)


def token_hash(token: str) -> str:
    return hashlib.sha256(token.encode("utf-8")).hexdigest()


def create_token(store: Store, name: str, tenant: str | None = None) -> str:
    """Store the hash of a new token for ``tenant`` (default: the name) and return the token."""
    if not name or not name.strip():
        raise ValueError("token name must not be empty")
    token = new_token()
    store.add_token(name.strip(), (tenant or name).strip(), token_hash(token))
    return token


def tenant_for_token(store: Store, token: str) -> str | None:
    """The tenant of an active token, or None. Compares every stored hash in constant time."""
    digest = token_hash(token)
    found = None
    for row in store.active_tokens():
        if secrets.compare_digest(digest, row["token_sha256"]):
            found = row["tenant"]
    return found


def auth_required(store: Store, tokens_required: bool) -> bool:
    return tokens_required or store.has_tokens()


def _unauthorized(message: str) -> HTTPException:
    return HTTPException(status_code=401, detail=message, headers={"WWW-Authenticate": "Bearer"})


def require_tenant(request: Request, store: StoreDep, settings: SettingsDep) -> str:
    """FastAPI dependency: the caller's tenant, or 401 with ``WWW-Authenticate: Bearer``."""
    if not auth_required(store, settings.tokens_required):
        return LOCAL_TENANT
    header = request.headers.get("authorization", "")
    scheme, _, token = header.partition(" ")
    if not header:
        raise _unauthorized("missing bearer token (Authorization: Bearer TOKEN)")
    if scheme.lower() != "bearer" or not token.strip():
        raise _unauthorized("malformed Authorization header; expected 'Bearer TOKEN'")
    tenant = tenant_for_token(store, token.strip())
    if tenant is None:
        raise _unauthorized("unknown or revoked token")
    return tenant
