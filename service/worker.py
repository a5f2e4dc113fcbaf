"""Job worker: claim a job, run the search with leases and checkpoints, record the outcome.

One worker runs one job at a time:

1. ``claim`` (BEGIN IMMEDIATE) takes the oldest fresh job, else one whose lease expired;
2. a heartbeat thread renews the lease every third of its length and reads the withdraw flag;
3. the tuning pipeline ``service.tuning.tune`` (the one ``burstlens tune`` runs) fits the
   search with ``progress`` (→ the job's progress), ``checkpoint`` (→ a pickle blob whose
   sha256 is kept in the store) and ``resume_from`` (the last checkpoint, when this is a
   reclaimed job; a torn or corrupt one is detected and the job restarts clean);
4. the pipeline writes the result files under ``results/<job>/attempt-<n>/`` (server paths
   renamed to the client's file names; the report is rendered on its first request) and the
   job is finished — every store write conditioned on owner and attempt, so a worker that lost
   its lease changes nothing.

That is a ``search`` job; ``check`` and ``transform`` jobs (service.tuned_site) run the same
way, with the same leases, withdrawals and retries.

SIGTERM (or the parent ``serve`` going away): stop claiming, let the current round end with its
checkpoint, release the lease without using up an attempt, exit 0.

Hooks for tests and the fault experiments (reliability/): ``Worker(on_progress=f)`` calls
``f(run, info)`` as each progress report of an attempt (a :class:`JobRun`) arrives, before it is
stored; ``Worker(on_checkpoint=f)`` calls ``f(run, seq)`` as the attempt's ``seq``-th
checkpoint (from 1) starts, before its blob is written. A hook that calls
``worker.request_stop()`` there makes that checkpoint the attempt's last (the SIGTERM path).
"""
from __future__ import annotations

import errno
import hashlib
import logging
import os
import pickle
import signal
import socket
import sqlite3
import sys
import threading
import uuid
from collections.abc import Callable
from contextlib import nullcontext
from typing import Any

from burstlens.search.documents import JobRecord
from burstlens.search.settings import JobSettings
from burstlens.service import tuned_site, tuning, verdict
from burstlens.service.config import ServiceSettings
from burstlens.service.corpus_check import (CorpusRejected, CorpusTooLarge, enforce_limits, jsonable,
                                            load_corpus, renamer)
from burstlens.service.results import WINDOWS_NPY
from burstlens.service.store import DataDirTooNew, LeaseLost, NotFound, Store, write_blob

log = logging.getLogger("burstlens.worker")


def disk_full(exc: BaseException) -> bool:
    """Whether ``exc`` means the data dir's filesystem is full (a blob write's ENOSPC, or
    SQLite's SQLITE_FULL, which it reports as "database or disk is full")."""
    if isinstance(exc, OSError) and exc.errno == errno.ENOSPC:
        return True
    return isinstance(exc, sqlite3.OperationalError) and "disk is full" in str(exc)


class Terminated(Exception):
    """Raised inside ``fit`` right after a checkpoint was saved, when the worker must stop."""


class PermanentError(Exception):
    """Bad input that no retry can fix (settings, corpus gone or unreadable): fail at once."""


class Heartbeat(threading.Thread):
    """Renews one job's lease every ``lease_s / 3`` and records the withdraw flag or a lost lease."""

    def __init__(self, store: Store, job: dict, lease_s: float,
                 parent_alive: Callable[[], bool] = lambda: True, on_orphan=lambda: None):
        super().__init__(name=f"heartbeat-{job['id'][:8]}", daemon=True)
        self.store, self.job, self.lease_s = store, job, lease_s
        self.parent_alive, self.on_orphan = parent_alive, on_orphan
        self.withdrawn = False
        self.lost = False
        self._done = threading.Event()

    def run(self) -> None:
        while not self._done.wait(self.lease_s / 3.0):
            if not self.parent_alive():
                self.on_orphan()
            try:
                self.withdrawn = self.store.heartbeat(self.job, self.lease_s) or self.withdrawn
            except LeaseLost:
                self.lost = True
                log.info("job %s: lease no longer held", self.job["id"])
                return
            except Exception:  # a busy or briefly unavailable store: try again next beat
                log.exception("job %s: heartbeat failed", self.job["id"])

    def stop(self) -> None:
        self._done.set()
        self.join(timeout=5.0)


