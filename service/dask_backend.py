"""Connecting a job worker to an existing Dask cluster, and running a fit's evaluations on it.

The cluster is an existing ``dask scheduler`` with ``dask worker`` processes (docs/design.md §2: no
home-made cluster code). A worker process opens one ``distributed.Client`` with :func:`connect`
and runs each fit inside :func:`evaluations_on`, which sets joblib's Dask backend for that
client; the search's joblib calls then fan out to the cluster (``search.fit.evaluate`` scatters the
windows once per fit).

Failure modes this module turns into clear errors instead of waits:
- an unreachable or wrong scheduler address → :class:`DaskUnavailable` naming the address, the
  time waited and the cause (for ``serve`` / ``worker`` to print at startup and exit 2);
- a client whose scheduler went away since → :func:`ensure_client` reconnects once, or raises
  :class:`DaskUnavailable`, so the job attempt fails with that reason (and is retried from its
  checkpoint by the store's attempt logic) rather than hanging;
- a cluster with no worker at all → joblib's Dask backend gives up after
  ``wait_for_workers_s`` with a ``TimeoutError`` naming the wait;
- a cluster down to ONE worker thread (a one-thread cluster, or one of two workers being
  restarted) → joblib would run the batch in this process instead of on the cluster (it does so
  whenever the backend reports one worker), handing the task the scattered windows' Future
  instead of the array; the backend :func:`evaluations_on` sets (``burstlens-dask``, a subclass
  of joblib's) always reports at least two, so the batch goes to the cluster and Dask runs it on
  whatever workers remain.
"""
from __future__ import annotations

import re
from collections.abc import Iterator
from contextlib import contextmanager, suppress

BACKEND_NAME = "burstlens-dask"
DEFAULT_CONNECT_TIMEOUT_S = 10.0
DEFAULT_WAIT_FOR_WORKERS_S = 60.0

# tcp://host:port, tls://host:port, ws(s)://…, inproc://… (Dask's own address forms)
_ADDRESS = re.compile(r"^(tcp|tls|ws|wss|inproc|ucx)://[^\s/]+$")


class DaskUnavailable(RuntimeError):
    """The Dask scheduler cannot be used (message names the address and the cause)."""


def check_address(address: str) -> str:
    """``address`` stripped, or :class:`DaskUnavailable` if it is not a Dask scheduler address."""
    text = (address or "").strip()
    if not _ADDRESS.match(text):
        raise DaskUnavailable(f"--dask / BURSTLENS_DASK: {address!r} is not a Dask scheduler "
                              "address; expected e.g. tcp://127.0.0.1:8786")
    return text


def connect(address: str, timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S):
    """A ``distributed.Client`` connected to the scheduler at ``address`` within ``timeout_s``.

    The client is set as the process's default client (joblib's Dask backend looks it up).
    Raises :class:`DaskUnavailable` when the scheduler does not answer in time or refuses.
    """
    address = check_address(address)
    from distributed import Client

    try:
        return Client(address, timeout=timeout_s, set_as_default=True)
    except Exception as exc:  # refused, unreachable, no handshake in time, or not a scheduler
        raise DaskUnavailable(
            f"cannot reach the Dask scheduler at {address} within {timeout_s:g} s "
            f"({type(exc).__name__}: {exc}). Start it (`dask scheduler --port 8786`) or correct "
            "--dask / BURSTLENS_DASK.") from None


def probe(address: str, timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S) -> dict:
    """Connect, read the cluster's size, disconnect: ``{"address", "workers", "threads"}``.

    For a startup check (``serve`` checks before it forks its workers); raises
    :class:`DaskUnavailable` like :func:`connect`.
    """
    client = connect(address, timeout_s)
    try:
        threads = client.nthreads()
        return {"address": client.scheduler.address, "workers": len(threads),
                "threads": int(sum(threads.values()))}
    finally:
        client.close()


def ensure_client(client, address: str, timeout_s: float = DEFAULT_CONNECT_TIMEOUT_S):
    """``client`` if it is still connected, else a fresh :func:`connect` to ``address``."""
    if client is not None and getattr(client, "status", None) == "running":
        return client
    if client is not None:
        with suppress(Exception):  # already broken: nothing left to release
            client.close()
    return connect(address, timeout_s)


def _backend_class():
    # joblib's own Dask backend (joblib registers it lazily under "dask"); subclassed, and named
    # like it, because search.fit.evaluate recognises the Dask backend by that class name
    from joblib._dask import DaskDistributedBackend as JoblibDaskBackend

    class DaskDistributedBackend(JoblibDaskBackend):
        """joblib's Dask backend that never reports fewer than two workers (see the module
        docstring): with no worker at all it still waits ``wait_for_workers_timeout`` and then
        raises ``TimeoutError``, as the base class does."""

        def effective_n_jobs(self, n_jobs):
            return max(2, super().effective_n_jobs(n_jobs))

    return DaskDistributedBackend


def _register_backend() -> None:
    import joblib
    from joblib.parallel import BACKENDS

    if BACKEND_NAME not in BACKENDS:
        joblib.register_parallel_backend(BACKEND_NAME, _backend_class())


@contextmanager
def evaluations_on(client,
                   wait_for_workers_s: float = DEFAULT_WAIT_FOR_WORKERS_S) -> Iterator[None]:
    """joblib's Dask backend bound to ``client`` for the ``with`` block.

    With no Dask worker connected, the backend waits ``wait_for_workers_s`` for one, then raises
    ``TimeoutError`` — a job attempt fails with that reason instead of waiting forever.
    """
    import joblib

    _register_backend()
    with joblib.parallel_config(backend=BACKEND_NAME, client=client,
                                wait_for_workers_timeout=wait_for_workers_s):
        yield


class ClusterMap:
    """``read_corpus``'s ``mapper`` on a Dask client: one task per item, results in item order.

    The reader's tasks open the corpus files by path, so the Dask workers must see the data dir
    at the same path (a shared file system, or object storage mounted there; deploy/README.md).
    """

    def __init__(self, client):
        self.client = client

    def __call__(self, fn, items) -> list:
        items = list(items)
        return self.client.gather(self.client.map(fn, items, pure=False)) if items else []


def sees_files(client, paths) -> bool:
    """Whether every Dask worker can read the first of ``paths`` (the reader's tasks may run on
    any of them)."""
    import os

    first = str(paths[0])
    answers = client.run(os.access, first, os.R_OK)
    return bool(answers) and all(answers.values())

