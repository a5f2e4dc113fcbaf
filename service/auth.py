"""Bearer tokens: created once, stored as a sha256 hash, compared in constant time.

A token is 32 random bytes (256 bits) from :mod:`secrets`, so a plain sha256 of it is as good as
a slow password hash: nobody can search a 2^256 space. Each token belongs to a tenant; every
corpus and job is scoped to the tenant of the token that created it.

With no active token stored (and ``tokens_required`` off) the API runs without authentication,
as the single tenant ``local``; ``burstlens serve`` then refuses any address but loopback.

One code path for every refusal. A wrong token, a revoked one, a malformed header and a missing
one all take the same steps (:func:`authenticate`): hash what was presented (the empty string if
nothing was), read the active tokens, compare the hash with every one of them with
:func:`secrets.compare_digest`, and only then decide. A revoked token is simply absent from the
active list, so it costs exactly what a wrong one costs, and wrong and revoked get the same
answer, byte for byte. A malformed or missing header is named as such in the message: that tells
the client about its own request, nothing about the stored tokens. Repeated failures from one
address are slowed by :mod:`burstlens.service.guessing`, after the comparison, so a valid token
always passes.
"""
from __future__ import annotations

import asyncio
import hashlib
import secrets
from typing import Annotated
from dataclasses import dataclass

from fastapi import Depends, HTTPException, Request

from burstlens.service.dependencies import SettingsDep, StoreDep
from burstlens.service.guessing import GuessLimiterDep, client_address
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
    """The tenant of an active token, or None. Hashes ``token`` and compares the hash with every
    active token's in constant time (no early exit), so the time does not depend on which stored
    token, if any, it matches."""
    digest = token_hash(token).encode("ascii")
    found = None
    for row in store.active_tokens():
        if secrets.compare_digest(digest, row["token_sha256"].encode("ascii")):
            found = row["tenant"]
    return found


def auth_required(store: Store, tokens_required: bool) -> bool:
    return tokens_required or store.has_tokens()


@dataclass(frozen=True)
class Authentication:
    """The outcome of one ``Authorization`` header: the ``tenant``, or None with the ``message``
    of the 401; ``counted`` says whether the refusal counts as a guess (a header was sent)."""

    tenant: str | None
    message: str = ""
    counted: bool = False


def authenticate(store: Store, tokens_required: bool, header: str | None) -> Authentication:
    """Check one ``Authorization`` header value (None: no header) against the active tokens.

    Every header, well formed or not, goes through the same hash and full comparison before the
    decision (module docstring), so a wrong, a revoked and a malformed one take the same time."""
    if not auth_required(store, tokens_required):
        return Authentication(LOCAL_TENANT)
    scheme, _, value = (header or "").partition(" ")
    token = value.strip()
    tenant = tenant_for_token(store, token)
    if not header:
        return Authentication(None, "missing bearer token (Authorization: Bearer TOKEN)")
    if scheme.lower() != "bearer" or not token:
        return Authentication(None, "malformed Authorization header; expected 'Bearer TOKEN'",
                              counted=True)
    if tenant is None:
        return Authentication(None, "unknown or revoked token", counted=True)
    return Authentication(tenant)


def _unauthorized(message: str) -> HTTPException:
    return HTTPException(status_code=401, detail=message, headers={"WWW-Authenticate": "Bearer"})


async def require_tenant(request: Request, store: StoreDep, settings: SettingsDep,
                         limiter: GuessLimiterDep) -> str:
    """FastAPI dependency: the caller's tenant; else 401 with ``WWW-Authenticate: Bearer``, or,
    for an address that has failed too often, 429 with ``Retry-After`` (integer seconds) after a
    delay of at most that long (rule and reasons: :mod:`burstlens.service.guessing`)."""
    # on the event loop: one indexed SQLite read (WAL readers never wait for writers) and a
    # few hash comparisons, about 30 µs, cheaper than the thread-pool hop it would take
    outcome = authenticate(store, settings.tokens_required, request.headers.get("authorization"))
    if outcome.tenant is not None:
        return outcome.tenant
    if outcome.counted:
        slowdown = limiter.record_failure(client_address(request))
        if slowdown.slowed:
            # a sleeping coroutine holds no thread; it caps each connection's guess rate
            await asyncio.sleep(min(settings.auth_slow_answer_s, slowdown.retry_after_s))
            raise HTTPException(status_code=429, detail=(
                f"too many failed authentications from this address; retry after "
                f"{slowdown.retry_after_s} s (a valid token is always accepted)"),
                headers={"Retry-After": str(slowdown.retry_after_s)})
    raise _unauthorized(outcome.message)


# every /v1 route names its caller's tenant so: ``tenant: TenantDep``
TenantDep = Annotated[str, Depends(require_tenant)]
