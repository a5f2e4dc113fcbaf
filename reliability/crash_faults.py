"""Experiment 1 — crash faults: kill -9 a worker at seeded moments of a running job.

Promise (docs/design.md §5, §7): an expired lease is reclaimed and the job resumes from its last
checkpoint; a resumed job ends with the same filterbank as an uninterrupted one; a torn or corrupt
checkpoint is detected and the job falls back to an earlier one or restarts clean, never resumes
from garbage.

Method: ``serve --workers 0`` gives the API; each job is run by a worker started here. A
reference job runs uninterrupted (twice, to show the run is reproducible at all). Then, for each
seeded fault (100 in a full run), a job on the same corpus and settings is claimed by a
:mod:`faulty_worker` that SIGKILLs itself during a round, inside a checkpoint write, inside a
heartbeat's transaction before its COMMIT, or — every fifth fault — inside SQLite's own COMMIT of
one of the job thread's write transactions (the claim, a progress report, a checkpoint record,
the finish): mostly between the WAL write and the commit's completion, some at the COMMIT's
start and some once the wal-index shows it. Right after such a kill, before any other process
writes to the store, :func:`faulty_worker.commit_moment` reads ``-wal`` and ``-shm`` and says
where it landed (no frame on file; the transaction's frames complete, checksums valid, not yet
published; published); the row counts each, and at least one must have landed after the frames
were written. A plain ``burstlens worker`` then reclaims the job once its lease expires. The job
must end ``done`` with a filterbank identical to the reference (only ``provenance.job_id``
differs), leaving no file in ``blobs/checkpoints``.
Deliberate corruptions: the job's recorded checkpoint is truncated, bit-flipped, overwritten,
deleted, or replaced by a well-formed pickle of the wrong state with a digest that matches (the
store row updated too); the job must then start over (``progress.resumed`` false) and still end
identical.
Attempt limit: every attempt of one job is killed; past the limit the job must end ``error``
with its last error kept. Two lanes (servers with their own data dirs) share the plan.

Cost: one fault is a faulty worker's start and partial run, the lease (2 s), and a plain
worker's start and the rest of the run with its report; the job (``SMALL``: 10 progress
reports, 8 checkpoints, 20 commits of the job's thread) is the smallest that runs every stage of
the search. Most of a fault's time is process start and the report's figures, not the search.
"""
from __future__ import annotations

import hashlib
import pickle
import random
import sqlite3
import tempfile
import threading
import time
from pathlib import Path

import httpx

from reliability.faulty_worker import commit_moment
from reliability.harness import (FINAL, SMALL, LiveServer, Row, Workers, comparable, corpus_files,
                                 db_rows, remove_tree, wait_until)

LEASE_S = 2.0
MAX_ATTEMPTS = 3  # burstlens.service.testing.service_env sets BURSTLENS_MAX_ATTEMPTS=3
CORRUPTIONS = ("truncated", "forged-digest", "bit-flip", "overwritten", "deleted")
# where a kill inside a COMMIT landed (faulty_worker.commit_moment), in the table's words
COMMIT_MOMENTS = (("before-frames", "before its WAL frames"),
                  ("frames-unpublished", "with its frames written and not yet published"),
                  ("published", "published but COMMIT not returned"))


def make_plan(rng: random.Random, stats: dict, faults: int) -> list[str]:
    """``faults`` fault specs for :mod:`reliability.faulty_worker`, moments drawn from ``rng``
    within the reference run's counts: every fifth (from the second) inside SQLite's COMMIT of
    one of the job thread's write transactions, the others during a round, a checkpoint or a
    heartbeat in turn."""
    rounds, beats = max(2, stats["progress"]), max(2, stats["heartbeat"])
    checkpoints = max(1, stats["checkpoint"])
    commits = max(1, stats["commit"])
    round_s = stats["seconds"] / rounds
    plan = []
    others = 0
    for i in range(faults):
        if i % 5 == 1:
            # mostly aimed between the WAL write and the commit's completion; some at the
            # COMMIT's start and some right after the wal-index shows it, for the edges
            phase = rng.choice(("frames", "frames", "frames", "begin", "published"))
            spec = f"commit:{rng.randint(1, commits)}:{phase}"
            plan.append(spec + (f":{rng.uniform(0.0, 300.0):.0f}" if phase == "frames" else ""))
            continue
        kind = ("round", "checkpoint", "heartbeat")[others % 3]
        others += 1
        if kind == "round":
            plan.append(f"round:{rng.randint(1, rounds - 1)}:{rng.uniform(0.0, round_s):.3f}")
        elif kind == "checkpoint":
            phase = rng.choice(("write", "write", "before-record", "after-record"))
            spec = f"checkpoint:{rng.randint(1, checkpoints)}:{phase}"
            plan.append(spec + (f":{rng.uniform(0.05, 0.95):.2f}" if phase == "write" else ""))
        else:
            # within the first half: a faulted run can be shorter than the reference
            plan.append(f"heartbeat:{rng.randint(1, max(1, beats // 2))}")
    return plan


