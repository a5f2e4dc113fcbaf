"""The SQLite job store: claims, leases, owner-conditioned writes, attempts, cancel, blobs."""
from __future__ import annotations

import sqlite3
import threading
import time

import pytest

from burstlens.service.store import LeaseLost, Store, write_blob


def _store_with_jobs(tmp_path, n: int) -> tuple[Store, list[str]]:
    store = Store(tmp_path)
    folder = store.new_upload_dir()
    (folder / "0000.npz").write_bytes(b"x")
    corpus = store.add_corpus("t", folder, [{"name": "a.npz", "stored": "0000.npz", "bytes": 1,
                                             "sha256": "0" * 64}], {}, None)
    ids = [store.create_job("t", corpus["id"], {"seed": i}, max_queued=100)[0]["id"] for i in range(n)]
    return store, ids


def test_concurrent_claims_take_each_job_once(tmp_path):
    """Workers claiming at the same time never take the same job: the claim's select and update
    run in one BEGIN IMMEDIATE transaction (SQLite documentation, "Transaction": IMMEDIATE takes
    the write lock at BEGIN, so a second claimer waits instead of reading the same row)."""
    _, ids = _store_with_jobs(tmp_path, 24)
    claimed: list[str] = []
    lock = threading.Lock()

    def claimer(k: int) -> None:
        store = Store(tmp_path)  # its own connection, as a separate worker would have
        while (job := store.claim(f"w{k}", 60.0, 3)) is not None:
            with lock:
                claimed.append(job["id"])

    threads = [threading.Thread(target=claimer, args=(k,)) for k in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(claimed) == sorted(ids)


def test_reclaimed_job_rejects_the_old_owner(tmp_path):
    """After its lease expires and another worker reclaims the job, every write of the first
    worker (heartbeat, progress, finish) is refused, and the successor's writes go through
    (leases with owner and attempt fencing; common practice for leased work queues)."""
    store, (job_id,) = _store_with_jobs(tmp_path, 1)
    first = store.claim("w1", 0.2, 3)
    time.sleep(0.3)
    second = store.claim("w2", 60.0, 3)
    assert second["id"] == job_id and second["attempts"] == 2
    with pytest.raises(LeaseLost):
        store.heartbeat(first, 60.0)
    with pytest.raises(LeaseLost):
        store.record_progress(first, {"round": 9}, 1)
    with pytest.raises(LeaseLost):
        store.finish(first, "done")
    assert store.heartbeat(second, 60.0) is False
    store.finish(second, "done")
    job = store.get_job(job_id, "t")
    assert job["state"] == "done" and job["owner"] is None


def test_attempt_limit_fails_with_the_last_error(tmp_path):
    """A job whose worker keeps dying is failed once max_attempts claims have been used, and the
    failure keeps the last error (docs/design.md §7)."""
    store, (job_id,) = _store_with_jobs(tmp_path, 1)
    for attempt in (1, 2):
        job = store.claim(f"w{attempt}", 0.1, 2)
        assert job["attempts"] == attempt
        time.sleep(0.15)
    assert store.claim("w3", 0.1, 2) is None
    job = store.get_job(job_id, "t")
    assert job["state"] == "error"
    assert "2 attempts" in job["error"] and "w2" in job["error"]


def test_error_retries_then_fails(tmp_path):
    """An attempt that raised goes back to the queue with its error, until the limit (docs/design.md §7)."""
    store, (job_id,) = _store_with_jobs(tmp_path, 1)
    job = store.claim("w", 60.0, 2)
    assert store.retry_or_fail(job, "RuntimeError: boom 1", 2) == "waiting"
    assert store.get_job(job_id, "t")["error"] == "RuntimeError: boom 1"
    job = store.claim("w", 60.0, 2)
    assert store.retry_or_fail(job, "RuntimeError: boom 2", 2) == "error"
    job = store.get_job(job_id, "t")
    assert job["state"] == "error" and job["error"].endswith("RuntimeError: boom 2")


def test_release_returns_the_attempt(tmp_path):
    """A graceful release (SIGTERM) queues the job again without using up an attempt."""
    store, (job_id,) = _store_with_jobs(tmp_path, 1)
    job = store.claim("w", 60.0, 3)
    store.release(job)
    job = store.get_job(job_id, "t")
    assert (job["state"], job["attempts"], job["owner"]) == ("waiting", 0, None)


def test_cancel_queued_and_running(tmp_path):
    """Cancel ends a queued job at once and flags a running one; the flag comes back through the
    running worker's heartbeat (docs/design.md §7)."""
    store, (a, b) = _store_with_jobs(tmp_path, 2)
    running = store.claim("w", 60.0, 3)
    queued_id = b if running["id"] == a else a
    assert store.withdraw_job(queued_id, "t")["state"] == "withdrawn"
    flagged = store.withdraw_job(running["id"], "t")
    assert flagged["state"] == "working" and flagged["withdraw_requested"]
    assert store.heartbeat(running, 60.0) is True
    assert store.claim("w2", 60.0, 3) is None  # the cancelled job is not claimable


def test_committed_job_is_visible_to_a_new_connection(tmp_path):
    """create_job returns only after COMMIT: an independent connection (another process) sees
    the row, and the database runs in WAL mode with synchronous=FULL (SQLite documentation,
    "Write-Ahead Logging", "PRAGMA synchronous")."""
    store, (job_id,) = _store_with_jobs(tmp_path, 1)
    other = sqlite3.connect(store.db_path)
    assert other.execute("SELECT state FROM jobs WHERE id = ?", (job_id,)).fetchone() == ("waiting",)
    assert other.execute("PRAGMA journal_mode").fetchone() == ("wal",)
    assert store.connection().execute("PRAGMA synchronous").fetchone()[0] == 2  # FULL
    other.close()


def test_write_blob_keeps_the_old_file_on_failure(tmp_path):
    """A blob write that fails half-way leaves the previous content and no temp file (write to a
    temp file, fsync, os.replace; common practice for crash-safe files)."""
    path = tmp_path / "blob.bin"
    write_blob(path, b"old")

    def chunks():
        yield b"new part"
        raise OSError("disk went away")

    with pytest.raises(OSError):
        write_blob(path, chunks())
    assert path.read_bytes() == b"old"
    assert [p.name for p in tmp_path.iterdir()] == ["blob.bin"]


def test_failed_commit_leaves_no_open_transaction(tmp_path):
    """When COMMIT itself fails, the write is rolled back and the connection can take the next
    transaction. A deferred foreign-key violation makes COMMIT fail and keeps the transaction
    open until the caller rolls it back (SQLite documentation, "SQLite Foreign Key Support",
    deferred foreign key constraints; the behaviour is from memory of that page)."""
    store, _ = _store_with_jobs(tmp_path, 1)
    con = store.connection()
    con.execute("PRAGMA foreign_keys = ON")  # only takes effect outside a transaction
    con.execute("CREATE TEMP TABLE parent (id INTEGER PRIMARY KEY)")
    con.execute("CREATE TEMP TABLE child (parent_id INTEGER REFERENCES parent (id) "
                "DEFERRABLE INITIALLY DEFERRED)")
    with pytest.raises(sqlite3.IntegrityError), store.transaction() as tx:
        tx.execute("INSERT INTO child (parent_id) VALUES (7)")  # checked at COMMIT
    assert not con.in_transaction
    assert con.execute("SELECT count(*) FROM child").fetchone()[0] == 0
    token_id = store.add_token("after", "t", "f" * 64)  # the next write transaction works
    assert token_id
