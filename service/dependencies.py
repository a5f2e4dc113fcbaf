"""FastAPI dependencies: how a route reaches the service's settings and its job store.

``create_app`` keeps one :class:`ServiceSettings` and one :class:`Store` per app; routes take them
as parameters annotated :data:`SettingsDep` / :data:`StoreDep` (``Depends(get_settings)`` /
``Depends(get_store)``), never from ``request.app.state``, so a test swaps either with
``app.dependency_overrides[get_store] = lambda: other``.
"""
from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Request

from burstlens.service.config import ServiceSettings
from burstlens.service.store import Store


# async: a plain attribute read has no reason to take a thread-pool hop per request
async def get_settings(request: Request) -> ServiceSettings:
    """The settings the app was created with (limits, data dir, auth policy)."""
    return request.app.state.settings


async def get_store(request: Request) -> Store:
    """The app's job store (SQLite file and blob folder under ``settings.data_dir``)."""
    return request.app.state.store


SettingsDep = Annotated[ServiceSettings, Depends(get_settings)]
StoreDep = Annotated[Store, Depends(get_store)]
