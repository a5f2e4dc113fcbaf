"""The embedded deployment: uvicorn in this process, N worker processes supervised beside it.

Workers are separate processes (``burstlens worker --parent-pid``) so a crash in the numerics
never takes the API down; one that dies is started again. When the API stops (SIGTERM/SIGINT),
workers get SIGTERM, checkpoint, release their jobs and exit 0; a worker whose parent vanished
(kill -9 of ``serve``) notices at its next heartbeat and does the same.
"""
from __future__ import annotations

import gc
import importlib
import logging
import os
import signal
import subprocess
import sys
import threading
import time

from burstlens.service.config import ServiceSettings, is_loopback

log = logging.getLogger("burstlens.serve")

WORKER_STOP_TIMEOUT_S = 120.0


class WorkerPool:
    """N ``burstlens worker`` processes kept alive until :meth:`stop`."""

    def __init__(self, settings: ServiceSettings, count: int):
        self.settings, self.count = settings, count
        self.procs: list[subprocess.Popen] = []
        self._stopping = threading.Event()
        self._lock = threading.Lock()
        self._thread = threading.Thread(target=self._supervise, name="worker-supervisor", daemon=True)

    def _command(self) -> list[str]:
        cmd = [sys.executable, "-m", "burstlens.service.cli", "worker", "--data-dir",
               str(self.settings.data_dir), "--parent-pid", str(os.getpid())]
        if self.settings.dask:
            cmd += ["--dask", self.settings.dask]
        return cmd

    def _spawn(self) -> subprocess.Popen:
        env = dict(os.environ, BURSTLENS_LEASE_S=str(self.settings.lease_s),
                   BURSTLENS_MAX_ATTEMPTS=str(self.settings.max_attempts))
        proc = subprocess.Popen(self._command(), env=env)
        log.info("worker process %d started", proc.pid)
        return proc

    def start(self) -> None:
        with self._lock:
            self.procs = [self._spawn() for _ in range(self.count)]
        self._thread.start()

    def _supervise(self) -> None:
        while not self._stopping.wait(1.0):
            with self._lock:
                for i, proc in enumerate(self.procs):
                    code = proc.poll()
                    if code is not None and not self._stopping.is_set():
                        log.warning("worker process %d exited with %s; starting another",
                                    proc.pid, code)
                        self.procs[i] = self._spawn()

    def stop(self) -> None:
        self._stopping.set()
        with self._lock:
            for proc in self.procs:
                if proc.poll() is None:
                    proc.send_signal(signal.SIGTERM)
            deadline = time.monotonic() + WORKER_STOP_TIMEOUT_S
            for proc in self.procs:
                try:
                    proc.wait(timeout=max(0.1, deadline - time.monotonic()))
                except subprocess.TimeoutExpired:
                    log.error("worker process %d did not stop; killing it", proc.pid)
                    proc.kill()
                    proc.wait()


def bind_policy(settings: ServiceSettings, store) -> ServiceSettings:
    """The settings to serve with on ``settings.host``; ValueError if that would be unsafe.

    Loopback: as given (no token stored means no authentication). Any other address: a token
    must exist, and tokens stay required even if every token is later revoked, so the API never
    falls open on a reachable address.
    """
    from burstlens.service.auth import auth_required

    if is_loopback(settings.host):
        return settings
    if not auth_required(store, settings.tokens_required):
        raise ValueError(f"refusing to bind to {settings.host}: no token is stored, so the API "
                         "would be open to anyone who can reach it. Add one with `burstlens "
                         "tokens add NAME` or bind to 127.0.0.1.")
    return settings.model_copy(update={"tokens_required": True})


def _server_class():
    import uvicorn

    class Server(uvicorn.Server):
        """uvicorn's server, minus re-raising SIGTERM/SIGINT after its graceful shutdown (that
        would end this process before the workers are stopped)."""

        def handle_exit(self, sig, frame) -> None:
            if self.should_exit and sig == signal.SIGINT:
                self.force_exit = True
            else:
                self.should_exit = True

    return Server


# what the routes import on their first request (an upload's reading: a second of imports)
ROUTE_MODULES = ("burstlens.search.settings", "burstlens.search.corpus",
                 "burstlens.service.corpus_check")


def settle() -> None:
    """Ready the API process for steady serving, once the app is made: import now what the
    routes would import on their first request (else that request, and every request on the
    event loop meanwhile, waits for it under the GIL), then move every object alive after
    startup out of the garbage collector's reach (:func:`gc.freeze`). Those objects (the web
    framework, NumPy, SciPy, the engine: about 10⁵) live as long as the process; left in the
    collector's oldest generation, each full collection walks them all, tens of milliseconds
    during which no request is answered; frozen, a full collection walks only what serving
    made (a few ms)."""
    for module in ROUTE_MODULES:
        importlib.import_module(module)
    gc.collect()
    gc.freeze()


def serve(settings: ServiceSettings, log_level: str = "info") -> int:
    """Run the API on ``settings.host:port`` with ``settings.workers`` local workers."""
    import uvicorn

    from burstlens.service.app import create_app
    from burstlens.service.store import DataDirTooNew, Store

    try:
        settings = bind_policy(settings, Store(settings.data_dir))
    except (ValueError, DataDirTooNew) as exc:
        print(f"burstlens serve: {exc}", file=sys.stderr)
        return 2
    if settings.dask:
        from burstlens.service.dask_backend import DaskUnavailable, probe

        try:
            cluster = probe(settings.dask)
        except DaskUnavailable as exc:
            print(f"burstlens serve: {exc}", file=sys.stderr)
            return 2
        log.info("Dask cluster at %s: %d workers, %d threads", cluster["address"],
                 cluster["workers"], cluster["threads"])
    app = create_app(settings)
    settle()
    pool = WorkerPool(settings, settings.workers)
    pool.start()
    try:
        config = uvicorn.Config(app, host=settings.host, port=settings.port, log_level=log_level,
                                proxy_headers=False, server_header=False)
        _server_class()(config).run()
    finally:
        pool.stop()
    return 0
