"""Experiment 8 — transform kills: kill -9 the continuous-transform worker inside a chunk write.

Promise (service/tuned_site.py, search/continuous.py): a transform job's store lives under
``results/<job>/store.zarr`` for every attempt, so an attempt that dies resumes at its last
complete chunk; each part's ``complete_until`` is advanced only after the chunk it counts is
written, so the store never claims a chunk whose bytes are not all there; a resumed job ends
with the same store as an uninterrupted run.

Method: ``serve --workers 0`` gives the API. A small search runs to ``done`` (a plain worker),
a continuous miniSEED trace (one SEED id, a few Zarr chunks long) is uploaded, and the same
transform is run in this process with :func:`search.continuous.transform_continuous`, without
kills: the reference store. For each transform job of the plan a chain of workers started here
(``python -m reliability.transform_kills``, the real :class:`service.worker.Worker` over the
real store) each SIGKILLs itself at one seeded moment of the write of one image chunk, given by
its index in the part (so the moment does not depend on where the attempt resumed):

- ``torn:F`` — inside the chunk's write: a share F of its encoded bytes is in Zarr's temp file;
- ``unplaced`` — all its bytes are in the temp file, not yet moved to the chunk's key;
- ``placed`` — the chunk is at its key, the part's ``complete_until`` not yet advanced;
- ``marker:F`` — inside the write of that marker: a share F of the part's new ``zarr.json`` is
  in the temp file;
- ``marked`` — the marker claims the chunk, the next chunk not yet begun;
- ``creating:F`` (the first kill of some jobs) — while the part is being created: its image and
  time arrays exist, a share F of its ``frequency`` coordinate's values is in the temp file.

The moment is arranged by wrapping, in the worker's own process, the two functions through
which Zarr's local store writes every key (``zarr.storage._local._put`` and its
``_atomic_write``, zarr 3.1: a temp file, then a rename onto the key); the service's and the
library's files are not touched. Right after each kill, before any other process touches the
store, this process opens it read-only and checks every part: the marker is where the moment
says it must be, and every chunk the marker claims holds the reference's bytes. A chain's moments
are distinct chunk indices in increasing order, so each is reached by the attempt after the
previous kill; each attempt must plan exactly the chunks the marker left (it resumed, not
restarted). After the chain a plain ``burstlens worker`` reclaims the job when the lease
expires and finishes it: the job must end ``done`` and every array of its store (image, time,
coordinates, the seam) and every attribute must equal the reference's, byte for byte.
Temp files that killed writes left in the store (they would be served in ``store.zip``) are
counted.

SIGKILL cannot be caught (POSIX signal(7)): the process ends at once, as with ``kill -9``.
"""
from __future__ import annotations

import argparse
import contextlib
import io
import json
import logging
import os
import random
import signal
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass, field
from pathlib import Path

LEASE_S = 2.0
MAX_ATTEMPTS = 12  # above the longest chain of kills on one job (the attempt limit is not tested here)
PHASES = ("torn", "unplaced", "placed", "marker", "marked")
CREATING = "creating"
TEARING = ("torn", "marker", CREATING)  # the phases that leave a share of a write in a temp file
# the smallest search whose filterbank the transform can use: the search is not under test here
SEARCH = {"channels": 4, "evaluations": 4, "bootstrap": 0, "refine": False, "seed": 3,
          "window_s": 0.128}
FS = 1000.0  # the rate of the tuning corpus (harness.burst_npz) and of the transformed trace
STEP_S = 0.01
CHUNK_S = 65.53  # one Zarr chunk of continuous.PIECE_SAMPLES output samples at FS, step 10 samples
SEED_ID = ("XX", "KEEL", "00", "HHZ")