class Worker:
    """A job worker over ``settings.data_dir`` (see the module docstring)."""

    def __init__(self, settings: ServiceSettings, *, owner: str | None = None,
                 parent_pid: int | None = None,
                 on_progress: Callable[[JobRun, dict], None] | None = None,
                 on_checkpoint: Callable[[JobRun, int], None] | None = None):
        self.settings = settings
        self.store = Store(settings.data_dir)
        self.owner = owner or f"{socket.gethostname()}:{os.getpid()}:{uuid.uuid4().hex[:6]}"
        self.parent_pid = parent_pid
        self.on_progress, self.on_checkpoint = on_progress, on_checkpoint
        self.stopping = threading.Event()
        self._dask_client = None

    # -- the loop ---------------------------------------------------------------------------
    def parent_alive(self) -> bool:
        return self.parent_pid is None or os.getppid() == self.parent_pid

    def request_stop(self, *_args) -> None:
        self.stopping.set()

    def install_signal_handlers(self) -> None:
        signal.signal(signal.SIGTERM, self.request_stop)
        signal.signal(signal.SIGINT, self.request_stop)

    def run(self, *, max_jobs: int | None = None, exit_when_idle: bool = False) -> int:
        """Claim and run jobs until stopped; returns the process exit code (0)."""
        done, idle = 0, self.settings.poll_s
        log.info("worker %s on %s", self.owner, self.settings.data_dir)
        self.sweep_checkpoints()
        while not self.stopping.is_set() and (max_jobs is None or done < max_jobs):
            if not self.parent_alive():
                log.warning("parent process gone; stopping")
                break
            try:
                job = self.store.claim(self.owner, self.settings.lease_s, self.settings.max_attempts)
            except (sqlite3.OperationalError, OSError) as exc:
                # a full or locked store is an outage to wait out, not a reason to crash-loop
                idle = min(30.0, max(self.settings.poll_s, 2.0 * idle))
                log.warning("cannot claim a job (%s); retrying in %.1f s", exc, idle)
                self.stopping.wait(idle)
                continue
            idle = self.settings.poll_s
            if job is None:
                if exit_when_idle:
                    break
                self.stopping.wait(self.settings.poll_s)
                continue
            self.run_job(job)
            done += 1
        if self._dask_client is not None:
            self._dask_client.close()
        return 0

    def sweep_checkpoints(self) -> None:
        """Delete the checkpoint files of jobs that ended: a worker killed right after a job's
        final COMMIT never got to delete them (its successor would never read them)."""
        try:
            ended = self.store.final_job_ids()
            for path in (self.store.blob_dir / "checkpoints").iterdir():
                if path.name.lstrip(".").split("-", 1)[0] in ended:
                    path.unlink(missing_ok=True)
        except (sqlite3.OperationalError, OSError) as exc:  # an outage: the next start retries
            log.warning("could not sweep the checkpoints of ended jobs (%s)", exc)

    # -- one job ----------------------------------------------------------------------------
    def run_job(self, job: dict) -> str:
        """Run one claimed job to an outcome: done, error, withdrawn, waiting (a retry),
        released or lost. Returns that outcome."""
        log.info("job %s: attempt %d by %s", job["id"], job["attempts"], self.owner)
        beat = Heartbeat(self.store, job, self.settings.lease_s, self.parent_alive, self.request_stop)
        beat.start()
        run = JobRun(self, job, beat)
        try:
            outcome = run.execute()
        finally:
            beat.stop()
        log.info("job %s: %s", job["id"], outcome)
        return outcome

    def reading_mapper(self, paths):
        """``read_corpus``'s ``mapper`` with ``--dask ADDR`` when every Dask worker sees the
        corpus files (a shared data dir), else None: the files are then read here, as without
        Dask, and the log says why."""
        if not self.settings.dask:
            return None
        from burstlens.service.dask_backend import ClusterMap, ensure_client, sees_files

        self._dask_client = ensure_client(self._dask_client, self.settings.dask)
        if not sees_files(self._dask_client, paths):
            log.warning("the Dask workers do not see %s: reading the corpus on this host", paths[0])
            return None
        return ClusterMap(self._dask_client)

    def dask_context(self):
        """joblib's Dask backend on the cluster of ``--dask ADDR`` (service.dask_backend); a
        no-op without it. An unreachable scheduler fails the attempt with a clear reason."""
        if not self.settings.dask:
            return nullcontext()
        from burstlens.service.dask_backend import ensure_client, evaluations_on

        self._dask_client = ensure_client(self._dask_client, self.settings.dask)
        return evaluations_on(self._dask_client)


