"""The job store: one SQLite file (WAL, ``synchronous=FULL``) plus a blob folder under the data dir.

Durability rules (DESIGN §7):
- every write that the API acknowledges is COMMITted first (``synchronous=FULL`` makes the commit
  survive a power cut, not just a process kill);
- claims and other read-modify-write steps run inside ``BEGIN IMMEDIATE`` so two workers never
  take the same job (a deferred BEGIN would fail at the first write under contention);
- every worker write names the owner and the attempt it holds; a worker whose lease expired and
  was reclaimed matches no row and gets :class:`LeaseLost`, so it cannot overwrite its successor;
- blobs are written to a temp file, fsynced, then ``os.replace``d into place (and the folder
  fsynced), so a reader sees either the old file or the whole new one.
"""
from __future__ import annotations

import json
import os
import shutil
import sqlite3
import threading
import time
import uuid
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from burstlens.search.safe_io import finite_or_none

STATES = ("queued", "running", "succeeded", "failed", "cancelled")
FINAL_STATES = ("succeeded", "failed", "cancelled")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS tokens (
    id TEXT PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    tenant TEXT NOT NULL,
    token_sha256 TEXT NOT NULL,
    created_at REAL NOT NULL,
    revoked_at REAL
);
CREATE TABLE IF NOT EXISTS corpora (
    id TEXT PRIMARY KEY,
    tenant TEXT NOT NULL,
    created_at REAL NOT NULL,
    files TEXT NOT NULL,
    summary TEXT NOT NULL,
    bytes INTEGER NOT NULL,
    source_hash TEXT
);
CREATE TABLE IF NOT EXISTS jobs (
    id TEXT PRIMARY KEY,
    tenant TEXT NOT NULL,
    corpus_id TEXT NOT NULL,
    settings TEXT NOT NULL,
    state TEXT NOT NULL,
    created_at REAL NOT NULL,
    updated_at REAL NOT NULL,
    started_at REAL,
    finished_at REAL,
    attempts INTEGER NOT NULL DEFAULT 0,
    owner TEXT,
    lease_until REAL,
    cancel_requested INTEGER NOT NULL DEFAULT 0,
    progress TEXT NOT NULL DEFAULT '{}',
    error TEXT,
    stop_reason TEXT,
    idempotency_key TEXT,
    request_sha256 TEXT,
    checkpoint_path TEXT,
    checkpoint_sha256 TEXT,
    checkpoint_round INTEGER,
    result_dir TEXT,
    summary TEXT,
    UNIQUE (tenant, idempotency_key)
);
CREATE INDEX IF NOT EXISTS jobs_by_state ON jobs (state, created_at);
CREATE INDEX IF NOT EXISTS jobs_by_tenant ON jobs (tenant, created_at);
CREATE TABLE IF NOT EXISTS job_rounds (
    job_id TEXT NOT NULL,
    attempt INTEGER NOT NULL,
    at REAL NOT NULL,
    stage TEXT,
    round INTEGER,
    evaluations INTEGER,
    new_evaluations INTEGER NOT NULL DEFAULT 0,
    best_objective REAL
);
CREATE INDEX IF NOT EXISTS job_rounds_by_time ON job_rounds (at);
CREATE TABLE IF NOT EXISTS evaluations (
    job_id TEXT NOT NULL,
    seq INTEGER NOT NULL,
    stage TEXT,
    round INTEGER,
    params TEXT,
    objective REAL,
    seconds REAL,
    PRIMARY KEY (job_id, seq)
);
"""


class StoreError(Exception):
    """Base of the store's expected failures (each maps to one HTTP status in the API)."""


class NotFound(StoreError):
    pass


class Conflict(StoreError):
    pass


class QueueFull(StoreError):
    pass


class IdempotencyMismatch(StoreError):
    pass


class LeaseLost(StoreError):
    """The worker no longer owns this attempt of the job (its lease was reclaimed)."""