@dataclass(frozen=True)
class Moment:
    """Where a worker kills itself: during the write of image chunk ``chunk`` (0-based, along
    time, of the part), at ``phase`` (:data:`PHASES`), or while creating the part (``CREATING``,
    chunk 0); a share ``share`` of the temp file written for the :data:`TEARING` phases."""

    chunk: int
    phase: str
    share: float | None = None

    @property
    def spec(self) -> str:
        return f"{self.chunk}:{self.phase}" + ("" if self.share is None else f":{self.share:.2f}")

    @classmethod
    def parse(cls, spec: str) -> Moment:
        chunk, phase, *share = spec.split(":")
        if phase not in (*PHASES, CREATING):
            raise ValueError(f"kill moment {spec!r}: phase {phase!r} is not one of "
                             f"{(*PHASES, CREATING)}")
        return cls(int(chunk), phase, float(share[0]) if share else None)

    def claimed_after(self, chunk_steps: int, n_steps: int) -> int:
        """``complete_until`` the kill must leave (the attempt wrote every chunk before this one;
        a part being created claims nothing)."""
        if self.phase == CREATING:
            return 0
        return min(n_steps, (self.chunk + (self.phase == "marked")) * chunk_steps)


def make_plan(rng: random.Random, n_chunks: int, kills: int, per_job: int,
              creations: int = 0) -> list[list[Moment]]:
    """``kills`` moments in chunk writes in chains of at most ``per_job`` (one chain per
    transform job): each chain's chunk indices distinct and increasing, the phases dealt from a
    shuffled deck of :data:`PHASES` so that every phase is drawn before any repeats; the first
    ``creations`` chains begin with a kill while the part is created."""
    per_job = max(1, min(per_job, n_chunks))
    deck: list[str] = []
    chains = []
    left = kills
    while left > 0:
        k = min(per_job, left)
        left -= k
        chain = []
        for chunk in sorted(rng.sample(range(n_chunks), k)):
            if not deck:
                deck = list(PHASES)
                rng.shuffle(deck)
            phase = deck.pop()
            share = round(rng.uniform(0.05, 0.95), 2) if phase in TEARING else None
            chain.append(Moment(chunk, phase, share))
        chains.append(chain)
    for chain in chains[:creations]:
        chain.insert(0, Moment(0, CREATING, round(rng.uniform(0.05, 0.95), 2)))
    return chains


# -- the worker that kills itself (this module run with python -m) ---------------------------
def die() -> None:
    os.kill(os.getpid(), signal.SIGKILL)
    time.sleep(60)  # never reached: SIGKILL is delivered before this returns


class _Torn:
    """A temp file that takes a share of one write, then the process dies."""

    def __init__(self, file, share: float, before_death):
        self.file, self.share, self.before_death = file, share, before_death

    def write(self, data) -> int:
        view = memoryview(data).cast("B")
        self.file.write(view[: int(len(view) * self.share)])
        self.file.flush()  # the bytes reach the file, as a write cut short by the kill leaves them
        self.before_death()
        die()
        return 0


def install(moment: Moment, before_death) -> None:
    """Wrap Zarr's local-store writes in this process so that it dies at ``moment``
    (``before_death()`` runs first: it records what the attempt planned)."""
    import zarr.storage._local as local

    real_put, real_atomic = local._put, local._atomic_write
    state = {"stage": "before", "part": None}
    tears: dict[Path, float] = {}  # by key: zarr may write other keys from other threads meanwhile

    def is_target(path: Path) -> bool:
        parts = path.parts
        if moment.phase == CREATING:
            return len(parts) > 3 and parts[-3:] == ("frequency", "c", "0")
        return len(parts) > 4 and parts[-4:-2] == ("image", "c") and parts[-2] == str(moment.chunk)

    @contextlib.contextmanager
    def atomic_write(path, mode, exclusive=False):
        with real_atomic(path, mode, exclusive) as file:
            share = tears.pop(Path(path), None)
            yield file if share is None else _Torn(file, share, before_death)

    def put(path, value, exclusive=False):
        path = Path(path)
        if state["stage"] == "before" and is_target(path):
            state["stage"], state["part"] = "chunk", path.parents[3]
            if moment.phase in ("torn", "unplaced", CREATING):
                tears[path] = 1.0 if moment.phase == "unplaced" else moment.share
            out = real_put(path, value, exclusive)
            if moment.phase == "placed":
                before_death()
                die()
            return out
        if state["stage"] == "chunk" and path == state["part"] / "zarr.json":
            state["stage"] = "marker"
            if moment.phase == "marker":
                tears[path] = moment.share
            out = real_put(path, value, exclusive)
            if moment.phase == "marked":
                before_death()
                die()
            return out
        return real_put(path, value, exclusive)

    local._atomic_write = atomic_write
    local._put = put


