"""The data dir's schema version: a data dir from the previous release opens and its jobs go
on; one from a newer release is refused naming both versions; a crash during the migration
leaves the old data dir as it was.

The fixture tests/fixtures/datadir-schema1 was written by the previous release's own code (a
search that finished, one queued, one cancelled). Atomicity rests on SQLite's transactional DDL
and rollback journal ("Atomic Commit In SQLite", sqlite.org documentation; from memory).
"""
from __future__ import annotations

import shutil
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from burstlens.service.testing import settings_for

from burstlens.service.app import create_app
from burstlens.service.store import SCHEMA_VERSION, DataDirTooNew, Store
from burstlens.service.worker import Worker

FIXTURE = Path(__file__).resolve().parents[1] / "fixtures" / "datadir-schema1"
DONE, QUEUED, CANCELLED = ("78da625babfc410499ae02012abc6ae0", "4e28eb18513b4077925d28731b2a77dc",
                           "8c44c55bc51e44ad9918edbbdfa32ab6")


def old_data_dir(tmp_path: Path) -> Path:
    """A copy of the previous release's data dir at a new path (as after a restore elsewhere)."""
    data = tmp_path / "moved" / "data"
    shutil.copytree(FIXTURE, data, ignore=shutil.ignore_patterns("README.md"))
    return data


def raw(data: Path, sql: str) -> list[tuple]:
    con = sqlite3.connect(data / "burstlens.sqlite3")
    try:
        return con.execute(sql).fetchall()
    finally:
        con.close()


def test_previous_release_data_dir_opens_and_its_jobs_go_on(tmp_path):
    """Property: opening the schema-1 data dir migrates it once to the current version; the
    three jobs keep their ids and take the new state names (succeeded → done, queued → waiting,
    cancelled → withdrawn); the finished search's filterbank and report are served from the
    moved folder; the queued job runs to done; a second open changes nothing."""
    data = old_data_dir(tmp_path)
    assert raw(data, "PRAGMA user_version") == [(0,)]
    settings = settings_for(data)
    with TestClient(create_app(settings), raise_server_exceptions=False) as client:
        assert raw(data, "PRAGMA user_version") == [(SCHEMA_VERSION,)]
        states = {j["id"]: j["state"] for j in client.get("/v1/jobs").json()["jobs"]}
        assert states == {DONE: "done", QUEUED: "waiting", CANCELLED: "withdrawn"}
        withdrawn = client.get(f"/v1/jobs/{CANCELLED}").json()
        assert withdrawn["stop_reason"] == "withdrawn" and withdrawn["ended_at"] is not None
        filterbank = client.get(f"/v1/jobs/{DONE}/filterbank")
        assert filterbank.status_code == 200 and filterbank.json()["channels"]
        report = client.get(f"/v1/jobs/{DONE}/report")
        assert report.status_code == 200 and "<html" in report.text.lower()
        Worker(settings).run(exit_when_idle=True)
        assert client.get(f"/v1/jobs/{QUEUED}").json()["state"] == "done"
    before = raw(data, "SELECT id, state, result_dir FROM jobs ORDER BY id")
    Store(data)
    assert raw(data, "SELECT id, state, result_dir FROM jobs ORDER BY id") == before
    assert all(not (r or "").startswith("/") for _, _, r in before)


def test_newer_data_dir_is_refused_naming_both_versions(tmp_path):
    """Property: a data dir whose schema version is above this release's is refused, the
    message naming the data dir, its version and the version this release reads; nothing in
    it is changed."""
    data = tmp_path / "data"
    Store(data)
    con = sqlite3.connect(data / "burstlens.sqlite3")
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 5}")
    con.close()
    with pytest.raises(DataDirTooNew) as refused:
        Store(data)
    message = str(refused.value)
    assert str(data) in message and f"schema version {SCHEMA_VERSION + 5}" in message
    assert f"schema version {SCHEMA_VERSION} and older" in message
    assert raw(data, "PRAGMA user_version") == [(SCHEMA_VERSION + 5,)]


def test_serve_refuses_a_newer_data_dir_with_exit_2(tmp_path):
    """Property: `burstlens serve` on a newer data dir exits 2 with the message, no traceback."""
    data = tmp_path / "data"
    Store(data)
    con = sqlite3.connect(data / "burstlens.sqlite3")
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    con.close()
    done = subprocess.run([sys.executable, "-m", "burstlens.service.cli", "serve", "--data-dir",
                           str(data), "--port", "0"], capture_output=True, text=True, timeout=60)
    assert done.returncode == 2, done.stderr
    assert f"schema version {SCHEMA_VERSION + 1}" in done.stderr and "Traceback" not in done.stderr


def test_kill_during_migration_leaves_the_old_data_dir(tmp_path):
    """Property: a process killed (SIGKILL) inside the migration, after some of its statements
    ran, leaves the schema-1 file as it was (version 0, old state names, old columns); the next
    open migrates it in full."""
    data = old_data_dir(tmp_path)
    before = raw(data, "SELECT id, state FROM jobs ORDER BY id")
    marker = tmp_path / "inside"
    script = textwrap.dedent(f"""
        import time
        from pathlib import Path
        from burstlens.service import store

        def pause():
            Path({str(marker)!r}).write_text("x")
            time.sleep(60)

        connect = store.Store.connection
        def connection(self):
            con = connect(self)
            con.create_function("pause", 0, pause)
            return con
        store.Store.connection = connection
        steps = store.MIGRATIONS[1]
        store.MIGRATIONS[1] = (*steps[:6], "SELECT pause()", *steps[6:])
        store.Store({str(data)!r})
    """)
    proc = subprocess.Popen([sys.executable, "-c", script])
    try:
        deadline = time.monotonic() + 60
        while not marker.exists():
            assert proc.poll() is None and time.monotonic() < deadline, "never reached the pause"
            time.sleep(0.05)
        proc.kill()
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()
    assert raw(data, "PRAGMA user_version") == [(0,)]
    assert raw(data, "SELECT id, state FROM jobs ORDER BY id") == before
    columns = {row[1] for row in raw(data, "PRAGMA table_info(jobs)")}
    assert {"created_at", "finished_at", "cancel_requested"} <= columns and "kind" not in columns
    Store(data)
    assert raw(data, "PRAGMA user_version") == [(SCHEMA_VERSION,)]
    assert dict(raw(data, "SELECT id, state FROM jobs")) == {DONE: "done", QUEUED: "waiting",
                                                             CANCELLED: "withdrawn"}
