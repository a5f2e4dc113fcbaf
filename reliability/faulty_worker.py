"""A ``burstlens worker`` that kills itself with SIGKILL at one chosen moment of its job.

    python -m reliability.faulty_worker --data-dir D --fault SPEC [--stats FILE]

It is the real :class:`service.worker.Worker` over the real store; only the moment of death is
arranged, through the worker's ``on_progress`` / ``on_checkpoint`` hooks, by wrapping the
store's public methods in this process, and through the trace callback of the store's SQLite
connections (the service's files are not touched). ``SPEC``:

- ``none`` — no fault; run one job and write call counts to ``--stats`` (a reference run);
- ``round:K:D`` — D seconds after the K-th progress report (inside the next round's compute);
- ``checkpoint:K:write:F`` — inside ``write_blob`` of the K-th checkpoint, after a share F of
  its bytes went into the temp file (a torn write);
- ``checkpoint:K:before-record`` — the K-th checkpoint blob is in place, the store not told yet;
- ``checkpoint:K:after-record`` — the store points at the new blob, the old one not yet removed;
- ``heartbeat:K`` — inside the K-th heartbeat's write transaction, before its COMMIT;
- ``commit:K:begin`` / ``commit:K:frames:U`` / ``commit:K:published`` — inside SQLite's own
  COMMIT of the K-th write transaction of the job's thread (the claim is the first), see below.

Inside the commit. Python's ``sqlite3`` has no VFS hook, so the moment is found from outside the
library, in the files SQLite itself writes (SQLite documentation, "Database File Format" §4,
"The WAL file format", and "WAL-mode File Format" for the wal-index). A WAL commit (1) appends
the transaction's frames to ``-wal``, the last one a commit frame (its header's "size of the
database after the commit" is non-zero), each checksummed over the chain of the frames before
it; (2) with ``synchronous=FULL``, fsyncs the WAL; (3) writes the new last frame into the
wal-index header in ``-shm``, which is when other connections first see the transaction; then
``sqlite3_step`` returns and Python gets the GIL back. The connection's trace callback
(``set_trace_callback``) runs as the ``COMMIT`` statement starts, before step (1). Then:

- ``begin`` kills in that callback: before any frame is written;
- ``frames:U`` starts a thread that polls ``-wal`` and ``-shm`` while the COMMIT runs (the
  statement runs without the GIL) and kills U microseconds after the commit frame's header is
  on file, if the wal-index still does not show it: between the WAL write and the commit's
  completion (measured on this machine: the header appears about 20 µs into the COMMIT, the
  fsync of step 2 then takes milliseconds);
- ``published`` kills as soon as the wal-index shows the frames: the commit is complete for
  every other connection, but ``COMMIT`` has not returned to Python (the polling thread holds
  the GIL, which the returning statement needs).

Right before the COMMIT, the worker writes the wal-index header as it stands into ``--stats``
(``commit_before``); :func:`commit_moment` compares it with the files after the kill and says
where the kill landed, so the campaign counts kills that landed with the frames on file rather
than trusting the timing.

SIGKILL cannot be caught: the process ends at once, as with ``kill -9`` from outside.
"""
from __future__ import annotations

import argparse
import json
import logging
import mmap
import os
import signal
import struct
import threading
import time
from dataclasses import asdict, dataclass
from pathlib import Path

WAL_HEADER_BYTES = 32
FRAME_HEADER_BYTES = 24
WAL_MAGIC_LITTLE, WAL_MAGIC_BIG = 0x377F0682, 0x377F0683


def die() -> None:
    os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(60)  # never reached: SIGKILL is delivered before this returns