def main(argv=None) -> int:
    """One job claimed and run by the real worker, killed at ``--kill`` if it gets there."""
    parser = argparse.ArgumentParser(description="a burstlens worker that kills itself mid-chunk")
    parser.add_argument("--data-dir", required=True)
    parser.add_argument("--kill", required=True, help="CHUNK:PHASE[:SHARE]")
    parser.add_argument("--stats", required=True)
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from burstlens.service.config import ServiceSettings
    from burstlens.service.worker import Worker
    from reliability.faulty_worker import run_one_job

    stats = Path(args.stats)
    noted: dict = {"planned": None, "outcome": None}

    def on_progress(_run, info):
        if noted["planned"] is None and "of" in info:
            noted["planned"] = info["of"]

    install(Moment.parse(args.kill), lambda: stats.write_text(json.dumps(noted)))
    worker = Worker(ServiceSettings(data_dir=Path(args.data_dir)), on_progress=on_progress)
    worker.install_signal_handlers()
    noted["outcome"] = run_one_job(worker)
    stats.write_text(json.dumps(noted))
    return 0


# -- the experiment ---------------------------------------------------------------------------
def continuous_mseed(seconds: float, seed: int = 5) -> bytes:
    """One miniSEED trace (``SEED_ID``, FS, float32) of the generated site of the drift tests."""
    import numpy as np
    import obspy

    from burstlens.service.testing import drift_site_trace

    net, sta, loc, cha = SEED_ID
    trace = obspy.Trace(drift_site_trace(seed, seconds=seconds, fs=FS).astype(np.float32), header={
        "network": net, "station": sta, "location": loc, "channel": cha, "sampling_rate": FS,
        "starttime": obspy.UTCDateTime(2026, 3, 9, 6, 0, 0)})
    buffer = io.BytesIO()
    trace.write(buffer, format="MSEED")
    return buffer.getvalue()


def parts_of(root) -> dict:
    """Part groups of a continuous store: {"SEED id/part": group} (seams are not parts)."""
    return {f"{tid}/{name}": group for tid, trace in root.groups() for name, group in trace.groups()}


def _array_bytes(array) -> bytes:
    data = array[...]
    return repr((data.dtype.str, data.shape)).encode() + data.tobytes()


def snapshot(path: Path) -> dict:
    """Every group's and array's attributes, and every array's dtype, shape and bytes, by path."""
    import zarr

    root = zarr.open_group(str(path), mode="r", zarr_format=3)
    out = {"/attrs": json.dumps(dict(root.attrs), sort_keys=True)}
    for name, node in root.members(max_depth=None):
        out[f"{name}/attrs"] = json.dumps(dict(node.attrs), sort_keys=True)
        if isinstance(node, zarr.Array):
            out[f"{name}/data"] = _array_bytes(node)
    return out


@dataclass
class Claimed:
    """What a store claims right after a kill, against the reference: the part's marker, the
    chunks the marker claims whose bytes differ from the reference's, and any trouble opening
    the store."""

    complete_until: int = -1
    chunk_steps: int = 0
    n_steps: int = 0
    exposed: list[int] = field(default_factory=list)
    problem: str | None = None


