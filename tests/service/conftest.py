"""Fixtures of the service tests, found by pytest in every module here without an import.

``make_client`` builds in-process TestClients, ``live_server`` real ``burstlens serve``
processes; both over ``tmp_path/data`` and closed or stopped at teardown. The helpers they use
are in service/testing.py.
"""
from __future__ import annotations

from pathlib import Path

import pytest

from burstlens.service.testing import LiveServer, settings_for


@pytest.fixture
def make_client(tmp_path):
    """Factory of in-process TestClients over one data dir (settings overridable)."""
    from fastapi.testclient import TestClient

    from burstlens.service.app import create_app

    clients = []

    def make(**overrides):
        client = TestClient(create_app(settings_for(tmp_path / "data", **overrides)),
                            raise_server_exceptions=False)
        clients.append(client)
        return client

    yield make
    for client in clients:
        client.close()


@pytest.fixture
def live_server(tmp_path):
    """Factory of live servers over ``tmp_path/data``; all are stopped at teardown."""
    servers = []

    def make(workers: int = 1, data_dir: Path | None = None, **env) -> LiveServer:
        server = LiveServer(data_dir or tmp_path / "data", workers, **env).start()
        servers.append(server)
        return server

    yield make
    for server in servers:
        server.stop()