class _Campaign:
    def __init__(self, tmp: Path, settings: dict):
        self.data = tmp / "data"
        self.tmp = tmp
        self.settings = settings
        self.server = LiveServer(self.data, workers=0, BURSTLENS_LEASE_S=LEASE_S).start()
        self.workers = Workers(self.data, BURSTLENS_LEASE_S=LEASE_S)
        self.client = httpx.Client(base_url=self.server.url, timeout=60.0)
        response = self.client.post("/v1/corpora", files=corpus_files(1))
        response.raise_for_status()
        self.corpus_id = response.json()["id"]

    def close(self) -> None:
        self.client.close()
        self.workers.stop_all()
        self.server.stop()

    def submit(self) -> str:
        response = self.client.post("/v1/jobs", json={"corpus_id": self.corpus_id,
                                                      "settings": self.settings})
        response.raise_for_status()
        return response.json()["id"]

    def job(self, job_id: str) -> dict:
        return self.client.get(f"/v1/jobs/{job_id}").json()

    def run_faulty(self, spec: str, timeout: float = 180.0) -> tuple[int | None, dict]:
        stats = self.tmp / f"stats-{time.monotonic_ns()}.json"
        return self.workers.outcome(self.workers.start(fault=spec, stats=stats), stats, timeout)

    def recover(self, job_id: str, timeout: float = 180.0) -> dict:
        """A plain worker takes the job over (after its lease expires) and runs it to the end."""
        proc = self.workers.start()
        try:
            wait_until(lambda: self.job(job_id)["state"] in FINAL, timeout, interval=0.2)
        finally:
            self.workers.stop(proc)
        return self.job(job_id)

    def filterbank(self, job_id: str) -> dict | None:
        response = self.client.get(f"/v1/jobs/{job_id}/filterbank")
        return response.json() if response.status_code == 200 else None

    def leftovers(self, job_id: str) -> list[str]:
        folder = self.data / "blobs" / "checkpoints"
        return sorted(p.name for p in folder.iterdir() if job_id in p.name)

    def corrupt(self, job_id: str, how: str, rng: random.Random) -> bool:
        """Damage the job's recorded checkpoint; False if it had none to damage."""
        row = db_rows(self.data, "SELECT checkpoint_path FROM jobs WHERE id = ?", (job_id,))[0]
        if not row["checkpoint_path"]:
            return False
        path = self.data / row["checkpoint_path"]
        data = path.read_bytes()
        if how == "truncated":
            path.write_bytes(data[: len(data) // 2])
        elif how == "bit-flip":
            i = rng.randrange(len(data))
            path.write_bytes(data[:i] + bytes([data[i] ^ 0x40]) + data[i + 1:])
        elif how == "overwritten":
            path.write_bytes(rng.randbytes(len(data)))
        elif how == "deleted":
            path.unlink()
        elif how == "forged-digest":
            # well-formed pickle, matching digest in the store: only the engine can refuse it
            forged = pickle.dumps({"format": "not-a-search-state", "version": -1, "x": [1, 2, 3]})
            path.write_bytes(forged)
            con = sqlite3.connect(self.data / "burstlens.sqlite3", timeout=30.0)
            try:
                with con:
                    con.execute("UPDATE jobs SET checkpoint_sha256 = ? WHERE id = ?",
                                (hashlib.sha256(forged).hexdigest(), job_id))
            finally:
                con.close()
        return True


class _Tally:
    """Counts shared by the lanes (each lane is one thread driving its own server)."""

    def __init__(self):
        self.lock = threading.Lock()
        self.details: list[str] = []
        self.fired = self.identical = self.leftover_jobs = 0
        self.by_kind: dict[str, list[int]] = {}
        self.commit_moments: dict[str, int] = {}  # where the kills inside a COMMIT landed
        self.corrupt_done = self.corrupt_ok = self.resumed_garbage = 0
        self.references: list[str] = []
        self.exhausted: dict | None = None

    def note(self, text: str) -> None:
        with self.lock:
            self.details.append(text)


def _exhaust(campaign: _Campaign) -> dict:
    """Kill every attempt of one job: past the attempt limit it must end ``failed`` with its
    last error kept (docs/design.md §7)."""
    job_id = campaign.submit()
    for _ in range(MAX_ATTEMPTS):
        # right after each attempt's first round: a resumed attempt has fewer rounds left
        campaign.run_faulty("round:1:0.0")
    done = campaign.recover(job_id)
    return {"state": done["state"], "error": done["error"] or "",
            "left": campaign.leftovers(job_id)}


def _lane(tmp: Path, settings: dict, specs: list[str], corruptions: list[str], seed: int,
          deadline: float, tally: _Tally, plan_from: threading.Event, stats_box: dict,
          exhaust: bool = False) -> None:
    """One server and data dir: a reference run, then its share of the faults and corruptions."""
    rng = random.Random(seed)
    campaign = None
    try:
        campaign = _Campaign(tmp, settings)
        ref_id = campaign.submit()
        _code, stats = campaign.run_faulty("none")
        reference = campaign.filterbank(ref_id)
        if reference is None:
            raise RuntimeError(f"reference job did not succeed: {campaign.job(ref_id)}")
        reference = comparable(reference, ref_id)
        with tally.lock:
            tally.references.append(reference)
            stats_box.setdefault("stats", stats)
        plan_from.set()
        for spec in specs:
            if time.monotonic() > deadline:
                tally.note(f"time budget reached before fault {spec}")
                break
            job_id = campaign.submit()
            code, noted = campaign.run_faulty(spec)
            killed = code == -9
            kind = spec.split(":")[0]
            if kind == "commit" and killed:
                # read the WAL before any other process writes to the store again
                moment = commit_moment(campaign.data / "burstlens.sqlite3",
                                       noted["commit_before"]) if "commit_before" in noted \
                    else "not noted"
                with tally.lock:
                    tally.commit_moments[moment] = tally.commit_moments.get(moment, 0) + 1
            done = campaign.recover(job_id)
            same = done["state"] == "done" and \
                comparable(campaign.filterbank(job_id), job_id) == reference
            left = campaign.leftovers(job_id)
            with tally.lock:
                tally.fired += killed
                tally.identical += same and killed
                tally.by_kind.setdefault(kind, [0, 0])
                tally.by_kind[kind][0] += killed
                tally.by_kind[kind][1] += same and killed
                tally.leftover_jobs += bool(left)
            if not killed:
                tally.note(f"fault {spec}: the worker was not killed (exit {code})")
            if not same:
                tally.note(f"fault {spec}: job ended {done['state']} (attempts {done['attempts']}, "
                           f"error {done['error']!r}), filterbank "
                           f"{'differs from' if done['state'] == 'done' else 'missing vs'} "
                           "the uninterrupted run")
            if left:
                tally.note(f"fault {spec}: files left in blobs/checkpoints after the job ended "
                           f"{done['state']}: {left}")
        if exhaust and time.monotonic() < deadline:
            tally.exhausted = _exhaust(campaign)
        for how in corruptions:
            if time.monotonic() > deadline:
                tally.note(f"time budget reached before corruption {how}")
                break
            job_id = campaign.submit()
            # kill in the middle of the run so that a checkpoint is recorded, then damage it
            campaign.run_faulty(f"round:{max(2, stats['progress'] // 2)}:0.0")
            if not campaign.corrupt(job_id, how, rng):
                tally.note(f"corruption {how}: no checkpoint was recorded to damage")
                continue
            done = campaign.recover(job_id)
            progress = done.get("progress") or {}
            same = done["state"] == "done" and \
                comparable(campaign.filterbank(job_id), job_id) == reference
            clean = progress.get("resumed") is False
            left = campaign.leftovers(job_id)
            with tally.lock:
                tally.corrupt_done += 1
                tally.resumed_garbage += done["state"] == "done" and not clean
                tally.corrupt_ok += same and clean
                tally.leftover_jobs += bool(left)
            if not (same and clean):
                tally.note(f"corruption {how}: job ended {done['state']} (error {done['error']!r}), "
                           f"resumed={progress.get('resumed')}, checkpoint_problem="
                           f"{progress.get('checkpoint_problem')!r}, identical={same}")
            if left:
                tally.note(f"corruption {how}: files left in blobs/checkpoints: {left}")
    except Exception as exc:  # the experiment itself broke: report, never pass
        tally.note(f"lane aborted: {type(exc).__name__}: {exc}")
    finally:
        plan_from.set()
        if campaign is not None:
            campaign.close()


def run(faults: int = 100, corruptions: int = len(CORRUPTIONS), seed: int = 20261202,
        settings: dict | None = None, lanes: int = 2, time_budget_s: float = 2400.0) -> list[Row]:
    """Run the experiment on ``lanes`` servers in parallel; returns its two table rows."""
    settings = dict(settings or SMALL)
    tmp = Path(tempfile.mkdtemp(prefix="bl-crash-"))
    started = time.monotonic()
    tally = _Tally()
    # the moments are drawn from the counts of the first reference run, so lane 0 runs its
    # reference first and the plan is drawn before any lane starts faulting
    stats_box: dict = {}
    first_ready = threading.Event()
    plan_ready = threading.Event()
    plan: list[str] = []
    threads = []
    try:
        for lane in range(lanes):
            ready = first_ready if lane == 0 else threading.Event()
            specs = _LazySpecs(plan, plan_ready, lane, lanes)
            hows = list(CORRUPTIONS[:corruptions])[lane::lanes]
            thread = threading.Thread(target=_lane, args=(
                tmp / f"lane{lane}", settings, specs, hows, seed + lane,
                started + time_budget_s, tally, ready, stats_box, lane == lanes - 1))
            threads.append(thread)
            thread.start()
        first_ready.wait(timeout=time_budget_s)
        if "stats" in stats_box:
            plan.extend(make_plan(random.Random(seed), stats_box["stats"], faults))
        plan_ready.set()
        for thread in threads:
            thread.join()
    finally:
        plan_ready.set()
        remove_tree(tmp)
    reproducible = len(tally.references) == lanes and len(set(tally.references)) == 1
    if not reproducible:
        tally.details.append(f"the {len(tally.references)} uninterrupted reference runs gave "
                             f"{len(set(tally.references))} different filterbanks")
    kinds = ", ".join(f"{k} {v[1]}/{v[0]}" for k, v in sorted(tally.by_kind.items()))
    commit_kills = tally.by_kind.get("commit", [0, 0])[0]
    moments = ", ".join(f"{tally.commit_moments.get(m, 0)} {words}" for m, words in COMMIT_MOMENTS)
    after_frames = sum(tally.commit_moments.get(m, 0) for m in ("frames-unpublished", "published"))
    elapsed = time.monotonic() - started
    return [
        Row("1 crash faults (kill -9 worker)",
            f"{tally.fired}/{faults} kills fired ({kinds}); the {commit_kills} inside SQLite's "
            f"COMMIT landed: {moments}; {lanes} uninterrupted references identical: "
            f"{'yes' if reproducible else 'NO'}; jobs leaving checkpoint files: "
            f"{tally.leftover_jobs}",
            f"{tally.identical}/{faults} done with the identical filterbank ({elapsed:.0f} s)",
            f"{faults}/{faults} identical, no checkpoint file left, a COMMIT killed after its WAL "
            "frames were written",
            tally.identical == faults and tally.fired == faults and reproducible
            and tally.leftover_jobs == 0 and (after_frames > 0 or commit_kills == 0),
            tally.details),
        Row("1 corrupt checkpoint",
            f"{tally.corrupt_done}/{corruptions} damaged ({', '.join(CORRUPTIONS[:corruptions])})",
            f"{tally.corrupt_ok}/{corruptions} restarted clean and identical; resumed from "
            f"garbage: {tally.resumed_garbage}",
            f"{corruptions}/{corruptions} clean, 0 from garbage",
            tally.corrupt_ok == corruptions and tally.resumed_garbage == 0, []),
        _exhausted_row(tally.exhausted),
    ]


def _exhausted_row(outcome: dict | None) -> Row:
    goal = f"failed after {MAX_ATTEMPTS} attempts, last error kept"
    if outcome is None:
        return Row("1 attempt limit", "-", "not run (time budget)", goal, False)
    ok = outcome["state"] == "error" and f"{MAX_ATTEMPTS} attempts" in outcome["error"]
    details = [] if ok else [f"attempt limit: job ended {outcome['state']}, error "
                             f"{outcome['error']!r}"]
    if outcome["left"]:
        details.append(f"attempt limit: the failed job left checkpoint files {outcome['left']}")
    return Row("1 attempt limit", f"{MAX_ATTEMPTS} of {MAX_ATTEMPTS} attempts of one job killed; "
               f"checkpoint files left after it failed: {len(outcome['left'])}",
               f"{outcome['state']}: {outcome['error'][:90]!r}", goal, ok, details)


class _LazySpecs:
    """A lane's share of the fault plan, which exists only once the first reference has run."""

    def __init__(self, plan: list[str], ready: threading.Event, lane: int, lanes: int):
        self.plan, self.ready, self.lane, self.lanes = plan, ready, lane, lanes

    def __iter__(self):
        self.ready.wait()
        return iter(self.plan[self.lane::self.lanes])
