"""A ``burstlens worker`` that kills itself with SIGKILL at one chosen moment of its job.

    python -m reliability.faulty_worker --data-dir D --fault SPEC [--stats FILE]

It is the real :class:`service.worker.Worker` over the real store; only the moment of death is
arranged, through the worker's ``on_progress`` / ``on_checkpoint`` hooks and by wrapping the
store's public methods in this process (the service's files are not touched). ``SPEC``:

- ``none`` — no fault; run one job and write call counts to ``--stats`` (a reference run);
- ``round:K:D`` — D seconds after the K-th progress report (inside the next round's compute);
- ``checkpoint:K:write:F`` — inside ``write_blob`` of the K-th checkpoint, after a share F of
  its bytes went into the temp file (a torn write);
- ``checkpoint:K:before-record`` — the K-th checkpoint blob is in place, the store not told yet;
- ``checkpoint:K:after-record`` — the store points at the new blob, the old one not yet removed;
- ``heartbeat:K`` — inside the K-th heartbeat's write transaction, before its COMMIT.

SIGKILL cannot be caught: the process ends at once, as with ``kill -9`` from outside.
"""
from __future__ import annotations

import argparse
import json
import logging
import os
import signal
import threading
import time
from pathlib import Path


def die() -> None:
    os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(60)  # never reached: SIGKILL is delivered before this returns


def install(spec: str, counts: dict) -> dict:
    """Arrange the fault of ``spec``; returns the hooks to give :class:`Worker`."""
    import burstlens.service.store as store_module
    import burstlens.service.worker as worker_module

    kind, *params = spec.split(":")
    real_write_blob = worker_module.write_blob
    real_record = store_module.Store.record_checkpoint
    real_heartbeat = store_module.Store.heartbeat

    def on_progress(run, info):
        counts["progress"] += 1
        if kind == "round" and counts["progress"] == int(params[0]):
            threading.Timer(float(params[1]), die).start()

    def on_checkpoint(run, seq):
        counts["checkpoint"] += 1

    def write_blob(path, chunks):
        is_checkpoint = Path(path).parent.name == "checkpoints"
        if not (kind == "checkpoint" and is_checkpoint and counts["checkpoint"] == int(params[0])
                and params[1] == "write"):
            return real_write_blob(path, chunks)
        data = chunks if isinstance(chunks, bytes) else b"".join(chunks)
        cut = int(len(data) * float(params[2]))

        def torn():
            yield data[:cut]
            die()
            yield data[cut:]
        return real_write_blob(path, torn())

    def record_checkpoint(self, job, path, sha256, round_):
        hit = kind == "checkpoint" and counts["checkpoint"] == int(params[0])
        if hit and params[1] == "before-record":
            die()
        out = real_record(self, job, path, sha256, round_)
        if hit and params[1] == "after-record":
            die()
        return out

    def heartbeat(self, job, lease_s):
        counts["heartbeat"] += 1
        if kind == "heartbeat" and counts["heartbeat"] == int(params[0]):
            with self.transaction() as con:  # the store's own transaction and lease renewal
                self.renew_lease(con, job, lease_s)
                die()
        return real_heartbeat(self, job, lease_s)

    worker_module.write_blob = write_blob
    store_module.Store.record_checkpoint = record_checkpoint
    store_module.Store.heartbeat = heartbeat
    return {"on_progress": on_progress, "on_checkpoint": on_checkpoint}


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--data-dir", required=True)
    parser.add_argument("--fault", required=True)
    parser.add_argument("--stats")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from burstlens.service.config import ServiceSettings
    from burstlens.service.worker import Worker

    counts = {"progress": 0, "checkpoint": 0, "heartbeat": 0}
    hooks = install(args.fault, counts)
    worker = Worker(ServiceSettings(data_dir=Path(args.data_dir)), **hooks)
    worker.install_signal_handlers()
    started = time.monotonic()
    # one job, waiting up to 30 s for it to be claimable
    deadline = time.monotonic() + 30.0
    while time.monotonic() < deadline:
        job = worker.store.claim(worker.owner, worker.settings.lease_s, worker.settings.max_attempts)
        if job is not None:
            counts["outcome"] = worker.run_job(job)
            break
        time.sleep(worker.settings.poll_s)
    counts["seconds"] = time.monotonic() - started
    if args.stats:
        Path(args.stats).write_text(json.dumps(counts))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
