"""`burstlens backup DATA_DIR DEST` and `burstlens restore BACKUP DATA_DIR` (service/backup.py).

Outside references: the store copy is checked with SQLite's own `PRAGMA integrity_check`
(SQLite documentation, "Pragma statements"); the backup's files against sha256 computed here
with hashlib (NIST FIPS 180-4, "Secure Hash Standard", 2015), not with the code under test.
The kill tests stop a `burstlens backup` or `restore` process with SIGKILL at a named step (the
module's `step_hook`), as tests/service/test_store_schema.py does for the migration.
"""
from __future__ import annotations

import hashlib
import json
import os
import shutil
import sqlite3
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import pytest
from fastapi.testclient import TestClient
from burstlens.service.testing import TINY, burst_npz, corpus_files, service_env, settings_for, wait_for

from burstlens.service.app import create_app
from burstlens.service.client import Client
from burstlens.service.store import SCHEMA_VERSION, Store
from burstlens.service.worker import Worker

ROOT = Path(__file__).resolve().parents[2]  # the checkout: the working folder of the commands

pytestmark = pytest.mark.timeout(300)

FAST = dict(TINY, channels=4, evaluations=4, refine=False, bootstrap=0)
INCOMPLETE = ".burstlens-incomplete-"


def burstlens(*args: str, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "burstlens.service.cli", *args], cwd=ROOT,
                          env=service_env(), capture_output=True, text=True, timeout=timeout)


def files_under(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*"))
            if p.is_file()}


def independently_complete(backup: Path) -> dict:
    """The manifest, after checking the backup without service.backup: every file but the
    manifest is listed with its own sha256 and size (hashlib, FIPS 180-4), and the store copy
    passes SQLite's integrity check."""
    manifest = json.loads((backup / "manifest.json").read_text())
    on_disk = {rel: {"bytes": len(data), "sha256": hashlib.sha256(data).hexdigest()}
               for rel, data in files_under(backup).items() if rel != "manifest.json"}
    assert manifest["files"] == on_disk
    con = sqlite3.connect(backup / "burstlens.sqlite3")
    try:
        assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert con.execute("PRAGMA user_version").fetchone()[0] == manifest["schema_version"]
    finally:
        con.close()
    return manifest


@pytest.fixture(scope="module")
def site(tmp_path_factory) -> Path:
    """A data dir (closed) with a token, two corpora and a finished search."""
    data = tmp_path_factory.mktemp("site") / "data"
    settings = settings_for(data)
    with TestClient(create_app(settings)) as api:
        corpus = api.post("/v1/corpora", files=corpus_files(2, seed=0)).json()["id"]
        api.post("/v1/corpora", files=corpus_files(1, seed=5))
        api.post("/v1/jobs", json={"corpus_id": corpus, "settings": FAST})
        Worker(settings).run(max_jobs=1, exit_when_idle=True)
        api.app.state.store.add_token("ops", "ops", "0" * 64)
        api.app.state.store.close()
    return data


@pytest.fixture(scope="module")
def made(site, tmp_path_factory) -> Path:
    """A backup of ``site`` made by the command."""
    dest = tmp_path_factory.mktemp("backups") / "b1"
    done = burstlens("backup", str(site), str(dest), "--quiet")
    assert done.returncode == 0, done.stderr
    return dest


