"""The job store: one SQLite file (WAL, ``synchronous=FULL``) plus a blob folder under the data dir.

Durability rules (docs/design.md §7):
- every write that the API acknowledges is COMMITted first (``synchronous=FULL`` makes the commit
  survive a power cut, not just a process kill);
- claims and other read-modify-write steps run inside ``BEGIN IMMEDIATE`` so two workers never
  take the same job (a deferred BEGIN would fail at the first write under contention);
- every worker write names the owner and the attempt it holds; a worker whose lease expired and
  was reclaimed matches no row and gets :class:`LeaseLost`, so it cannot overwrite its successor;
- blobs are written to a temp file, fsynced, then ``os.replace``d into place (and the folder
  fsynced), so a reader sees either the old file or the whole new one;
- blob paths are kept relative to the data dir, so a data dir can be moved or restored elsewhere.

The schema carries a version (SQLite's ``user_version``, :data:`SCHEMA_VERSION`). Opening an
older data dir migrates it once, in one transaction; a newer one is refused
(:class:`DataDirTooNew`) with both versions named.

A job is one of :data:`KINDS` and moves through :data:`STATES`: ``waiting`` → ``working`` →
``done``, ``error`` or ``withdrawn`` (a lease that expires puts a working job back in reach of
:meth:`Store.claim`).
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

STATES = ("waiting", "working", "done", "error", "withdrawn")
FINAL_STATES = ("done", "error", "withdrawn")
ACTIVE_STATES = ("waiting", "working")
# search: tune a filterbank on a corpus; check: judge a done search's filterbank on new data;
# transform: a done search's filterbank over continuous records into a Zarr store
KINDS = ("search", "check", "transform")

# The data dir's schema version, kept in the SQLite file's header (PRAGMA user_version).
# 1: the first release (no version written, so it reads as 0); 2: job states and times of our
# own names, job kinds, blob paths relative to the data dir.
SCHEMA_VERSION = 2

_SCHEMA = (
    """CREATE TABLE IF NOT EXISTS tokens (
    id TEXT PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,
    tenant TEXT NOT NULL,
    token_sha256 TEXT NOT NULL,
    created_at REAL NOT NULL,
    revoked_at REAL
)""",
    """CREATE TABLE IF NOT EXISTS corpora (
    id TEXT PRIMARY KEY,
    tenant TEXT NOT NULL,
    created_at REAL NOT NULL,
    files TEXT NOT NULL,
    summary TEXT NOT NULL,
    bytes INTEGER NOT NULL,
    source_hash TEXT
)""",
    """CREATE TABLE IF NOT EXISTS jobs (
    id TEXT PRIMARY KEY,
    tenant TEXT NOT NULL,
    corpus_id TEXT NOT NULL,
    settings TEXT NOT NULL,
    state TEXT NOT NULL,
    submitted_at REAL NOT NULL,
    updated_at REAL NOT NULL,
    started_at REAL,
    ended_at REAL,
    attempts INTEGER NOT NULL DEFAULT 0,
    owner TEXT,
    lease_until REAL,
    withdraw_requested INTEGER NOT NULL DEFAULT 0,
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
    kind TEXT NOT NULL DEFAULT 'search',
    parent_id TEXT,
    UNIQUE (tenant, idempotency_key)
)""",
    "CREATE INDEX IF NOT EXISTS jobs_by_state ON jobs (state, submitted_at)",
    "CREATE INDEX IF NOT EXISTS jobs_by_tenant ON jobs (tenant, submitted_at)",
    "CREATE INDEX IF NOT EXISTS jobs_by_parent ON jobs (parent_id, kind, ended_at)",
    """CREATE TABLE IF NOT EXISTS job_rounds (
    job_id TEXT NOT NULL,
    attempt INTEGER NOT NULL,
    at REAL NOT NULL,
    stage TEXT,
    round INTEGER,
    evaluations INTEGER,
    new_evaluations INTEGER NOT NULL DEFAULT 0,
    best_objective REAL
)""",
    "CREATE INDEX IF NOT EXISTS job_rounds_by_time ON job_rounds (at)",
    """CREATE TABLE IF NOT EXISTS evaluations (
    job_id TEXT NOT NULL,
    seq INTEGER NOT NULL,
    stage TEXT,
    round INTEGER,
    params TEXT,
    objective REAL,
    seconds REAL,
    PRIMARY KEY (job_id, seq)
)""",
)

# schema 1 → 2, in one transaction with the version bump (SQLite's DDL is transactional, so a
# crash part-way leaves the schema-1 file as it was)
_STATE_NAMES_1_TO_2 = {"queued": "waiting", "running": "working", "succeeded": "done",
                       "failed": "error", "cancelled": "withdrawn"}
_MIGRATE_1_TO_2 = (
    "ALTER TABLE jobs RENAME COLUMN created_at TO submitted_at",
    "ALTER TABLE jobs RENAME COLUMN finished_at TO ended_at",
    "ALTER TABLE jobs RENAME COLUMN cancel_requested TO withdraw_requested",
    "ALTER TABLE jobs ADD COLUMN kind TEXT NOT NULL DEFAULT 'search'",
    "ALTER TABLE jobs ADD COLUMN parent_id TEXT",
    "UPDATE jobs SET state = CASE state "
    + " ".join(f"WHEN '{a}' THEN '{b}'" for a, b in _STATE_NAMES_1_TO_2.items())
    + " ELSE state END",
    "UPDATE jobs SET stop_reason = 'withdrawn' WHERE stop_reason = 'cancelled' AND state = 'withdrawn'",
    # schema 1 kept a final job's last checkpoint path after deleting the file
    "UPDATE jobs SET checkpoint_path = NULL, checkpoint_sha256 = NULL "
    "WHERE state IN ('done', 'error', 'withdrawn')",
    # schema 1 kept absolute paths, which break when a data dir is moved or restored elsewhere
    "UPDATE jobs SET result_dir = substr(result_dir, instr(result_dir, '/blobs/') + 1) "
    "WHERE instr(result_dir, '/blobs/') > 0",
    "UPDATE jobs SET checkpoint_path = substr(checkpoint_path, instr(checkpoint_path, '/blobs/') + 1) "
    "WHERE instr(checkpoint_path, '/blobs/') > 0",
    "CREATE INDEX IF NOT EXISTS jobs_by_parent ON jobs (parent_id, kind, ended_at)",
)
MIGRATIONS = {1: _MIGRATE_1_TO_2}


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


class DataDirTooNew(StoreError):
    """The data dir was written by a newer release, whose schema this one cannot read."""


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
    job["withdraw_requested"] = bool(job["withdraw_requested"])
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
        self.schema_version = self._open_schema()

    def _open_schema(self) -> int:
        """Create the schema in a new data dir, migrate an older one, refuse a newer one.

        Every step runs inside one ``BEGIN IMMEDIATE`` transaction with the version bump, so
        two processes opening the store at once migrate it once, and a crash part-way leaves
        the older schema as it was. Returns the version now on disk (:data:`SCHEMA_VERSION`).
        """
        with self.transaction() as con:
            version = con.execute("PRAGMA user_version").fetchone()[0]
            if version > SCHEMA_VERSION:
                raise DataDirTooNew(
                    f"{self.data_dir} holds schema version {version}, written by a newer "
                    f"burstlens; this release reads schema version {SCHEMA_VERSION} and older. "
                    f"Run the newer release, or restore a backup made by this one")
            has_jobs = con.execute("SELECT 1 FROM sqlite_master WHERE type = 'table' AND "
                                   "name = 'jobs'").fetchone() is not None
            if version == 0 and has_jobs:
                version = 1     # the first release wrote no version
            if version == 0:
                for statement in _SCHEMA:
                    con.execute(statement)
            else:
                for step in range(version, SCHEMA_VERSION):
                    for statement in MIGRATIONS[step]:
                        con.execute(statement)
            if version != SCHEMA_VERSION:
                # PRAGMA takes no parameters; the value is our own integer
                con.execute(f"PRAGMA user_version = {SCHEMA_VERSION:d}")
        return SCHEMA_VERSION

    def path(self, stored: str | None) -> Path | None:
        """A blob path as the store keeps it (relative to the data dir) made absolute."""
        return None if stored is None else self.data_dir / stored

    def relative(self, path: str | os.PathLike) -> str:
        """How the store keeps a blob path: relative to the data dir, so the data dir can move."""
        return Path(path).resolve().relative_to(self.data_dir.resolve()).as_posix()

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
                                 "('waiting', 'working')", (corpus_id,)).fetchone()[0]
            if active:
                raise Conflict(f"corpus {corpus_id!r} is used by {active} waiting or working "
                               "job(s); withdraw them first")
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
                   idempotency_key: str | None = None, request_sha256: str | None = None,
                   kind: str = "search", parent_id: str | None = None
                   ) -> tuple[dict[str, Any], bool]:
        """Queue a job (COMMITted before returning). Returns ``(job, created)``.

        Same tenant + idempotency key + request hash → the existing job and ``created=False``;
        same key with another request → :class:`IdempotencyMismatch`. A ``check`` or
        ``transform`` job names its ``parent_id``: a search of this tenant that is done.
        """
        if kind not in KINDS:
            raise ValueError(f"kind {kind!r} is not one of {KINDS}")
        with self.transaction() as con:
            if idempotency_key is not None:
                row = con.execute("SELECT * FROM jobs WHERE tenant = ? AND idempotency_key = ?",
                                  (tenant, idempotency_key)).fetchone()
                if row is not None:
                    if row["request_sha256"] != request_sha256:
                        raise IdempotencyMismatch(
                            "this Idempotency-Key was already used with a different request body")
                    return _job_dict(row), False
            if kind != "search":
                parent = con.execute("SELECT tenant, state, kind FROM jobs WHERE id = ?",
                                     (parent_id,)).fetchone()
                if parent is None or parent["tenant"] != tenant:
                    raise NotFound(f"no job {parent_id!r}")
                if parent["kind"] != "search" or parent["state"] != "done":
                    raise Conflict(f"job {parent_id!r} is a {parent['kind']} that is "
                                   f"{parent['state']}; a {kind} needs a search that is done")
            corpus = con.execute("SELECT tenant FROM corpora WHERE id = ?", (corpus_id,)).fetchone()
            if corpus is None or corpus["tenant"] != tenant:
                raise NotFound(f"no corpus {corpus_id!r}")
            waiting = con.execute("SELECT COUNT(*) FROM jobs WHERE tenant = ? AND state = 'waiting'",
                                  (tenant,)).fetchone()[0]
            if waiting >= max_queued:
                raise QueueFull(f"{waiting} jobs already waiting for this tenant (limit "
                                f"{max_queued}); wait for some to start or withdraw them")
            job_id = uuid.uuid4().hex
            now = _now()
            con.execute("INSERT INTO jobs (id, tenant, corpus_id, settings, state, submitted_at, "
                        "updated_at, idempotency_key, request_sha256, kind, parent_id) "
                        "VALUES (?, ?, ?, ?, 'waiting', ?, ?, ?, ?, ?, ?)",
                        (job_id, tenant, corpus_id, json.dumps(settings), now, now,
                         idempotency_key, request_sha256, kind, parent_id))
            row = con.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return _job_dict(row), True

    def get_job(self, job_id: str, tenant: str | None) -> dict[str, Any]:
        rows = self._query("SELECT * FROM jobs WHERE id = ?", (job_id,))
        if not rows or (tenant is not None and rows[0]["tenant"] != tenant):
            raise NotFound(f"no job {job_id!r}")
        return _job_dict(rows[0])

    def list_jobs(self, tenant: str, state: str | None = None, limit: int = 100, *,
                  kind: str | None = None, parent_id: str | None = None) -> list[dict]:
        """This tenant's jobs, newest first, optionally of one state, kind or parent."""
        where, args = ["tenant = ?"], [tenant]
        for column, value in (("state", state), ("kind", kind), ("parent_id", parent_id)):
            if value is not None:
                where.append(f"{column} = ?")
                args.append(value)
        rows = self._query(f"SELECT * FROM jobs WHERE {' AND '.join(where)} "
                           "ORDER BY submitted_at DESC LIMIT ?", (*args, limit))
        return [_job_dict(r) for r in rows]

    def withdraw_job(self, job_id: str, tenant: str) -> dict[str, Any]:
        """Withdraw a waiting job at once; flag a working one (its worker stops at the next
        heartbeat)."""
        with self.transaction() as con:
            row = con.execute("SELECT * FROM jobs WHERE id = ?", (job_id,)).fetchone()
            if row is None or row["tenant"] != tenant:
                raise NotFound(f"no job {job_id!r}")
            now = _now()
            if row["state"] == "waiting":
                con.execute("UPDATE jobs SET state = 'withdrawn', stop_reason = 'withdrawn', "
                            "ended_at = ?, updated_at = ? WHERE id = ?", (now, now, job_id))
            elif row["state"] == "working":
                con.execute("UPDATE jobs SET withdraw_requested = 1, updated_at = ? WHERE id = ?",
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

    def last_checks(self) -> list[dict[str, Any]]:
        """For every search with a check that is done, its latest such check (the id of the
        search as ``parent_id``, the check's ``id``, ``ended_at`` and ``summary``)."""
        rows = self._query(
            "SELECT j.parent_id, j.id, j.ended_at, j.summary FROM jobs j WHERE j.kind = 'check' "
            "AND j.state = 'done' AND j.ended_at = (SELECT MAX(k.ended_at) FROM jobs k WHERE "
            "k.parent_id = j.parent_id AND k.kind = 'check' AND k.state = 'done') "
            "ORDER BY j.parent_id")
        return [{"parent_id": r["parent_id"], "id": r["id"], "ended_at": r["ended_at"],
                 "summary": json.loads(r["summary"]) if r["summary"] else {}} for r in rows]

    def evaluation_totals(self, window_s: float = 60.0) -> tuple[int, float]:
        """(evaluations done over all jobs, evaluations per second over the last ``window_s``)."""
        total = self._query("SELECT COALESCE(SUM(new_evaluations), 0) FROM job_rounds")[0][0]
        recent = self._query("SELECT COALESCE(SUM(new_evaluations), 0) FROM job_rounds WHERE at > ?",
                             (_now() - window_s,))[0][0]
        return int(total), float(recent) / window_s

    def live_workers(self) -> int:
        row = self._query("SELECT COUNT(DISTINCT owner) FROM jobs WHERE state = 'working' "
                          "AND lease_until > ?", (_now(),))
        return int(row[0][0])

    def job_evaluations(self, job_id: str) -> list[dict[str, Any]]:
        rows = self._query("SELECT * FROM evaluations WHERE job_id = ? ORDER BY seq", (job_id,))
        return [dict(r) for r in rows]

    # -- jobs: worker side ------------------------------------------------------------------
    def claim(self, owner: str, lease_s: float, max_attempts: int) -> dict[str, Any] | None:
        """Take the oldest waiting job, or a working one whose lease expired; None if there is
        none.

        A reclaimed job past ``max_attempts`` ends in ``error`` (keeping its last error)
        instead, and a reclaimed job whose withdrawal was asked is withdrawn.
        """
        with self.transaction() as con:
            while True:
                now = _now()
                row = con.execute(
                    "SELECT * FROM jobs WHERE state = 'waiting' OR (state = 'working' AND "
                    "lease_until < ?) ORDER BY attempts, submitted_at LIMIT 1", (now,)).fetchone()
                if row is None:
                    return None
                if row["withdraw_requested"]:  # asked while working; the attempt then ended
                    con.execute("UPDATE jobs SET state = 'withdrawn', stop_reason = 'withdrawn', "
                                "owner = NULL, lease_until = NULL, ended_at = ?, updated_at = ? "
                                "WHERE id = ?", (now, now, row["id"]))
                    continue
                if row["attempts"] >= max_attempts:
                    lost = (f"worker {row['owner']} lost the job (lease expired) on attempt "
                            f"{row['attempts']}")
                    error = f"{row['error']}; then {lost}" if row["error"] else lost
                    con.execute("UPDATE jobs SET state = 'error', error = ?, owner = NULL, "
                                "lease_until = NULL, ended_at = ?, updated_at = ? WHERE id = ?",
                                (f"gave up after {row['attempts']} attempts: {error}", now, now,
                                 row["id"]))
                    continue
                if row["state"] == "working":
                    note = f"worker {row['owner']} lost the job (lease expired) on attempt {row['attempts']}"
                    con.execute("UPDATE jobs SET error = ? WHERE id = ?", (note, row["id"]))
                con.execute("UPDATE jobs SET state = 'working', owner = ?, attempts = attempts + 1, "
                            "lease_until = ?, started_at = COALESCE(started_at, ?), updated_at = ? "
                            "WHERE id = ?", (owner, now + lease_s, now, now, row["id"]))
                row = con.execute("SELECT * FROM jobs WHERE id = ?", (row["id"],)).fetchone()
                return _job_dict(row)

    def _owned_update(self, con: sqlite3.Connection, job: dict, sql: str, args: tuple) -> None:
        cur = con.execute(f"UPDATE jobs SET {sql}, updated_at = ? WHERE id = ? AND owner = ? "
                          "AND attempts = ? AND state = 'working'",
                          (*args, _now(), job["id"], job["owner"], job["attempts"]))
        if cur.rowcount != 1:
            raise LeaseLost(f"job {job['id']} attempt {job['attempts']} is no longer owned by "
                            f"{job['owner']}")

    def renew_lease(self, con: sqlite3.Connection, job: dict, lease_s: float) -> None:
        """Inside a write transaction the caller holds (:meth:`transaction`): push the lease of
        the job this owner and attempt hold to ``lease_s`` from now. Raises LeaseLost.
        :meth:`heartbeat` is this plus the withdraw flag; the fault experiments
        (reliability/faulty_worker.py) call it to stop a heartbeat before its COMMIT."""
        self._owned_update(con, job, "lease_until = ?", (_now() + lease_s,))

    def heartbeat(self, job: dict, lease_s: float) -> bool:
        """Renew the lease; returns True when a withdrawal was asked. Raises LeaseLost."""
        with self.transaction() as con:
            self.renew_lease(con, job, lease_s)
            row = con.execute("SELECT withdraw_requested FROM jobs WHERE id = ?",
                              (job["id"],)).fetchone()
        return bool(row["withdraw_requested"])

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

    def result_folder(self, job: dict) -> Path:
        """Where an attempt writes its results (recorded by :meth:`finish`)."""
        return self.blob_dir / "results" / job["id"] / f"attempt-{job['attempts']}"

    def record_checkpoint(self, job: dict, path: Path, sha256: str, round_: int | None) -> Path | None:
        """Point the job at a complete checkpoint blob; returns the previous blob's path."""
        with self.transaction() as con:
            old = con.execute("SELECT checkpoint_path FROM jobs WHERE id = ?", (job["id"],)).fetchone()
            self._owned_update(con, job, "checkpoint_path = ?, checkpoint_sha256 = ?, "
                               "checkpoint_round = ?", (self.relative(path), sha256, round_))
        return self.path(old["checkpoint_path"]) if old else None

    def drop_checkpoint(self, job: dict) -> None:
        """Forget a checkpoint found corrupt, so the next attempt starts clean."""
        with self.transaction() as con:
            self._owned_update(con, job, "checkpoint_path = NULL, checkpoint_sha256 = NULL, "
                               "checkpoint_round = NULL", ())

    def finish(self, job: dict, state: str, *, error: str | None = None,
               stop_reason: str | None = None, result_dir: Path | None = None,
               summary: dict | None = None, evaluations: list[dict] | None = None) -> None:
        """Move an owned working job to a final state; the evaluation audit log goes in with it."""
        assert state in FINAL_STATES, state
        with self.transaction() as con:
            now = _now()
            # a final job needs no checkpoint: forget it here, the worker deletes the file
            self._owned_update(con, job, "state = ?, error = ?, stop_reason = ?, result_dir = ?, "
                               "summary = ?, ended_at = ?, owner = NULL, lease_until = NULL, "
                               "checkpoint_path = NULL, checkpoint_sha256 = NULL",
                               (state, error, stop_reason,
                                self.relative(result_dir) if result_dir is not None else None,
                                json.dumps(summary) if summary is not None else None, now))
            if evaluations:
                con.execute("DELETE FROM evaluations WHERE job_id = ?", (job["id"],))
                con.executemany(
                    "INSERT INTO evaluations (job_id, seq, stage, round, params, objective, seconds) "
                    "VALUES (?, ?, ?, ?, ?, ?, ?)",
                    [(job["id"], i, e.get("stage"), e.get("round"), json.dumps(e.get("params")),
                      finite_or_none(e.get("objective")), e.get("seconds"))
                     for i, e in enumerate(evaluations)])

    def final_job_ids(self) -> set[str]:
        """Ids of the jobs that ended (done, error or withdrawn)."""
        return {r["id"] for r in self._query("SELECT id FROM jobs WHERE state IN "
                                             "('done', 'error', 'withdrawn')")}

    def release(self, job: dict) -> None:
        """Give an owned job back to the queue without using up an attempt (graceful stop)."""
        with self.transaction() as con:
            self._owned_update(con, job, "state = 'waiting', owner = NULL, lease_until = NULL, "
                               "attempts = attempts - 1", ())

    def retry_or_fail(self, job: dict, error: str, max_attempts: int) -> str:
        """After an error: queue the job again (``waiting``), or end it in ``error`` once
        ``max_attempts`` are used. Returns the new state."""
        with self.transaction() as con:
            if job["attempts"] >= max_attempts:
                self._owned_update(con, job, "state = 'error', error = ?, ended_at = ?, "
                                   "owner = NULL, lease_until = NULL",
                                   (f"gave up after {job['attempts']} attempts: {error}", _now()))
                return "error"
            self._owned_update(con, job, "state = 'waiting', error = ?, owner = NULL, "
                               "lease_until = NULL", (error,))
            return "waiting"