def fsync_dir(path: Path) -> None:
    """fsync a directory so a rename inside it survives a crash (POSIX)."""
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_blob(path: Path, chunks: bytes | Iterable[bytes]) -> int:
    """Write ``chunks`` to ``path`` atomically: temp file in the same folder, fsync, os.replace.

    Returns the number of bytes written. On any error the temp file is removed and the old
    content of ``path`` (if any) is untouched.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(f".{path.name}.{uuid.uuid4().hex}.tmp")
    if isinstance(chunks, (bytes, bytearray, memoryview)):
        chunks = [bytes(chunks)]
    size = 0
    try:
        with open(tmp, "wb") as fh:
            for chunk in chunks:
                fh.write(chunk)
                size += len(chunk)
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    fsync_dir(path.parent)
    return size


def _now() -> float:
    return time.time()


def _job_dict(row: sqlite3.Row) -> dict[str, Any]:
    job = dict(row)
    job["settings"] = json.loads(job["settings"])
    job["progress"] = json.loads(job["progress"] or "{}")
    job["summary"] = json.loads(job["summary"]) if job["summary"] else None
    job["cancel_requested"] = bool(job["cancel_requested"])
    return job


class Store:
    """SQLite job store and blob folder under ``data_dir`` (safe across threads and processes)."""

    def __init__(self, data_dir: str | os.PathLike):
        self.data_dir = Path(data_dir)
        self.db_path = self.data_dir / "burstlens.sqlite3"
        self.blob_dir = self.data_dir / "blobs"
        self.tmp_dir = self.data_dir / "tmp"
        for folder in (self.data_dir, self.blob_dir, self.tmp_dir,
                       self.blob_dir / "corpora", self.blob_dir / "checkpoints",
                       self.blob_dir / "results"):
            folder.mkdir(parents=True, exist_ok=True)
        self._local = threading.local()
        con = self.connection()
        con.execute("PRAGMA journal_mode=WAL")
        con.executescript(_SCHEMA)

    # -- connections ------------------------------------------------------------------------
    def connection(self) -> sqlite3.Connection:
        """This thread's connection (opened on first use; ``synchronous=FULL``, 30 s busy
        timeout). For reads; writes go through :meth:`transaction`."""
        # one connection per thread and process (a forked child must not reuse its parent's)
        con = getattr(self._local, "con", None)
        if con is None or self._local.pid != os.getpid():
            con = sqlite3.connect(self.db_path, timeout=30.0, isolation_level=None,
                                  check_same_thread=False)
            con.row_factory = sqlite3.Row
            con.execute("PRAGMA synchronous=FULL")
            con.execute("PRAGMA busy_timeout=30000")
            self._local.con, self._local.pid = con, os.getpid()
        return con

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        """A write transaction taken with BEGIN IMMEDIATE; COMMIT on success, ROLLBACK on error."""
        con = self.connection()
        con.execute("BEGIN IMMEDIATE")
        try:
            yield con
            con.execute("COMMIT")
        except BaseException:
            # COMMIT itself can fail (busy, disk full, a deferred constraint) and leave the
            # transaction open; a later BEGIN on this connection would then fail every time
            if con.in_transaction:
                con.execute("ROLLBACK")
            raise

    def _query(self, sql: str, args: tuple = ()) -> list[sqlite3.Row]:
        return self.connection().execute(sql, args).fetchall()

    def close(self) -> None:
        """Close this thread's connection (a later call opens a new one)."""
        con = getattr(self._local, "con", None)
        if con is not None:
            con.close()
            self._local.con = None

    # -- tokens -----------------------------------------------------------------------------
    def add_token(self, name: str, tenant: str, token_sha256: str) -> str:
        token_id = uuid.uuid4().hex
        try:
            with self.transaction() as con:
                con.execute("INSERT INTO tokens (id, name, tenant, token_sha256, created_at) "
                            "VALUES (?, ?, ?, ?, ?)", (token_id, name, tenant, token_sha256, _now()))
        except sqlite3.IntegrityError:
            raise Conflict(f"a token named {name!r} already exists") from None
        return token_id

    def revoke_token(self, name: str) -> bool:
        with self.transaction() as con:
            cur = con.execute("UPDATE tokens SET revoked_at = ? WHERE name = ? AND revoked_at IS NULL",
                              (_now(), name))
        return cur.rowcount == 1

    def active_tokens(self) -> list[dict[str, Any]]:
        rows = self._query("SELECT id, name, tenant, token_sha256, created_at FROM tokens "
                           "WHERE revoked_at IS NULL ORDER BY created_at")
        return [dict(r) for r in rows]

    def list_tokens(self) -> list[dict[str, Any]]:
        rows = self._query("SELECT name, tenant, created_at, revoked_at FROM tokens ORDER BY created_at")
        return [dict(r) for r in rows]

    def has_tokens(self) -> bool:
        return bool(self._query("SELECT 1 FROM tokens WHERE revoked_at IS NULL LIMIT 1"))

    # -- corpora ----------------------------------------------------------------------------
    def new_upload_dir(self) -> Path:
        """A fresh folder under tmp/ for an upload in progress (never under a client's name)."""
        path = self.tmp_dir / f"upload-{uuid.uuid4().hex}"
        path.mkdir()
        return path

    def corpus_dir(self, corpus_id: str) -> Path:
        return self.blob_dir / "corpora" / corpus_id

    def add_corpus(self, tenant: str, upload_dir: Path, files: list[dict], summary: dict,
                   source_hash: str | None) -> dict[str, Any]:
        """Move a checked upload into place and record it; acknowledged only after COMMIT.

        ``files`` entries carry ``stored`` (the name inside ``upload_dir``); the stored record
        keeps those relative names, so moving the data dir keeps the corpus readable.
        """
        corpus_id = uuid.uuid4().hex
        final = self.corpus_dir(corpus_id)
        for entry in os.scandir(upload_dir):
            fd = os.open(entry.path, os.O_RDONLY)
            try:
                os.fsync(fd)
            finally:
                os.close(fd)
        os.replace(upload_dir, final)
        fsync_dir(final.parent)
        total = sum(int(f["bytes"]) for f in files)
        try:
            with self.transaction() as con:
                con.execute("INSERT INTO corpora (id, tenant, created_at, files, summary, bytes, "
                            "source_hash) VALUES (?, ?, ?, ?, ?, ?, ?)",
                            (corpus_id, tenant, _now(), json.dumps(files), json.dumps(summary),
                             total, source_hash))
        except BaseException:
            shutil.rmtree(final, ignore_errors=True)
            raise
        return self.get_corpus(corpus_id, tenant)

    def get_corpus(self, corpus_id: str, tenant: str | None) -> dict[str, Any]:
        """The corpus record; ``tenant=None`` skips the tenant check (workers only)."""
        rows = self._query("SELECT * FROM corpora WHERE id = ?", (corpus_id,))
        if not rows or (tenant is not None and rows[0]["tenant"] != tenant):
            raise NotFound(f"no corpus {corpus_id!r}")
        corpus = dict(rows[0])
        corpus["files"] = json.loads(corpus["files"])
        corpus["summary"] = json.loads(corpus["summary"])
        return corpus

    def corpus_paths(self, corpus: dict[str, Any]) -> list[Path]:
        folder = self.corpus_dir(corpus["id"])
        return [folder / f["stored"] for f in corpus["files"]]

    def delete_corpus(self, corpus_id: str, tenant: str) -> None:
        with self.transaction() as con:
            row = con.execute("SELECT tenant FROM corpora WHERE id = ?", (corpus_id,)).fetchone()
            if row is None or row["tenant"] != tenant:
                raise NotFound(f"no corpus {corpus_id!r}")
            active = con.execute("SELECT COUNT(*) FROM jobs WHERE corpus_id = ? AND state IN "
                                 "('queued', 'running')", (corpus_id,)).fetchone()[0]
            if active:
                raise Conflict(f"corpus {corpus_id!r} is used by {active} queued or running job(s); "
                               "cancel them first")
            con.execute("DELETE FROM corpora WHERE id = ?", (corpus_id,))
        shutil.rmtree(self.corpus_dir(corpus_id), ignore_errors=True)

    def sweep(self) -> None:
        """Remove what a crash can leave behind: unfinished uploads and unrecorded corpus folders."""
        for entry in os.scandir(self.tmp_dir):
            shutil.rmtree(entry.path, ignore_errors=True) if entry.is_dir() else os.unlink(entry.path)
        known = {r["id"] for r in self._query("SELECT id FROM corpora")}
        for entry in os.scandir(self.blob_dir / "corpora"):
            if entry.name not in known:
                shutil.rmtree(entry.path, ignore_errors=True)

    # -- jobs: API side ---------------------------------------------------------------------
    def create_job(self, tenant: str, corpus_id: str, settings: dict, *, max_queued: int,
                   idempotency_key: str | None = None, request_sha256: str | None = None
                   ) -> tuple[dict[str, Any], bool]:
        """Queue a job (COMMITted before returning). Returns ``(job, created)``.

        Same tenant + idempotency key + request hash → the existing job and ``created=False``;
        same key with another request → :class:`IdempotencyMismatch`.
        """
        with self.transaction() as con:
            if idempotency_key is not None:
                row = con.execute("SELECT * FROM jobs WHERE tenant = ? AND idempotency_key = ?",
                                  (tenant, idempotency_key)).fetchone()
                if row is not None:
                    if row["request_sha256"] != request_sha256:
                        raise IdempotencyMismatch(
                            "this Idempotency-Key was already used with a different request body")
                    return _job_dict(row), False
            corpus = con.execute("SELECT tenant FROM corpora WHERE id = ?", (corpus_id,)).fetchone()
            if corpus is None or corpus["tenant"] != tenant:
                raise NotFound(f"no corpus {corpus_id!r}")
            queued = con.execute("SELECT COUNT(*) FROM jobs WHERE tenant = ? AND state = 'queued'",
                                 (tenant,)).fetchone()[0]
            if queued >= max_queued:
                raise QueueFull(f"{queued} jobs already queued for this tenant (limit {max_queued}); "
                                "wait for some to start or cancel them")
            job_id = uuid.uuid4().hex
            now = _now()
            con.execute("INSERT INTO jobs (id, tenant, corpus_id, settings, state, created_at, "
                        "updated_at, idempotency_key, request_sha256) "
                        "VALUES (?, ?, ?, ?, 'queued', ?, ?, ?, ?)",
                        (job_id, tenant, corpus_id, json.dumps(settings), now, now,
                         idempotency_key, request_sha256))
            row = con.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return _job_dict(row), True

    def get_job(self, job_id: str, tenant: str | None) -> dict[str, Any]:
        rows = self._query("SELECT * FROM jobs WHERE id = ?", (job_id,))
        if not rows or (tenant is not None and rows[0]["tenant"] != tenant):
            raise NotFound(f"no job {job_id!r}")
        return _job_dict(rows[0])

    def list_jobs(self, tenant: str, state: str | None = None, limit: int = 100) -> list[dict]:
        if state is None:
            rows = self._query("SELECT * FROM jobs WHERE tenant = ? ORDER BY created_at DESC "
                               "LIMIT ?", (tenant, limit))
        else:
            rows = self._query("SELECT * FROM jobs WHERE tenant = ? AND state = ? "
                               "ORDER BY created_at DESC LIMIT ?", (tenant, state, limit))
        return [_job_dict(r) for r in rows]

    def cancel_job(self, job_id: str, tenant: str) -> dict[str, Any]:
        """Cancel a queued job at once; flag a running one (its worker stops at the next heartbeat)."""
        with self.transaction() as con:
            row = con.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
            if row is None or row["tenant"] != tenant:
                raise NotFound(f"no job {job_id!r}")
            now = _now()
            if row["state"] == "queued":
                con.execute("UPDATE jobs SET state = 'cancelled', stop_reason = 'cancelled', "
                            "finished_at = ?, updated_at = ? WHERE id = ?", (now, now, job_id))
            elif row["state"] == "running":
                con.execute("UPDATE jobs SET cancel_requested = 1, updated_at = ? WHERE id = ?",
                            (now, job_id))
            else:
                raise Conflict(f"job {job_id!r} is already {row['state']}")
            row = con.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return _job_dict(row)

    def counts_by_state(self) -> dict[str, int]:
        counts = dict.fromkeys(STATES, 0)
        for row in self._query("SELECT state, COUNT(*) AS n FROM jobs GROUP BY state"):
            counts[row["state"]] = row["n"]
        return counts

    def evaluation_totals(self, window_s: float = 60.0) -> tuple[int, float]:
        """(evaluations done over all jobs, evaluations per second over the last ``window_s``)."""
        total = self._query("SELECT COALESCE(SUM(new_evaluations), 0) FROM job_rounds")[0][0]
        recent = self._query("SELECT COALESCE(SUM(new_evaluations), 0) FROM job_rounds WHERE at > ?",
                             (_now() - window_s,))[0][0]
        return int(total), float(recent) / window_s

    def live_workers(self) -> int:
        row = self._query("SELECT COUNT(DISTINCT owner) FROM jobs WHERE state = 'running' "
                          "AND lease_until > ?", (_now(),))
        return int(row[0][0])

    def job_evaluations(self, job_id: str) -> list[dict[str, Any]]:
        rows = self._query("SELECT * FROM evaluations WHERE job_id = ? ORDER BY seq", (job_id,))
        return [dict(r) for r in rows]

    # -- jobs: worker side ------------------------------------------------------------------
    def claim(self, owner: str, lease_s: float, max_attempts: int) -> dict[str, Any] | None:
        """Take the oldest queued job, or a running one whose lease expired; None if there is none.

        A reclaimed job past ``max_attempts`` is failed (keeping its last error) instead, and a
        reclaimed job whose cancel was requested is cancelled.
        """
        with self.transaction() as con:
            while True:
                now = _now()
                row = con.execute(
                    "SELECT * FROM jobs WHERE state = 'queued' OR (state = 'running' AND "
                    "lease_until < ?) ORDER BY attempts, created_at LIMIT 1", (now,)).fetchone()
                if row is None:
                    return None
                if row["cancel_requested"]:  # asked while running; the attempt then ended
                    con.execute("UPDATE jobs SET state = 'cancelled', stop_reason = 'cancelled', "
                                "owner = NULL, lease_until = NULL, finished_at = ?, updated_at = ? "
                                "WHERE id = ?", (now, now, row["id"]))
                    continue
                if row["attempts"] >= max_attempts:
                    lost = (f"worker {row['owner']} lost the job (lease expired) on attempt "
                            f"{row['attempts']}")
                    error = f"{row['error']}; then {lost}" if row["error"] else lost
                    con.execute("UPDATE jobs SET state = 'failed', error = ?, owner = NULL, "
                                "lease_until = NULL, finished_at = ?, updated_at = ? WHERE id = ?",
                                (f"gave up after {row['attempts']} attempts: {error}", now, now,
                                 row["id"]))
                    continue
                if row["state"] == "running":
                    note = f"worker {row['owner']} lost the job (lease expired) on attempt {row['attempts']}"
                    con.execute("UPDATE jobs SET error = ? WHERE id = ?", (note, row["id"]))
                con.execute("UPDATE jobs SET state = 'running', owner = ?, attempts = attempts + 1, "
                            "lease_until = ?, started_at = COALESCE(started_at, ?), updated_at = ? "
                            "WHERE id = ?", (owner, now + lease_s, now, now, row["id"]))
                row = con.execute("SELECT * FROM jobs WHERE id = ?", (row["id"],)).fetchone()
                return _job_dict(row)

    def _owned_update(self, con: sqlite3.Connection, job: dict, sql: str, args: tuple) -> None:
        cur = con.execute(f"UPDATE jobs SET {sql}, updated_at = ? WHERE id = ? AND owner = ? "
                          "AND attempts = ? AND state = 'running'",
                          (*args, _now(), job["id"], job["owner"], job["attempts"]))
        if cur.rowcount != 1:
            raise LeaseLost(f"job {job['id']} attempt {job['attempts']} is no longer owned by "
                            f"{job['owner']}")

    def renew_lease(self, con: sqlite3.Connection, job: dict, lease_s: float) -> None:
        """Inside a write transaction the caller holds (:meth:`transaction`): push the lease of
        the job this owner and attempt hold to ``lease_s`` from now. Raises LeaseLost.
        :meth:`heartbeat` is this plus the cancel flag; the fault experiments
        (reliability/faulty_worker.py) call it to stop a heartbeat before its COMMIT."""
        self._owned_update(con, job, "lease_until = ?", (_now() + lease_s,))

    def heartbeat(self, job: dict, lease_s: float) -> bool:
        """Renew the lease; returns True when a cancel was requested. Raises LeaseLost."""
        with self.transaction() as con:
            self.renew_lease(con, job, lease_s)
            row = con.execute("SELECT cancel_requested FROM jobs WHERE id = ?", (job["id"],)).fetchone()
        return bool(row["cancel_requested"])

    def record_progress(self, job: dict, progress: dict, new_evaluations: int) -> None:
        with self.transaction() as con:
            self._owned_update(con, job, "progress = ?", (json.dumps(progress),))
            con.execute("INSERT INTO job_rounds (job_id, attempt, at, stage, round, evaluations, "
                        "new_evaluations, best_objective) VALUES (?, ?, ?, ?, ?, ?, ?, ?)",
                        (job["id"], job["attempts"], _now(), progress.get("stage"),
                         progress.get("round"), progress.get("evaluations"), new_evaluations,
                         progress.get("best_objective")))

    def checkpoint_path(self, job: dict, seq: int) -> Path:
        return self.blob_dir / "checkpoints" / f"{job['id']}-{job['attempts']}-{seq}.pkl"

    def record_checkpoint(self, job: dict, path: Path, sha256: str, round_: int | None) -> str | None:
        """Point the job at a complete checkpoint blob; returns the previous blob's path."""
        with self.transaction() as con:
            old = con.execute("SELECT checkpoint_path FROM jobs WHERE id = ?", (job["id"],)).fetchone()
            self._owned_update(con, job, "checkpoint_path = ?, checkpoint_sha256 = ?, "
                               "checkpoint_round = ?", (str(path), sha256, round_))
        return old["checkpoint_path"] if old else None

    def drop_checkpoint(self, job: dict) -> None:
        """Forget a checkpoint found corrupt, so the next attempt starts clean."""
        with self.transaction() as con:
            self._owned_update(con, job, "checkpoint_path = NULL, checkpoint_sha256 = NULL, "
                               "checkpoint_round = NULL", ())

    def finish(self, job: dict, state: str, *, error: str | None = None,
               stop_reason: str | None = None, result_dir: str | None = None,
               summary: dict | None = None, evaluations: list[dict] | None = None) -> None:
        """Move an owned running job to a final state; the evaluation audit log goes in with it."""
        assert state in FINAL_STATES, state
        with self.transaction() as con:
            now = _now()
            self._owned_update(con, job, "state = ?, error = ?, stop_reason = ?, result_dir = ?, "
                               "summary = ?, finished_at = ?, owner = NULL, lease_until = NULL",
                               (state, error, stop_reason, result_dir,
                                json.dumps(summary) if summary is not None else None, now))
            if evaluations:
                con.execute("DELETE FROM evaluations WHERE job_id = ?", (job["id"],))
                con.executemany(
                    "INSERT INTO evaluations (job_id, seq, stage, round, params, objective, seconds) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [(job["id"], i, e.get("stage"), e.get("round"), json.dumps(e.get("params")),
                      finite_or_none(e.get("objective")), e.get("seconds"))
                     for i, e in enumerate(evaluations)])

    def release(self, job: dict) -> None:
        """Give an owned job back to the queue without using up an attempt (graceful stop)."""
        with self.transaction() as con:
            self._owned_update(con, job, "state = 'queued', owner = NULL, lease_until = NULL, "
                               "attempts = attempts - 1", ())

    def retry_or_fail(self, job: dict, error: str, max_attempts: int) -> str:
        """After an error: queue the job again, or fail it once ``max_attempts`` are used."""
        with self.transaction() as con:
            if job["attempts"] >= max_attempts:
                self._owned_update(con, job, "state = 'failed', error = ?, finished_at = ?, "
                                   "owner = NULL, lease_until = NULL",
                                   (f"gave up after {job['attempts']} attempts: {error}", _now()))
                return "failed"
            self._owned_update(con, job, "state = 'queued', error = ?, owner = NULL, "
                               "lease_until = NULL", (error,))
            return "queued"