@pytest.mark.slow
def test_backup_during_a_live_server_restores_every_job_and_result(live_server, tmp_path):
    """Property: a backup taken while `burstlens serve` runs a search (and another waits)
    restores, at another path, to a data dir whose API answers the same for every job that had
    ended (job, corpus, filterbank) with byte-identical result files, transform store included;
    the jobs in flight come back waiting or working and end with the filterbank the live server
    gave them (the determinism the fault tests rely on, docs/design.md §7). A restore over the live
    data dir is refused with exit 2 and leaves it serving."""
    server = live_server(workers=1)
    data = server.data_dir
    with Client(server.url) as client:
        corpora = [client.upload_corpus(_write(tmp_path / f"c{s}", s))["id"] for s in (0, 10)]
        corpora.append(client.upload_corpus([_mseed(tmp_path / "STA.mseed", 20)])["id"])
        search = client.submit_job(corpora[0], FAST)["id"]
        assert client.wait(search)["state"] == "done"
        transform = client.submit_transform(search, corpora[2], 0.004)["id"]
        assert client.wait(transform)["state"] == "done", client.job(transform)
        flying = [client.submit_job(corpora[0], TINY)["id"], client.submit_job(corpora[1], TINY)["id"]]
        wait_for(lambda: (client.job(flying[0])["progress"].get("round") or 0) >= 2, interval=0.05)

        backup = tmp_path / "backups" / "live"
        done = burstlens("backup", str(data), str(backup))
        assert done.returncode == 0, done.stderr
        assert "blobs" in done.stderr   # the progress bar
        manifest = independently_complete(backup)
        assert manifest["schema_version"] == SCHEMA_VERSION and manifest["counts"]["jobs"] == 4

        refused = burstlens("restore", str(backup), str(data))
        assert refused.returncode == 2 and str(data) in refused.stderr
        assert "holds its store open" in refused.stderr
        assert client.health() and not list(data.parent.glob("data.before-restore-*"))

        # (the jobs in flight may end meanwhile: the backup holds them as they were, checked below)
        ended = {j: client.job(j) for j in (search, transform)}
        live_filterbank = client.filterbank(search)
        final = {j: client.wait(j) for j in flying}
        assert {j["state"] for j in final.values()} == {"done"}
        flown = {j: client.filterbank(j)["channels"] for j in flying}
    server.stop()

    restored = tmp_path / "elsewhere" / "data"
    done = burstlens("restore", str(backup), str(restored), "--quiet")
    assert done.returncode == 0, done.stderr
    settings = settings_for(restored)
    with TestClient(create_app(settings)) as api:
        for job_id, view in ended.items():
            assert api.get(f"/v1/jobs/{job_id}").json() == view
        assert api.get(f"/v1/jobs/{search}/filterbank").json() == live_filterbank
        for corpus_id in corpora:
            assert api.get(f"/v1/corpora/{corpus_id}").status_code == 200
        assert {api.get(f"/v1/jobs/{j}").json()["state"] for j in flying} <= {"waiting", "working"}
        store = api.app.state.store
        for job_id in ended:   # results never change once the job has ended
            result_dir = store.get_job(job_id, None)["result_dir"]
            assert files_under(restored / result_dir) == files_under(data / result_dir)
        assert (restored / store.get_job(transform, None)["result_dir"] / "store.zarr").is_dir()
        Worker(settings).run(exit_when_idle=True)
        for job_id in flying:
            assert api.get(f"/v1/jobs/{job_id}").json()["state"] == "done"
            assert api.get(f"/v1/jobs/{job_id}/filterbank").json()["channels"] == flown[job_id]


def _write(folder: Path, seed: int) -> list[Path]:
    folder.mkdir(parents=True)
    paths = []
    for filename, data, _type in (entry for _field, entry in corpus_files(2, seed=seed)):
        path = folder / filename
        path.write_bytes(data)
        paths.append(path)
    return paths


def _mseed(path: Path, seed: int) -> Path:
    """A miniSEED record of the made-up burst trace (the transform needs UTC start times)."""
    import io

    import numpy as np
    import obspy

    x = np.load(io.BytesIO(burst_npz(seed)))["data"].astype(np.float32)
    obspy.Trace(x, header={"network": "XX", "station": "STA", "channel": "HHZ",
                           "sampling_rate": 1000.0,
                           "starttime": obspy.UTCDateTime(2026, 1, 1)}).write(str(path), "MSEED")
    return path


KILLER = textwrap.dedent("""
    import sys, time
    from pathlib import Path
    from burstlens.service import backup
    from burstlens.service.cli import main

    step, marker = sys.argv[1], Path(sys.argv[2])
    backup._STORE_PAGES = 1     # many steps of the store copy, so one can be interrupted

    def pause(reached):
        if reached == step:
            marker.write_text(reached)
            time.sleep(120)

    backup.step_hook = pause
    sys.exit(main(sys.argv[3:]))
""")