class JobRun:
    """One attempt at one job: the callbacks handed to ``fit`` and the attempt's state.

    ``job`` is the claimed job row, ``beat`` its :class:`Heartbeat` (``beat.withdrawn``: a
    withdrawal reached this attempt), ``worker`` the :class:`Worker` running it.
    """

    def __init__(self, worker: Worker, job: dict, beat: Heartbeat):
        self.worker, self.store, self.job, self.beat = worker, worker.store, job, beat
        self.settings = worker.settings
        self.seq = 0
        self.last_round: int | None = None
        self.last_evaluations = 0
        self.resumed = False
        self.checkpoint_problem: str | None = None
        self.progressed = False

    # callbacks ------------------------------------------------------------------------------
    def should_stop(self) -> bool:
        # SIGTERM is not a withdrawal: it ends at the next checkpoint (see checkpoint), so the job
        # resumes elsewhere instead of being judged on a partial search
        return self.beat.withdrawn or self.beat.lost

    def progress(self, info: dict) -> None:
        if self.worker.on_progress is not None:
            self.worker.on_progress(self, info)
        if self.beat.lost:
            raise LeaseLost(f"job {self.job['id']}: lease lost")
        self.progressed = True
        info = jsonable(dict(info))
        info["attempt"] = self.job["attempts"]
        info["resumed"] = self.resumed
        if self.checkpoint_problem:
            info["checkpoint_problem"] = self.checkpoint_problem
        evaluations = info.get("evaluations")
        new = 0
        if isinstance(evaluations, int):
            new = max(0, evaluations - self.last_evaluations)
            self.last_evaluations = max(self.last_evaluations, evaluations)
        if isinstance(info.get("round"), int):
            self.last_round = info["round"]
        self.store.record_progress(self.job, info, new)

    def checkpoint(self, state: Any) -> None:
        self.seq += 1
        if self.worker.on_checkpoint is not None:
            self.worker.on_checkpoint(self, self.seq)
        if self.beat.lost:
            raise LeaseLost(f"job {self.job['id']}: lease lost")
        data = pickle.dumps(state, protocol=pickle.HIGHEST_PROTOCOL)
        path = self.store.checkpoint_path(self.job, self.seq)
        write_blob(path, data)
        try:
            old = self.store.record_checkpoint(self.job, path, hashlib.sha256(data).hexdigest(),
                                               self.last_round)
        except LeaseLost:
            path.unlink(missing_ok=True)
            raise
        if old and old != path:
            old.unlink(missing_ok=True)
        if self.worker.stopping.is_set():
            raise Terminated("stopping after a saved checkpoint")

    # steps ----------------------------------------------------------------------------------
    def load_checkpoint(self) -> Any:
        """The last checkpoint's state, or None; a missing/torn/corrupt one is dropped (logged)."""
        path = self.store.path(self.job.get("checkpoint_path"))
        digest = self.job.get("checkpoint_sha256")
        if path is None:
            return None
        try:
            data = path.read_bytes()
            if hashlib.sha256(data).hexdigest() != digest:
                raise ValueError("sha256 does not match the store (torn or altered file)")
            state = pickle.loads(data)  # our own blob, verified by its digest
        except Exception as exc:
            log.warning("job %s: checkpoint %s unusable (%s); starting over", self.job["id"], path, exc)
            self.store.drop_checkpoint(self.job)
            path.unlink(missing_ok=True)
            # clients see this in the job's progress: the reason, never a server path
            reason = exc.strerror if isinstance(exc, OSError) and exc.strerror else str(exc)
            self.checkpoint_problem = f"last checkpoint unusable ({reason}); started over"
            return None
        self.resumed = True
        self.last_evaluations = int(self.job["progress"].get("evaluations") or 0)
        return state

    def prepare(self):
        """The job's checked settings (``jobs`` capped at this host's cores, or every Dask worker
        core), its corpus read as uploaded and within the limits, and the renamer of its
        stored paths to the client's file names. ``PermanentError`` for bad settings or a
        corpus gone or unreadable."""
        try:
            settings = JobSettings.from_mapping(dict(self.job["settings"]))
        except ValueError as exc:
            raise PermanentError(f"invalid settings: {exc}") from None
        try:
            record = self.store.get_corpus(self.job["corpus_id"], None)
        except NotFound:
            raise PermanentError(f"corpus {self.job['corpus_id']} no longer exists") from None
        options = {**record["summary"].get("read_options", {}), **settings.read_options()}
        paths = self.store.corpus_paths(record)
        names = [f["name"] for f in record["files"]]
        try:
            corpus = load_corpus(paths, names, options, mapper=self.worker.reading_mapper(paths))
            enforce_limits(corpus, self.settings)
        except (CorpusRejected, CorpusTooLarge) as exc:
            raise PermanentError(str(exc)) from None
        if self.settings.dask:
            jobs = -1 if settings.jobs == 1 else settings.jobs  # 1: every Dask worker core
        else:
            jobs = min(settings.jobs, os.cpu_count() or 1)
        return corpus, settings.replace(jobs=jobs), renamer(paths, names)

    def resume_refused(self, exc: ValueError) -> bool:
        """``service.tuning.fit``'s ``on_resume_refused``: the engine refused the checkpoint
        (another version, other settings or another corpus). Before any progress the job starts
        over, the problem kept in its progress; after some, the error is the attempt's."""
        if self.progressed:
            return False
        log.warning("job %s: checkpoint not resumable (%s); starting over", self.job["id"], exc)
        self.store.drop_checkpoint(self.job)
        self.checkpoint_problem = f"checkpoint not resumable: {exc}"
        self.resumed, self.last_evaluations = False, 0
        return True

    def keep_fit(self, _search) -> bool:
        """``service.tuning.tune``'s ``fitted``: a fit is written unless the lease was lost or
        the job withdrawn meanwhile (a finished fit is kept even on SIGTERM)."""
        return not (self.beat.lost or self.beat.withdrawn)

    def execute(self) -> str:
        if self.job["kind"] != "search":
            return self._execute_on_site()
        job = self.job
        try:
            corpus, settings, rename = self.prepare()
            resume = self.load_checkpoint()
            with self.worker.dask_context():
                tuned = tuning.tune(
                    corpus, settings, self.store.result_folder(job), progress=self.progress,
                    should_stop=self.should_stop, checkpoint=self.checkpoint,
                    resume_from=resume, on_resume_refused=self.resume_refused,
                    fitted=self.keep_fit, job=JobRecord(job["id"], job["settings"]),
                    rename=rename, final_newline=True, write=write_blob, extra=(WINDOWS_NPY,))
        except Terminated:
            return self._release()
        except LeaseLost:
            return "lost"
        except PermanentError as exc:
            return self._finish_quietly("error", error=str(exc))
        except tuning.ResultsNotWritten as exc:
            log.exception("job %s: writing the results failed", job["id"])
            try:
                return self.store.retry_or_fail(job, f"writing results: {exc}",
                                                self.settings.max_attempts)
            except LeaseLost:
                return "lost"
        except Exception as exc:
            return self._after(exc)
        if self.beat.lost:
            return "lost"
        if tuned is None:  # withdrawn while the fit ran
            return self._finish_quietly("withdrawn", stop_reason="withdrawn")
        return self._succeed(tuned)

    def _execute_on_site(self) -> str:
        """A check or a transform (service.tuned_site): its result folder and summary."""
        job = self.job
        try:
            with self.worker.dask_context():
                run = tuned_site.run_check if job["kind"] == "check" else tuned_site.run_transform
                folder, summary = run(self)
        except LeaseLost:
            return "lost"
        except PermanentError as exc:
            return self._finish_quietly("error", error=str(exc))
        except tuned_site.Interrupted:
            if self.beat.lost:
                return "lost"
            if self.beat.withdrawn:
                return self._finish_quietly("withdrawn", stop_reason="withdrawn")
            return self._release()
        except Exception as exc:
            return self._after(exc)
        if self.beat.lost:
            return "lost"
        if self.beat.withdrawn:  # asked while the last of it ran: withdrawn, as asked
            return self._finish_quietly("withdrawn", stop_reason="withdrawn")
        try:
            self.store.finish(job, "done", stop_reason="completed", result_dir=folder,
                              summary=summary)
        except LeaseLost:
            return "lost"
        return "done"

    def _after(self, exc: Exception) -> str:
        """The outcome of an attempt that raised: lost, released, error (disk full) or a retry."""
        job = self.job
        if self.beat.lost:
            return "lost"
        if self.worker.stopping.is_set():
            return self._release()
        if disk_full(exc):
            # retrying would only fill the disk again: free this job's checkpoints (so the
            # store can record the outcome) and end it with the reason
            log.error("job %s: the data dir is full (%s)", job["id"], exc)
            self._cleanup_checkpoints()
            try:
                return self._finish_quietly("error", error=f"the data dir is full: {exc}")
            except (sqlite3.OperationalError, OSError):
                return "lost"  # still full: the lease expires and the job is claimed again
        log.exception("job %s: attempt %d raised", job["id"], job["attempts"])
        try:
            return self.store.retry_or_fail(job, f"{type(exc).__name__}: {exc}",
                                            self.settings.max_attempts)
        except LeaseLost:
            return "lost"

    def _release(self) -> str:
        try:
            self.store.release(self.job)
        except LeaseLost:
            return "lost"
        return "released"

    def _finish_quietly(self, state: str, **fields) -> str:
        try:
            self.store.finish(self.job, state, **fields)
        except LeaseLost:
            return "lost"
        self._cleanup_checkpoints()
        return state

    def _cleanup_checkpoints(self) -> None:
        folder = self.store.blob_dir / "checkpoints"
        # also the temp files of a checkpoint write that a killed worker left behind
        for pattern in (f"{self.job['id']}-*.pkl", f".{self.job['id']}-*.pkl.*.tmp"):
            for path in folder.glob(pattern):
                path.unlink(missing_ok=True)

    def _succeed(self, tuned: tuning.Tuned) -> str:
        """Record a search written by the pipeline as done, with its summary."""
        job, diagnostics = self.job, tuned.diagnostics
        # the scorecard leads: what a pipeline gains, in words and in numbers
        card = verdict.scorecard(diagnostics.data) or {}
        summary = {"scorecard": verdict.scorecard_rows(diagnostics.data),
                   "scorecard_rows": card.get("rows"),
                   "objective": diagnostics.objective, "gain_bits": diagnostics.gain_bits,
                   "stop_reason": diagnostics.stop_reason,
                   "channels": len(tuned.filterbank.channels)}
        try:
            self.store.finish(job, "done", stop_reason=diagnostics.stop_reason,
                              result_dir=self.store.result_folder(job), summary=summary,
                              evaluations=diagnostics.evaluations)
        except LeaseLost:
            return "lost"
        self._cleanup_checkpoints()
        return "done"


def run_worker(settings: ServiceSettings, parent_pid: int | None = None) -> int:
    """Entry point of ``burstlens worker``: run until SIGTERM, then exit 0 (2: no Dask cluster)."""
    if settings.dask:
        from burstlens.service.dask_backend import DaskUnavailable, probe

        try:
            probe(settings.dask)
        except DaskUnavailable as exc:
            print(f"burstlens worker: {exc}", file=sys.stderr)
            return 2
    try:
        worker = Worker(settings, parent_pid=parent_pid)
    except DataDirTooNew as exc:
        print(f"burstlens worker: {exc}", file=sys.stderr)
        return 2
    worker.install_signal_handlers()
    if settings.worker_niceness:
        # the search is batch work: the API's pollers on the same cores come first
        os.nice(settings.worker_niceness)
    return worker.run()