@dataclass(frozen=True)
class WalIndexHead:
    """The wal-index header (the first of its two copies at the start of ``-shm``, native byte
    order): the last frame other connections see, the checksum of that frame, the WAL's salt
    (raw bytes, as in the WAL header and every frame header) and the page size."""

    max_frame: int
    frame_checksum: tuple[int, int]
    salt: str  # hex
    page_size: int

    @classmethod
    def read(cls, db_path: Path) -> WalIndexHead:
        return cls.parse(Path(f"{db_path}-shm").read_bytes())

    @classmethod
    def parse(cls, head: bytes) -> WalIndexHead:
        size = struct.unpack_from("=H", head, 14)[0]
        return cls(max_frame=struct.unpack_from("=I", head, 16)[0],
                   frame_checksum=struct.unpack_from("=2I", head, 24),
                   salt=head[32:40].hex(), page_size=65536 if size == 1 else size)

    def shows_more_than(self, before: WalIndexHead) -> bool:
        """Whether frames committed after ``before`` are visible (same WAL generation and a later
        last frame, or a restarted WAL holding any frame)."""
        if self.salt == before.salt:
            return self.max_frame > before.max_frame
        return self.max_frame > 0


def wal_checksum(data: bytes, big_endian: bool, s0: int, s1: int) -> tuple[int, int]:
    """SQLite's WAL checksum of ``data`` (a multiple of 8 bytes) continuing from (s0, s1): over
    32-bit words x, pairwise s0 += x[i] + s1, s1 += x[i+1] + s0, modulo 2³² ("The WAL file
    format", SQLite documentation)."""
    words = struct.unpack(f"{'>' if big_endian else '<'}{len(data) // 4}I", data)
    for i in range(0, len(words), 2):
        s0 = (s0 + words[i] + s1) & 0xFFFFFFFF
        s1 = (s1 + words[i + 1] + s0) & 0xFFFFFFFF
    return s0, s1


def unpublished_frames(db_path: Path) -> int:
    """Frames on file past the wal-index's last frame that SQLite's WAL recovery would accept as
    committed: same salt, checksum chain intact, ending in a commit frame. 0 when none."""
    head = WalIndexHead.read(db_path)
    wal = Path(f"{db_path}-wal").read_bytes()
    if len(wal) < WAL_HEADER_BYTES:
        return 0
    magic = struct.unpack_from(">I", wal, 0)[0]
    if magic not in (WAL_MAGIC_LITTLE, WAL_MAGIC_BIG) or wal[16:24].hex() != head.salt:
        return 0
    big = magic == WAL_MAGIC_BIG
    s0, s1 = head.frame_checksum if head.max_frame else struct.unpack_from(">2I", wal, 24)
    frame_bytes = FRAME_HEADER_BYTES + head.page_size
    committed = 0
    i = head.max_frame
    while True:
        off = WAL_HEADER_BYTES + i * frame_bytes
        frame = wal[off: off + frame_bytes]
        if len(frame) < frame_bytes or frame[8:16].hex() != head.salt:
            return committed
        s0, s1 = wal_checksum(frame[:8] + frame[FRAME_HEADER_BYTES:], big, s0, s1)
        if (s0, s1) != struct.unpack_from(">2I", frame, 16):
            return committed
        i += 1
        if struct.unpack_from(">I", frame, 4)[0]:  # a commit frame ends a transaction
            committed = i - head.max_frame


def commit_moment(db_path: Path, before: dict) -> str:
    """Where a kill inside a COMMIT landed, from the store's files after the kill and the
    wal-index header written just before the COMMIT: ``before-frames`` (no frame of it on
    file), ``frames-unpublished`` (its frames complete and valid on file, the wal-index not yet
    updated) or ``published`` (the wal-index shows it)."""
    head = WalIndexHead.read(db_path)
    if head.shows_more_than(WalIndexHead(before["max_frame"], tuple(before["frame_checksum"]),
                                         before["salt"], before["page_size"])):
        return "published"
    return "frames-unpublished" if unpublished_frames(db_path) else "before-frames"


def _commit_frame_on_file(wal_fd: int, head: WalIndexHead) -> bool:
    """Cheap poll: a frame header past the wal-index's last frame, with the current salt and a
    non-zero commit size, is on file (its page may still be on its way)."""
    frame_bytes = FRAME_HEADER_BYTES + head.page_size
    salt = bytes.fromhex(head.salt)
    i = head.max_frame
    while True:
        frame = os.pread(wal_fd, FRAME_HEADER_BYTES, WAL_HEADER_BYTES + i * frame_bytes)
        if len(frame) < FRAME_HEADER_BYTES or frame[8:16] != salt:
            return False
        if struct.unpack_from(">I", frame, 4)[0]:
            return True
        i += 1