def kill_at(step: str, tmp_path: Path, *command: str) -> None:
    """Run ``burstlens COMMAND`` until it reaches ``step``, then SIGKILL it."""
    script, marker = tmp_path / "killer.py", tmp_path / f"reached-{step}"
    script.write_text(KILLER)
    proc = subprocess.Popen([sys.executable, str(script), step, str(marker), *command,
                             "--quiet"], cwd=ROOT, env=service_env())
    try:
        deadline = time.monotonic() + 90
        while not marker.exists():
            assert proc.poll() is None, f"exited with {proc.returncode} before {step}"
            assert time.monotonic() < deadline, f"never reached {step}"
            time.sleep(0.02)
        proc.kill()
        proc.wait(timeout=30)
    finally:
        if proc.poll() is None:
            proc.kill()


@pytest.mark.parametrize("step", ["store-step", "store-copied", "blob-copied",
                                  "manifest-written", "before-rename", "renamed"])
def test_kill_9_during_backup_leaves_a_complete_backup_or_none(site, tmp_path, step):
    """Property: SIGKILL at any of these steps leaves at DEST either nothing (every step before
    the rename: only a folder named .burstlens-incomplete-backup.*, never taken for a backup)
    or a complete backup (after the rename: every file as its manifest says, the store intact,
    and `restore` accepts it). The next backup in the same folder succeeds and removes the
    leftover."""
    parent = tmp_path / "backups"
    dest = parent / "b"
    kill_at(step, tmp_path, "backup", str(site), str(dest))
    leftovers = list(parent.glob(INCOMPLETE + "*"))
    if step == "renamed":
        independently_complete(dest)
        assert not leftovers
        restored = burstlens("restore", str(dest), str(tmp_path / "r"), "--quiet")
        assert restored.returncode == 0, restored.stderr
    else:
        assert not dest.exists()
        assert [p.name.split(".")[1] for p in leftovers] == ["burstlens-incomplete-backup"]
        refused = burstlens("restore", str(leftovers[0]), str(tmp_path / "r"))
        assert refused.returncode == 2 and "left by an interrupted" in refused.stderr
    again = burstlens("backup", str(site), str(parent / "b2"), "--quiet")
    assert again.returncode == 0, again.stderr
    assert not list(parent.glob(INCOMPLETE + "*"))
    independently_complete(parent / "b2")


@pytest.mark.parametrize("step", ["restore-copied", "data-dir-aside"])
def test_kill_9_during_restore_never_leaves_a_half_data_dir(made, tmp_path, step):
    """Property: SIGKILL while restoring over an existing data dir leaves either that data dir
    in place as it was (before the swap) or no data dir at all with the old one kept aside
    whole (between the two renames); never a half-restored one. The next restore completes
    and removes the leftover."""
    current = tmp_path / "data"
    store = Store(current)
    store.add_token("before", "before", "1" * 64)
    store.close()
    kill_at(step, tmp_path, "restore", str(made), str(current))
    aside = list(tmp_path.glob("data.before-restore-*"))
    if step == "restore-copied":
        assert not aside
        kept = current
    else:
        assert not current.exists() and len(aside) == 1
        kept = aside[0]
    kept_store = Store(kept)
    assert [t["name"] for t in kept_store.list_tokens()] == ["before"]
    kept_store.close()
    assert len(list(tmp_path.glob(INCOMPLETE + "restore.*"))) == 1
    done = burstlens("restore", str(made), str(current), "--quiet")
    assert done.returncode == 0, done.stderr
    assert not list(tmp_path.glob(INCOMPLETE + "*"))
    assert files_under(current / "blobs") == files_under(made / "blobs")


