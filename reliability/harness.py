"""What every experiment shares: result rows, servers and workers, data-dir audits.

Servers are started with the service tests' own helpers (``burstlens.service.testing``:
``LiveServer``, ``burst_npz``, ``TINY``), so the campaign exercises exactly the process the tests
and the deployment use. Extra ``burstlens worker`` processes (plain or with a fault injected, see
:mod:`reliability.faulty_worker`) are started here, always bounded and always reaped.
"""
from __future__ import annotations

import hashlib
import json
import os
import signal
import sqlite3
import subprocess
import sys
import time
from dataclasses import dataclass, field
from pathlib import Path

from burstlens.service.testing import TINY, LiveServer, burst_npz, corpus_files, service_env

ROOT = Path(os.path.abspath(__file__)).parents[1]  # not resolved: a linked checkout stays itself

__all__ = ["ROOT", "TINY", "LiveServer", "burst_npz", "corpus_files", "service_env", "Row",
           "Workers", "DataDirAudit", "integrity_check", "db_rows", "wait_until", "FINAL",
           "percentile", "cli_token", "SMALL", "comparable", "remove_tree"]

FINAL = ("done", "error", "withdrawn")
# The smallest job that still runs every stage of the search (family, refinement, judgement):
# about 10 rounds, a few seconds of compute, on one 12 s corpus file.
SMALL = {"channels": 4, "evaluations": 6, "bootstrap": 2, "seed": 3, "window_s": 0.128}


@dataclass
class Row:
    """One line of the campaign's table: what was tried, what came back, and the goal."""

    experiment: str
    counts: str
    result: str
    goal: str
    met: bool
    details: list[str] = field(default_factory=list)  # findings worth a bug report (not printed)


def comparable(filterbank: dict | None, job_id: str) -> str:
    """A job's filterbank JSON as text with the one thing that must differ between jobs, the
    job's own id, blanked wherever it appears."""
    import json

    return json.dumps(filterbank, sort_keys=True).replace(job_id, "<job>")


def remove_tree(path: Path) -> None:
    """Remove an experiment's temp folder, again if a process that was still stopping wrote
    into it meanwhile (bounded: a few tries over a few seconds)."""
    import shutil

    for _ in range(10):
        shutil.rmtree(path, ignore_errors=True)
        if not os.path.exists(path):
            return
        time.sleep(0.5)


def wait_until(predicate, timeout: float, interval: float = 0.1):
    """``predicate()``'s first truthy value within ``timeout`` seconds, else None (never raises)."""
    deadline = time.monotonic() + timeout
    while True:
        value = predicate()
        if value:
            return value
        if time.monotonic() >= deadline:
            return None
        time.sleep(interval)


def percentile(values: list[float], q: float) -> float:
    """The q-th percentile (0–100) by linear interpolation between order statistics (numpy's
    default definition); NaN for no values."""
    import numpy as np

    return float(np.percentile(values, q)) if values else float("nan")


class Workers:
    """``burstlens worker`` processes started by an experiment; :meth:`stop_all` reaps them."""

    def __init__(self, data_dir: Path, **env):
        self.data_dir = Path(data_dir)
        self.env = service_env(**env)
        self.procs: list[subprocess.Popen] = []

    def start(self, fault: str | None = None, stats: Path | None = None) -> subprocess.Popen:
        if fault is None:
            cmd = [sys.executable, "-m", "burstlens.service.cli", "worker", "--data-dir", str(self.data_dir),
                   "--log-level", "warning"]
        else:
            cmd = [sys.executable, "-m", "reliability.faulty_worker", "--data-dir",
                   str(self.data_dir), "--fault", fault]
            if stats is not None:
                cmd += ["--stats", str(stats)]
        proc = subprocess.Popen(cmd, cwd=ROOT, env=self.env)
        self.procs.append(proc)
        return proc

    def stop(self, proc: subprocess.Popen, timeout: float = 60.0) -> int:
        """SIGTERM (the graceful stop of docs/design.md §7), SIGKILL if it does not end in ``timeout``."""
        if proc.poll() is None:
            proc.send_signal(signal.SIGTERM)
            try:
                proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()
        return proc.returncode

    def outcome(self, proc: subprocess.Popen, stats: Path, timeout: float) -> tuple[int | None, dict]:
        """Wait for a fault-injected worker (stopped past ``timeout``): its exit code and the
        JSON it noted in ``stats`` ({} when it wrote none)."""
        try:
            code = proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            code = self.stop(proc)
        return code, (json.loads(stats.read_text()) if stats.exists() else {})

    def stop_all(self) -> None:
        for proc in self.procs:
            self.stop(proc, timeout=30.0)