def _kill_during_commit(db_path: Path, before: WalIndexHead, phase: str, delay_us: float) -> None:
    """The polling thread of ``commit:K:frames:U`` and ``commit:K:published``. The wal-index is
    read through a shared map, which never lets go of the GIL; past 2 s it kills anyway (the
    campaign then sees where)."""
    wal_fd = os.open(f"{db_path}-wal", os.O_RDONLY)
    with open(f"{db_path}-shm", "rb") as fh:
        shm = mmap.mmap(fh.fileno(), 0, access=mmap.ACCESS_READ)
    give_up = time.perf_counter() + 2.0
    while True:
        head = WalIndexHead.parse(shm[:48])
        if head.shows_more_than(before) or time.perf_counter() > give_up:
            die()  # published (the aim of ``published``, or ``frames`` missed its window)
        if phase == "frames" and _commit_frame_on_file(wal_fd, head):
            until = time.perf_counter() + delay_us * 1e-6
            while time.perf_counter() < until:
                pass
            die()


def install(spec: str, counts: dict, stats: Path | None = None) -> dict:
    """Arrange the fault of ``spec``; returns the hooks to give :class:`Worker`."""
    import burstlens.service.store as store_module
    import burstlens.service.worker as worker_module

    kind, *params = spec.split(":")
    real_write_blob = worker_module.write_blob
    real_record = store_module.Store.record_checkpoint
    real_heartbeat = store_module.Store.heartbeat
    real_connection = store_module.Store.connection

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

    def connection(self):
        con = real_connection(self)
        if threading.current_thread() is threading.main_thread():
            # the job's own thread only: its sequence of writes is the same in every run (the
            # heartbeat thread's depends on timing and has its own fault kind)
            con.set_trace_callback(lambda sql: sql == "COMMIT" and on_commit(self.db_path))
        return con

    def on_commit(db_path: Path) -> None:
        if not counts["claiming"]:
            return
        counts["commit"] += 1
        if kind != "commit" or counts["commit"] != int(params[0]):
            return
        before = WalIndexHead.read(db_path)
        if stats is not None:
            stats.write_text(json.dumps({**counts, "commit_before": asdict(before)}))
        if params[1] == "begin":
            die()
        delay = float(params[2]) if len(params) > 2 else 0.0
        threading.Thread(target=_kill_during_commit, args=(db_path, before, params[1], delay),
                         daemon=True).start()

    worker_module.write_blob = write_blob
    store_module.Store.record_checkpoint = record_checkpoint
    store_module.Store.heartbeat = heartbeat
    store_module.Store.connection = connection
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

    stats = Path(args.stats) if args.stats else None
    counts = {"progress": 0, "checkpoint": 0, "heartbeat": 0, "commit": 0, "claiming": False}
    hooks = install(args.fault, counts, stats)
    worker = Worker(ServiceSettings(data_dir=Path(args.data_dir)), **hooks)
    worker.install_signal_handlers()
    started = time.monotonic()
    counts["claiming"] = True  # commits count from the first claim on (not the store's opening)
    counts["outcome"] = run_one_job(worker)
    counts["seconds"] = time.monotonic() - started
    if stats is not None:
        stats.write_text(json.dumps(counts))
    return 0


def run_one_job(worker, wait_s: float = 30.0) -> str | None:
    """Claim one job, waiting up to ``wait_s`` for it to be claimable (a killed attempt's lease
    must expire first), and run it: the attempt's outcome, or None when none came."""
    deadline = time.monotonic() + wait_s
    while time.monotonic() < deadline:
        job = worker.store.claim(worker.owner, worker.settings.lease_s, worker.settings.max_attempts)
        if job is not None:
            return worker.run_job(job)
        time.sleep(worker.settings.poll_s)
    return None


if __name__ == "__main__":
    raise SystemExit(main())