def test_restore_over_a_data_dir_held_open_is_refused(made, tmp_path):
    """Property: while another process holds the data dir's store open, idle (no transaction
    in progress, as a quiet server between requests), restore exits 2 naming the data dir and
    changes nothing; once that process is gone, the restore goes through and keeps the old
    data dir aside."""
    current = tmp_path / "data"
    holder = subprocess.Popen(
        [sys.executable, "-c", "import sys; from burstlens.service.store import Store; "
                               f"Store({str(current)!r}).get_job; print('open', flush=True); "
                               "sys.stdin.read()"],
        stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=service_env())
    try:
        assert holder.stdout.readline().strip() == "open"
        refused = burstlens("restore", str(made), str(current))
        assert refused.returncode == 2
        assert f"{current}: a running burstlens process" in refused.stderr
        assert not list(tmp_path.glob("data.before-restore-*"))
    finally:
        holder.communicate("", timeout=30)
    done = burstlens("restore", str(made), str(current))
    assert done.returncode == 0, done.stderr
    assert "restore" in done.stderr   # the progress bar
    assert len(list(tmp_path.glob("data.before-restore-*"))) == 1


def test_tampered_backup_is_refused_naming_the_file(made, tmp_path):
    """Property: one flipped byte in a stored corpus file, or a file the manifest does not
    list, makes restore exit 2 naming that file; no data dir is created."""
    altered = tmp_path / "altered"
    shutil.copytree(made, altered)
    victim = sorted((altered / "blobs" / "corpora").rglob("*.npz"))[0]
    raw = bytearray(victim.read_bytes())
    raw[len(raw) // 2] ^= 0x01
    victim.write_bytes(bytes(raw))
    refused = burstlens("restore", str(altered), str(tmp_path / "data"))
    assert refused.returncode == 2, refused.stderr
    assert f"{victim}: sha256" in refused.stderr and "differs from the manifest" in refused.stderr
    assert not (tmp_path / "data").exists()

    extra = tmp_path / "extra"
    shutil.copytree(made, extra)
    (extra / "blobs" / "note.txt").write_text("x")
    refused = burstlens("restore", str(extra), str(tmp_path / "data"))
    assert refused.returncode == 2
    assert f"{extra / 'blobs' / 'note.txt'}: in the backup but not in its manifest" in refused.stderr
    assert not (tmp_path / "data").exists()


def test_backup_of_a_newer_schema_is_refused_naming_both_versions(made, tmp_path):
    """Property: a backup whose store (and manifest, consistently) says schema version
    SCHEMA_VERSION + 1 is refused with exit 2, naming that version and the one this release
    reads; no data dir is created."""
    newer = tmp_path / "newer"
    shutil.copytree(made, newer)
    con = sqlite3.connect(newer / "burstlens.sqlite3")
    con.execute(f"PRAGMA user_version = {SCHEMA_VERSION + 1}")
    con.close()
    manifest = json.loads((newer / "manifest.json").read_text())
    data = (newer / "burstlens.sqlite3").read_bytes()
    manifest["files"]["burstlens.sqlite3"] = {"bytes": len(data),
                                              "sha256": hashlib.sha256(data).hexdigest()}
    manifest["schema_version"] = SCHEMA_VERSION + 1
    (newer / "manifest.json").write_text(json.dumps(manifest))
    refused = burstlens("restore", str(newer), str(tmp_path / "data"))
    assert refused.returncode == 2
    assert f"schema version {SCHEMA_VERSION + 1}" in refused.stderr
    assert f"reads schema version {SCHEMA_VERSION} and older" in refused.stderr
    assert not (tmp_path / "data").exists()


def test_bad_input_exits_2_naming_the_path(site, made, tmp_path):
    """Property: a data dir without a store, an existing DEST and a missing backup are each
    refused with exit 2 and the path in the message; nothing is created."""
    cases = [(("backup", str(tmp_path / "nothing"), str(tmp_path / "b")), tmp_path / "nothing"),
             (("backup", str(site), str(made)), made),
             (("restore", str(tmp_path / "none"), str(tmp_path / "d")), tmp_path / "none")]
    for args, named in cases:
        done = burstlens(*args)
        assert done.returncode == 2 and f"{named}:" in done.stderr, (args, done.stderr)
        assert "Traceback" not in done.stderr
    assert not (tmp_path / "b").exists() and not (tmp_path / "d").exists()
    assert os.listdir(tmp_path) == []