def db_rows(data_dir: Path, sql: str, args: tuple = ()) -> list[dict]:
    """Rows of a read-only query on the store, opened apart from the service's connections."""
    con = sqlite3.connect(f"file:{Path(data_dir) / 'burstlens.sqlite3'}?mode=ro", uri=True,
                          timeout=30.0)
    try:
        con.row_factory = sqlite3.Row
        return [dict(r) for r in con.execute(sql, args).fetchall()]
    finally:
        con.close()


def integrity_check(data_dir: Path) -> str:
    """``PRAGMA integrity_check`` of the store: 'ok' or SQLite's list of problems (SQLite docs)."""
    try:
        rows = db_rows(data_dir, "PRAGMA integrity_check")
    except sqlite3.Error as exc:
        return f"cannot open: {exc}"
    return "; ".join(str(next(iter(r.values()))) for r in rows)


def cli_token(data_dir: Path, *args: str) -> str:
    """Run ``burstlens tokens --data-dir D ARGS`` (the operator's way); returns its stdout."""
    out = subprocess.run([sys.executable, "-m", "burstlens.service.cli", "tokens", "--data-dir",
                          str(data_dir), *args], cwd=ROOT, env=service_env(), capture_output=True,
                         text=True, timeout=120, check=True)
    return out.stdout.strip()


class DataDirAudit:
    """Snapshots of what a data dir holds, to prove a rejected request changed nothing.

    A snapshot is every file under the data dir (relative path, size, sha256 for small files)
    except SQLite's own journal files, plus each table's row count and a digest of its rows.
    """

    SKIP = {"burstlens.sqlite3", "burstlens.sqlite3-wal", "burstlens.sqlite3-shm"}
    TABLES = ("tokens", "corpora", "jobs", "job_rounds", "evaluations")

    def __init__(self, data_dir: Path):
        self.data_dir = Path(data_dir)

    def files(self) -> dict[str, tuple]:
        out = {}
        for dirpath, dirnames, filenames in os.walk(self.data_dir):
            for name in dirnames:
                rel = os.path.relpath(os.path.join(dirpath, name), self.data_dir)
                out[rel + "/"] = ("dir",)
            for name in filenames:
                if name in self.SKIP and dirpath == str(self.data_dir):
                    continue
                full = os.path.join(dirpath, name)
                rel = os.path.relpath(full, self.data_dir)
                try:
                    size = os.path.getsize(full)
                    small = size < 1 << 20
                    digest = hashlib.sha256(Path(full).read_bytes()).hexdigest() if small else ""
                except FileNotFoundError:  # removed while we looked
                    continue
                out[rel] = (size, digest)
        return out

    def tables(self) -> dict[str, tuple]:
        out = {}
        for table in self.TABLES:
            rows = db_rows(self.data_dir, f"SELECT * FROM {table} ORDER BY rowid")
            digest = hashlib.sha256(repr([tuple(r.values()) for r in rows]).encode()).hexdigest()
            out[table] = (len(rows), digest)
        return out

    def snapshot(self) -> tuple[dict, dict]:
        return self.files(), self.tables()

    @staticmethod
    def diff(before: tuple[dict, dict], after: tuple[dict, dict]) -> list[str]:
        """Human-readable differences between two snapshots (empty: nothing changed)."""
        (fa, ta), (fb, tb) = before, after
        out = [f"new file {k}" for k in sorted(set(fb) - set(fa))]
        out += [f"file gone {k}" for k in sorted(set(fa) - set(fb))]
        out += [f"file changed {k}" for k in sorted(set(fa) & set(fb)) if fa[k] != fb[k]]
        out += [f"table {t}: {ta[t][0]} -> {tb[t][0]} rows"
                + ("" if ta[t][0] != tb[t][0] else " (content)")
                for t in ta if ta[t] != tb.get(t)]
        return out

    def orphans(self) -> list[str]:
        """Files a crash or a rejected request may have left: unfinished uploads under tmp/,
        corpus folders without a row, rows without a folder, temp files of blob writes."""
        out = [f"tmp/{e}" for e in sorted(os.listdir(self.data_dir / "tmp"))]
        known = {r["id"] for r in db_rows(self.data_dir, "SELECT id FROM corpora")}
        folders = set(os.listdir(self.data_dir / "blobs" / "corpora"))
        out += [f"corpus folder without a row: {f}" for f in sorted(folders - known)]
        out += [f"corpus row without a folder: {f}" for f in sorted(known - folders)]
        for dirpath, _dirs, filenames in os.walk(self.data_dir / "blobs"):
            out += [f"blob temp file {os.path.relpath(os.path.join(dirpath, n), self.data_dir)}"
                    for n in filenames if n.startswith(".") and n.endswith(".tmp")]
        return out