def audit(path: Path, reference: Path) -> Claimed:
    """Open the store read-only and compare every chunk its marker claims with the reference."""
    import numpy as np
    import zarr

    try:
        root = zarr.open_group(str(path), mode="r", zarr_format=3)
        ref = zarr.open_group(str(reference), mode="r", zarr_format=3)
        (name, group), = parts_of(root).items()  # one SEED id, no gap: one part
        mine = parts_of(ref)[name]
        chunk_steps = int(root.attrs["reading"]["chunk_steps"])
        # a part being created has no marker yet: it claims nothing
        claimed = Claimed(int(group.attrs.get("complete_until", 0)), chunk_steps,
                          int(mine["image"].shape[0]))
        image, want = group["image"], mine["image"]
        for start in range(0, claimed.complete_until, chunk_steps):
            stop = min(claimed.complete_until, start + chunk_steps)
            if image[start:stop].tobytes() != want[start:stop].tobytes():
                claimed.exposed.append(start // chunk_steps)
        if not np.array_equal(group["time"][...], mine["time"][...]):
            claimed.problem = "its time coordinate differs from the reference's"
        return claimed
    except Exception as exc:  # a store that cannot be read after a kill is a finding
        return Claimed(problem=f"cannot read the store: {type(exc).__name__}: {exc}")


def temp_files(path: Path) -> list[str]:
    """Zarr's temp files (``*.partial``) under the store: writes a kill cut short."""
    return sorted(str(p.relative_to(path)) for p in path.rglob("*.partial"))


class _Site:
    """A server on its own data dir, a search that is done, the transform's corpus, the
    reference store."""

    def __init__(self, tmp: Path):
        import httpx

        from reliability.harness import LiveServer, Workers

        self.tmp, self.data = tmp, tmp / "data"
        env = {"BURSTLENS_LEASE_S": LEASE_S, "BURSTLENS_MAX_ATTEMPTS": MAX_ATTEMPTS}
        self.server = LiveServer(self.data, workers=0, **env).start()
        self.workers = Workers(self.data, **env)
        self.client = httpx.Client(base_url=self.server.url, timeout=60.0)

    def prepare(self, n_chunks: int) -> None:
        """The search to done, the trace of a little less than ``n_chunks`` chunks uploaded
        (the last chunk partial) and transformed here into the reference store."""
        from burstlens.search.continuous import transform_continuous
        from burstlens.search.documents import FilterbankDocument
        from reliability.harness import FINAL, corpus_files, wait_until

        corpus = self._upload(corpus_files(1))
        search = self.client.post("/v1/jobs", json={"corpus_id": corpus, "settings": SEARCH})
        search.raise_for_status()
        self.search_id = search.json()["id"]
        proc = self.workers.start()
        try:
            # a worker that exits (it could not start) ends the wait too
            wait_until(lambda: self.job(self.search_id)["state"] in FINAL or proc.poll() is not None,
                       300.0, interval=0.2)
        finally:
            self.workers.stop(proc)
        if self.job(self.search_id)["state"] != "done":
            raise RuntimeError(f"the search did not end done: {self.job(self.search_id)}")
        document = FilterbankDocument.read(self.client.get(f"/v1/jobs/{self.search_id}/filterbank").json())
        wave = self.tmp / "KEEL.mseed"
        wave.write_bytes(continuous_mseed((n_chunks - 0.4) * CHUNK_S))
        self.corpus_id = self._upload([("files", (wave.name, wave.read_bytes(),
                                                  "application/octet-stream"))])
        self.reference = self.tmp / "reference.zarr"
        transform_continuous([str(wave)], document, str(self.reference), step_s=STEP_S)

    def _upload(self, files) -> str:
        response = self.client.post("/v1/corpora", files=files)
        response.raise_for_status()
        return response.json()["id"]

    def job(self, job_id: str) -> dict:
        return self.client.get(f"/v1/jobs/{job_id}").json()

    def submit(self) -> str:
        response = self.client.post(f"/v1/jobs/{self.search_id}/transforms",
                                    json={"corpus_id": self.corpus_id, "time_step_s": STEP_S})
        response.raise_for_status()
        return response.json()["id"]

    def store_of(self, job_id: str) -> Path:
        return self.data / "blobs" / "results" / job_id / "store.zarr"

    def run_killing(self, moment: Moment, timeout: float = 120.0) -> tuple[int | None, dict]:
        """A self-killing worker on the next claimable job; its exit code and what it noted."""
        from reliability.harness import ROOT

        stats = self.tmp / f"stats-{time.monotonic_ns()}.json"
        proc = subprocess.Popen([sys.executable, "-m", "reliability.transform_kills", "--data-dir",
                                 str(self.data), "--kill", moment.spec, "--stats", str(stats)],
                                cwd=ROOT, env=self.workers.env)
        self.workers.procs.append(proc)
        return self.workers.outcome(proc, stats, timeout)

    def recover(self, job_id: str, timeout: float = 180.0) -> dict:
        """A plain worker reclaims the job once its lease expires and runs it to the end."""
        from reliability.harness import FINAL, wait_until

        proc = self.workers.start()
        try:
            wait_until(lambda: self.job(job_id)["state"] in FINAL or proc.poll() is not None,
                       timeout, interval=0.2)
        finally:
            self.workers.stop(proc)
        return self.job(job_id)

    def close(self) -> None:
        self.client.close()
        self.workers.stop_all()
        self.server.stop()


@dataclass
class _Tally:
    kills: int = 0
    fired: int = 0
    landed: int = 0        # the marker stood where the moment says it must
    resumed: int = 0       # the next attempt planned exactly the chunks the marker left
    exposed: int = 0       # chunks claimed complete whose bytes were not the reference's
    unreadable: int = 0
    jobs: int = 0
    done: int = 0
    identical: int = 0
    temp_files: int = 0
    by_phase: dict = field(default_factory=dict)
    details: list[str] = field(default_factory=list)


def _chain(site: _Site, chain: list[Moment], n_chunks: int, tally: _Tally) -> None:
    """One transform job killed at each moment of ``chain`` in turn, then finished by a plain
    worker; every kill audited, the final store compared with the reference."""
    job_id = site.submit()
    store = site.store_of(job_id)
    left_after: int | None = None  # chunks the last kill's marker left to write
    last: Moment | None = None
    tally.jobs += 1
    for moment in chain:
        tally.kills += 1
        code, noted = site.run_killing(moment)
        fired = code == -signal.SIGKILL
        tally.fired += fired
        counts = tally.by_phase.setdefault(moment.phase, [0, 0])
        counts[0] += 1
        if left_after is not None:
            _resumed(tally, last, noted.get("planned"), left_after)
        if not fired:
            tally.details.append(f"job {job_id} kill at {moment.spec}: the worker was not killed "
                                 f"(exit {code}, attempt outcome {noted.get('outcome')!r})")
            left_after, last = None, None
            continue
        claimed = audit(store, site.reference)
        if claimed.problem:
            tally.unreadable += 1
            tally.details.append(f"job {job_id} kill at {moment.spec}: {claimed.problem}")
        tally.exposed += len(claimed.exposed)
        if claimed.exposed:
            tally.details.append(f"job {job_id} kill at {moment.spec}: chunks {claimed.exposed} "
                                 f"claimed complete (complete_until {claimed.complete_until}) with "
                                 "bytes other than the reference's")
        want = moment.claimed_after(claimed.chunk_steps, claimed.n_steps)
        landed = claimed.problem is None and claimed.complete_until == want
        tally.landed += landed
        counts[1] += landed and not claimed.exposed
        if not landed and claimed.problem is None:
            tally.details.append(f"job {job_id} kill at {moment.spec}: complete_until "
                                 f"{claimed.complete_until}, the moment leaves {want}")
        marked = claimed.complete_until
        left_after = n_chunks - (n_chunks if marked >= claimed.n_steps
                                 else marked // max(1, claimed.chunk_steps))
        last = moment
    done = site.recover(job_id)
    if left_after is not None:
        _resumed(tally, last, (done.get("progress") or {}).get("of"), left_after)
    left = temp_files(store) if store.exists() else []
    tally.temp_files += len(left)
    if done["state"] != "done":
        tally.details.append(f"job {job_id}: ended {done['state']} (attempts {done['attempts']}, "
                             f"error {done['error']!r})")
        return
    tally.done += 1
    mine, want = snapshot(store), snapshot(site.reference)
    differ = sorted(k for k in set(mine) | set(want) if mine.get(k) != want.get(k))
    tally.identical += not differ
    if differ:
        tally.details.append(f"job {job_id} (kills {[m.spec for m in chain]}): the store differs "
                             f"from the uninterrupted run at {differ[:6]}")


def _resumed(tally: _Tally, moment: Moment, planned, left: int) -> None:
    tally.resumed += planned == left
    if planned != left:
        tally.details.append(f"after the kill at {moment.spec} the next attempt planned {planned} "
                             f"chunks, the marker left {left}")


def run(kills: int = 10, creations: int = 2, per_job: int = 4, n_chunks: int = 7,
        seed: int = 20261202, time_budget_s: float = 1200.0) -> list:
    """Run the experiment (one server): ``kills`` kills inside chunk writes and ``creations``
    while a part is created, in jobs of up to ``per_job`` (plus one) kills, on a trace of
    ``n_chunks`` chunks; returns its table row."""
    from reliability.harness import Row, remove_tree

    rng = random.Random(seed)
    plan = make_plan(rng, n_chunks, kills, per_job, creations)
    total = sum(len(chain) for chain in plan)
    tmp = Path(tempfile.mkdtemp(prefix="bl-transform-kills-"))
    started = time.monotonic()
    tally = _Tally()
    site = None
    try:
        site = _Site(tmp)
        site.prepare(n_chunks)  # within the try: the server is stopped whatever happens
        for chain in plan:
            if time.monotonic() - started > time_budget_s:
                tally.details.append(f"time budget reached before the chain {[m.spec for m in chain]}")
                break
            _chain(site, chain, n_chunks, tally)
    except Exception as exc:  # the experiment itself broke: report, never pass
        tally.details.append(f"experiment aborted: {type(exc).__name__}: {exc}")
    finally:
        if site is not None:
            site.close()
        remove_tree(tmp)
    phases = ", ".join(f"{p} {tally.by_phase[p][1]}/{tally.by_phase[p][0]}"
                       for p in (*PHASES, CREATING) if p in tally.by_phase)
    met = (tally.kills == tally.fired == tally.landed == tally.resumed == total
           and tally.exposed == tally.unreadable == tally.temp_files == 0
           and tally.done == tally.identical == len(plan))
    elapsed = time.monotonic() - started
    return [Row(
        "8 transform kills (kill -9 mid-chunk)",
        f"{tally.fired}/{total} kills fired ({kills} in chunk writes, {creations} while creating "
        f"the part) in {len(plan)} jobs of {n_chunks} chunks; landed where planned and audited "
        f"clean, by phase: {phases}; store unreadable after a kill: {tally.unreadable}; temp files "
        f"of killed writes left in the served store: {tally.temp_files}",
        f"{tally.resumed}/{total} kills resumed; {tally.exposed} half-written chunks exposed; "
        f"{tally.identical}/{len(plan)} jobs done with arrays identical ({elapsed:.0f} s)",
        f"{total}/{total} kills resumed; 0 half-written chunks exposed; arrays identical; "
        "no temp file left",
        met, tally.details)]


if __name__ == "__main__":
    raise SystemExit(main())
