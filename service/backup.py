"""Backups of a data dir while the service runs, and their restore (``burstlens backup`` and
``burstlens restore``; deploy/README.md, "Backups").

A backup is a folder holding:

- ``burstlens.sqlite3``: the store, copied with SQLite's online backup API
  (:meth:`sqlite3.Connection.backup`) while one read transaction is held on the source, so
  every page comes from the same committed state even when the copy takes several steps and the
  service commits meanwhile (SQLite documentation, "Using the SQLite Online Backup API" and
  "Write-Ahead Logging": a reader in WAL mode sees the database as of its transaction's start);
- the blobs that copy names, under the same relative paths as in the data dir (the store keeps
  blob paths relative to the data dir, ``Store.path`` / ``Store.relative``): each corpus's
  folder, each job's result folder, a transform's Zarr store ``blobs/results/<job>/store.zarr``
  (also while it is being written) and each job's checkpoint;
- ``manifest.json`` (:data:`MANIFEST`): the schema version, the burstlens version, the UTC time,
  counts, and the size and sha256 of every other file. A restore verifies it first.

Blobs are written (temp file, fsync, rename) before the store names them, so every blob the
copied store names was complete when the store was copied. What can change after the snapshot
is handled here: a checkpoint replaced by a newer one (and deleted) is left out, and the job
starts over after a restore, as the worker does with any unusable checkpoint (the manifest
lists these jobs); a corpus deleted meanwhile is dropped from the copy, as if deleted just
before the snapshot.
A transform's Zarr store is copied metadata first: its chunk markers (``complete_until``) are
updated only after the chunks they count are written, so the copy never counts a chunk it lacks.

Both operations are atomic towards a kill -9: the result is built in a sibling folder named
``.burstlens-incomplete-backup.<name>.<random>`` (or ``-restore``), fsynced, and renamed into
place only when complete. A leftover one is never a backup; the next run in the same folder
removes it, unless another run is building in that folder at the time (``fcntl.flock`` on
the folder's ``.burstlens-backup-restore.lock``, which the kernel releases when its holder dies).

A restore never deletes a data dir: the existing one is renamed aside to
``<data dir>.before-restore-<UTC stamp>``. It refuses a data dir that a process holds open
(:func:`held_by_a_process`).
"""
from __future__ import annotations

import datetime as _dt
import fcntl
import hashlib
import json
import os
import shutil
import sqlite3
import uuid
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path, PurePosixPath

from burstlens.search import __version__
from burstlens.service.store import ACTIVE_STATES, SCHEMA_VERSION, fsync_dir

STORE_FILE = "burstlens.sqlite3"
MANIFEST = "manifest.json"
FORMAT = "burstlens backup"
FORMAT_VERSION = 1
INCOMPLETE_PREFIX = ".burstlens-incomplete-"
FOLDER_LOCK = ".burstlens-backup-restore.lock"
_CHUNK = 1 << 20          # bytes per read when copying and hashing
_STORE_PAGES = 256        # SQLite pages copied per backup step (the progress bar moves between)

# (stage, done, total) after each step of work: "store" counts SQLite pages, the others bytes
Progress = Callable[[str, int, int], None]
# Called with the name of each step reached (see STEPS); tests set it to stop a run there
step_hook: Callable[[str], None] | None = None
STEPS = ("store-step", "store-copied", "blob-copied", "manifest-written", "before-rename",
         "renamed", "restore-copied", "data-dir-aside")


class BackupError(ValueError):
    """Bad input to a backup or a restore: the message names the path and the cause."""


@dataclass(frozen=True)
class BackupResult:
    """A finished backup: its folder, the store's schema version, and the manifest's counts
    (``tokens``, ``corpora``, ``jobs``, ``jobs_by_state``, ``files``, ``bytes``, and what was
    dropped because it changed after the snapshot: ``dropped_checkpoints``, ``dropped_corpora``)."""
    path: Path
    schema_version: int
    counts: dict


@dataclass(frozen=True)
class RestoreResult:
    """A finished restore: the data dir, where the previous one was kept (None if there was
    none), and the backup's manifest."""
    data_dir: Path
    kept_aside: Path | None
    manifest: dict


def _reached(step: str) -> None:
    if step_hook is not None:
        step_hook(step)


def _utc_stamp(compact: bool = True) -> str:
    """Now in UTC, ISO 8601: basic format (for file names) or extended (for the manifest)."""
    return _dt.datetime.now(_dt.UTC).strftime("%Y%m%dT%H%M%SZ" if compact else "%Y-%m-%dT%H:%M:%SZ")


# -- the folder being built ----------------------------------------------------------------------
class _Building:
    """A sibling temp folder ``.burstlens-incomplete-<kind>.<name>.<random>`` of ``final``,
    removed on any failure.

    Every run building one in a folder holds a shared ``flock`` on that folder's
    :data:`FOLDER_LOCK` file while it does; leftovers are removed only under the exclusive lock,
    so never while another run builds, and the kernel drops a killed run's lock."""

    def __init__(self, final: Path, kind: str):
        self.final = final
        self.parent = final.parent
        self.path = self.parent / f"{INCOMPLETE_PREFIX}{kind}.{final.name}.{uuid.uuid4().hex[:12]}"
        self.lock_fd: int | None = None

    def __enter__(self) -> _Building:
        self.parent.mkdir(parents=True, exist_ok=True)
        self.lock_fd = os.open(self.parent / FOLDER_LOCK, os.O_CREAT | os.O_RDWR, 0o600)
        try:
            fcntl.flock(self.lock_fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            _remove_leftovers(self.parent)
        except BlockingIOError:
            pass  # another run is building here: leave the cleaning to a later run
        # (turning the lock shared lets others in; nothing of ours exists yet to be removed)
        fcntl.flock(self.lock_fd, fcntl.LOCK_SH)
        self.path.mkdir()
        return self

    def __exit__(self, exc_type, exc, tb) -> None:
        if exc_type is not None:
            shutil.rmtree(self.path, ignore_errors=True)
        os.close(self.lock_fd)


def _remove_leftovers(folder: Path) -> None:
    """Remove the temp folders that killed runs left in ``folder`` (caller holds the lock)."""
    for entry in folder.glob(INCOMPLETE_PREFIX + "*"):
        shutil.rmtree(entry, ignore_errors=True)


def _fsync_tree(root: Path) -> None:
    """fsync every folder under ``root`` (files are fsynced as they are written), deepest first,
    so every entry is durable before the rename that publishes ``root``."""
    folders = [Path(d) for d, _dirs, _files in os.walk(root)]
    for folder in sorted(folders, key=lambda p: len(p.parts), reverse=True):
        fsync_dir(folder)


def _copy_file(source: Path, target: Path) -> tuple[str, int]:
    """Copy one file, fsync the copy; returns the sha256 (hex) and size of the bytes copied."""
    digest, size = hashlib.sha256(), 0
    target.parent.mkdir(parents=True, exist_ok=True)
    with open(source, "rb") as src, open(target, "xb") as dst:
        while chunk := src.read(_CHUNK):
            digest.update(chunk)
            dst.write(chunk)
            size += len(chunk)
        dst.flush()
        os.fsync(dst.fileno())
    shutil.copystat(source, target)
    return digest.hexdigest(), size


def _sha256(path: Path) -> tuple[str, int]:
    digest, size = hashlib.sha256(), 0
    with open(path, "rb") as fh:
        while chunk := fh.read(_CHUNK):
            digest.update(chunk)
            size += len(chunk)
    return digest.hexdigest(), size


def _inside(root: Path, stored: str, what: str) -> Path:
    """``root / stored`` for a blob path as the store keeps it; refuses one that leaves
    ``root`` (absolute, or with ``..``)."""
    rel = PurePosixPath(stored)
    if rel.is_absolute() or ".." in rel.parts or not rel.parts or rel.parts[0] != "blobs":
        raise BackupError(f"{root / STORE_FILE}: {what} names {stored!r}, not a path under "
                          f"blobs/ of the data dir")
    return root / rel


# -- backup --------------------------------------------------------------------------------------
def backup(data_dir: str | os.PathLike, dest: str | os.PathLike, *,
           progress: Progress | None = None) -> BackupResult:
    """Back up the data dir ``data_dir`` (the service may be running) into the new folder
    ``dest``. Raises :class:`BackupError` for bad input (no data dir, ``dest`` exists, a
    schema version other than this release's); an ``OSError`` (disk full…) leaves no ``dest``."""
    data_dir, dest = Path(data_dir).absolute(), Path(dest).absolute()
    db = data_dir / STORE_FILE
    if not db.is_file():
        raise BackupError(f"{data_dir}: not a burstlens data dir (no {STORE_FILE} in it)")
    if dest.exists() or dest.is_symlink():
        raise BackupError(f"{dest}: already exists; a backup goes to a new folder")
    if dest == data_dir or data_dir in dest.parents:
        raise BackupError(f"{dest}: inside the data dir {data_dir}; back up to another folder")
    report = progress or (lambda _stage, _done, _total: None)
    with _Building(dest, "backup") as building:
        copy = building.path / STORE_FILE
        version = _copy_store(db, copy, report)
        if version != SCHEMA_VERSION:
            raise BackupError(
                f"{data_dir} holds schema version {version}; this release backs up schema "
                f"version {SCHEMA_VERSION}: open it once with this release (any `burstlens "
                f"tokens list --data-dir {data_dir}` migrates an older one), or use the release "
                f"that wrote it")
        counts = _copy_blobs(data_dir, building.path, copy, report)
        files = _file_table(building.path)
        counts.update(files=len(files), bytes=sum(f["bytes"] for f in files.values()))
        manifest = {"format": FORMAT, "format_version": FORMAT_VERSION,
                    "schema_version": version, "burstlens_version": __version__,
                    "created_utc": _utc_stamp(compact=False), "data_dir": str(data_dir), "counts": counts,
                    "files": files}
        _write_json(building.path / MANIFEST, manifest)
        _reached("manifest-written")
        _fsync_tree(building.path)
        _reached("before-rename")
        os.rename(building.path, dest)   # fails if dest appeared meanwhile: never overwritten
        _reached("renamed")
        fsync_dir(dest.parent)
    return BackupResult(dest, version, counts)


def _copy_store(db: Path, copy: Path, report: Progress) -> int:
    """Copy the store with the online backup API inside one read transaction on the source;
    check the copy and make it one self-contained file (rollback journal, no -wal). Returns
    the copy's schema version (``PRAGMA user_version``)."""
    # mode=rw: never create a store where there is none
    source = sqlite3.connect(f"file:{db}?mode=rw", uri=True, timeout=30.0, isolation_level=None)
    target = sqlite3.connect(copy, isolation_level=None)
    try:
        source.execute("PRAGMA busy_timeout=30000")
        source.execute("BEGIN")
        # the read transaction starts at the first read; every backup step then sees this state
        source.execute("SELECT COUNT(*) FROM sqlite_master").fetchone()

        def step(_status: int, remaining: int, total: int) -> None:
            report("store", total - remaining, total)
            _reached("store-step")

        source.backup(target, pages=_STORE_PAGES, progress=step)
        source.execute("COMMIT")
        check = target.execute("PRAGMA integrity_check").fetchone()[0]
        if check != "ok":
            raise OSError(f"{copy}: the copy of the store failed its integrity check: {check}")
        target.execute("PRAGMA journal_mode=DELETE")
        version = int(target.execute("PRAGMA user_version").fetchone()[0])
    finally:
        target.close()
        source.close()
    with open(copy, "rb") as fh:
        os.fsync(fh.fileno())
    _reached("store-copied")
    return version


def _copy_blobs(data_dir: Path, root: Path, copy: Path, report: Progress) -> dict:
    """Copy every blob the copied store names from ``data_dir`` into ``root``; leave out a
    checkpoint replaced after the snapshot, and drop from the copy a corpus deleted after it.
    Returns the counts of the manifest."""
    con = sqlite3.connect(copy, isolation_level=None)
    con.row_factory = sqlite3.Row
    try:
        corpora = con.execute("SELECT id, files FROM corpora ORDER BY id").fetchall()
        jobs = con.execute("SELECT id, kind, state, result_dir, checkpoint_path, "
                           "checkpoint_sha256 FROM jobs ORDER BY id").fetchall()
        active = {r["id"] for r in jobs if r["state"] in ACTIVE_STATES}
        plan: list[tuple[str, str, list[Path], Callable[[dict[Path, str]], bool]]] = []
        for row in corpora:
            folder = _inside(data_dir, f"blobs/corpora/{row['id']}", f"corpus {row['id']}")
            needed = [folder / f["stored"] for f in json.loads(row["files"])]
            plan.append(("corpus", row["id"], _tree(folder) if folder.is_dir() else needed,
                         lambda got, needed=needed: all(p in got for p in needed)))
        for row in jobs:
            if row["result_dir"]:
                folder = _inside(data_dir, row["result_dir"], f"job {row['id']}'s result_dir")
                plan.append(("result", row["id"], _tree(folder), lambda got: True))
            elif row["kind"] == "transform":
                # a transform being written: its store resumes from its own chunk markers
                store = data_dir / "blobs" / "results" / row["id"] / "store.zarr"
                if store.is_dir():
                    plan.append(("result", row["id"], _tree(store), lambda got: True))
            if row["checkpoint_path"]:
                # done jobs keep the path of a checkpoint already deleted: copied if present
                path = _inside(data_dir, row["checkpoint_path"], f"job {row['id']}'s checkpoint")
                plan.append(("checkpoint", row["id"], [path],
                             lambda got, p=path, d=row["checkpoint_sha256"]: got.get(p) == d))
        total = sum(_size(p) for _kind, _id, paths, _ok in plan for p in paths)
        done = 0
        report("blobs", 0, total)
        dropped: dict[str, list[str]] = {"corpus": [], "checkpoint": []}
        for kind, ident, paths, complete in plan:
            got: dict[Path, str] = {}
            for path in paths:
                try:
                    got[path], size = _copy_file(path, root / path.relative_to(data_dir))
                except FileNotFoundError:
                    if kind == "result":   # results are never deleted: something is wrong
                        raise OSError(f"{path}: a result file of job {ident} vanished during "
                                      "the backup") from None
                    continue
                done += size
                report("blobs", done, total)
                _reached("blob-copied")
            if complete(got):
                continue
            for path in got:
                (root / path.relative_to(data_dir)).unlink()
            if kind == "corpus":       # deleted after the snapshot (its row first, then files)
                con.execute("DELETE FROM corpora WHERE id = ?", (ident,))
                shutil.rmtree(root / "blobs" / "corpora" / ident, ignore_errors=True)
                dropped["corpus"].append(ident)
            elif ident in active:
                # replaced by a newer one: the job's row is kept as it was, and the first
                # worker after a restore finds the checkpoint gone and starts over, saying so
                # in the job's progress (service.worker, JobRun.load_checkpoint)
                dropped["checkpoint"].append(ident)
        states = dict(con.execute("SELECT state, COUNT(*) FROM jobs GROUP BY state").fetchall())
        counts = {"tokens": con.execute("SELECT COUNT(*) FROM tokens").fetchone()[0],
                  "corpora": len(corpora) - len(dropped["corpus"]), "jobs": len(jobs),
                  "jobs_by_state": states, "dropped_corpora": dropped["corpus"],
                  "dropped_checkpoints": dropped["checkpoint"]}
    finally:
        con.close()
    with open(copy, "rb") as fh:
        os.fsync(fh.fileno())
    return counts


def _tree(folder: Path) -> list[Path]:
    """The files under ``folder``, Zarr metadata (``zarr.json``) first (see the module's note),
    then the rest in name order; temp files of writes in progress are left out."""
    files = [Path(d) / f for d, _dirs, names in os.walk(folder) for f in names
             if not f.endswith(".tmp")]
    return sorted(files, key=lambda p: (p.name != "zarr.json", str(p)))


def _size(path: Path) -> int:
    try:
        return path.stat().st_size
    except FileNotFoundError:
        return 0


def _file_table(root: Path) -> dict[str, dict]:
    """Size and sha256 of every file under ``root`` but the manifest, by POSIX relative path."""
    table = {}
    for path in sorted(p for p in root.rglob("*") if p.is_file()):
        rel = path.relative_to(root).as_posix()
        if rel != MANIFEST:
            digest, size = _sha256(path)
            table[rel] = {"bytes": size, "sha256": digest}
    return table


def _write_json(path: Path, value: dict) -> None:
    with open(path, "x", encoding="utf-8") as fh:
        json.dump(value, fh, indent=1, sort_keys=True)
        fh.write("\n")
        fh.flush()
        os.fsync(fh.fileno())


# -- verify and restore --------------------------------------------------------------------------
def read_manifest(backup_dir: str | os.PathLike) -> dict:
    """The backup's manifest, checked for form; :class:`BackupError` naming the cause."""
    backup_dir = Path(backup_dir)
    path = backup_dir / MANIFEST
    if not backup_dir.is_dir():
        raise BackupError(f"{backup_dir}: no such backup folder")
    if backup_dir.name.startswith(INCOMPLETE_PREFIX):
        raise BackupError(f"{backup_dir}: left by an interrupted backup or restore run, never a "
                          "backup (even when it looks complete); the next run removes it")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise BackupError(f"{path}: missing; {backup_dir} is not a complete burstlens backup "
                          "(a folder named .burstlens-incomplete-* never is)") from None
    except (ValueError, UnicodeDecodeError) as exc:
        raise BackupError(f"{path}: not valid JSON ({exc})") from None
    if not isinstance(manifest, dict) or manifest.get("format") != FORMAT:
        raise BackupError(f"{path}: not a burstlens backup manifest (no format {FORMAT!r})")
    if manifest.get("format_version") != FORMAT_VERSION:
        raise BackupError(f"{path}: backup format version {manifest.get('format_version')!r}; "
                          f"this release reads version {FORMAT_VERSION}")
    files, version = manifest.get("files"), manifest.get("schema_version")
    if not isinstance(version, int) or not isinstance(files, dict) or STORE_FILE not in files:
        raise BackupError(f"{path}: incomplete manifest (schema_version, files and the store "
                          f"{STORE_FILE} are required)")
    for rel, entry in files.items():
        if (not isinstance(entry, dict) or not isinstance(entry.get("sha256"), str)
                or not isinstance(entry.get("bytes"), int)):
            raise BackupError(f"{path}: the entry of {rel!r} needs sha256 and bytes")
        parts = PurePosixPath(rel).parts
        if PurePosixPath(rel).is_absolute() or ".." in parts or not parts:
            raise BackupError(f"{path}: file {rel!r} is not a path inside the backup")
    return manifest


def verify(backup_dir: str | os.PathLike, *, progress: Progress | None = None) -> dict:
    """Check a backup against its manifest: every file present with its size and sha256, no
    file the manifest does not list, the store's own schema version equal to the manifest's and
    not newer than this release's. Returns the manifest; :class:`BackupError` names the first
    bad file (in path order) or both schema versions."""
    backup_dir = Path(backup_dir)
    manifest = read_manifest(backup_dir)
    version = manifest["schema_version"]
    if version > SCHEMA_VERSION:
        raise BackupError(_too_new(backup_dir, version))
    files = manifest["files"]
    present = {p.relative_to(backup_dir).as_posix() for p in backup_dir.rglob("*")
               if p.is_file() or p.is_symlink()} - {MANIFEST}
    report = progress or (lambda _stage, _done, _total: None)
    total, done = sum(e["bytes"] for e in files.values()), 0
    report("verify", 0, total)
    for rel in sorted(set(files) | present):
        path = backup_dir / rel
        if rel not in files:
            raise BackupError(f"{path}: in the backup but not in its manifest (altered backup)")
        if rel not in present:
            raise BackupError(f"{path}: listed in the manifest but missing from the backup")
        if path.is_symlink():
            raise BackupError(f"{path}: a symbolic link; a backup holds only plain files")
        digest, size = _sha256(path)
        if size != files[rel]["bytes"] or digest != files[rel]["sha256"]:
            raise BackupError(f"{path}: sha256 {digest[:16]}… ({size} bytes) differs from the "
                              f"manifest's {files[rel]['sha256'][:16]}… ({files[rel]['bytes']} "
                              "bytes): altered or damaged backup")
        done += size
        report("verify", done, total)
    con = sqlite3.connect(f"file:{backup_dir / STORE_FILE}?mode=ro&immutable=1", uri=True)
    try:
        stored = int(con.execute("PRAGMA user_version").fetchone()[0])
    except sqlite3.DatabaseError as exc:
        raise BackupError(f"{backup_dir / STORE_FILE}: not a readable SQLite store ({exc})") from None
    finally:
        con.close()
    if stored != version:
        raise BackupError(f"{backup_dir / STORE_FILE}: holds schema version {stored}, the "
                          f"manifest says {version}")
    return manifest


def _too_new(where: Path, version: int) -> str:
    return (f"{where} holds schema version {version}, written by a newer burstlens; this "
            f"release reads schema version {SCHEMA_VERSION} and older. Restore it with the "
            f"newer release, or restore a backup made by this one")


def held_by_a_process(data_dir: str | os.PathLike, timeout_s: float = 0.5) -> bool:
    """True when some process (``serve``, ``worker``, ``tokens``…) has the data dir's store open.

    In WAL mode every open connection keeps a shared lock on the database file for as long as
    it is open, idle or not, while an exclusive lock needs all of them gone (SQLite
    documentation, "Write-Ahead Logging", on ``locking_mode=EXCLUSIVE``; "File Locking And
    Concurrency In SQLite Version 3"). So this takes the exclusive lock with a short timeout and
    gives it back. ``BEGIN IMMEDIATE`` alone would miss an idle server (it only meets writers),
    and a lock file of our own would need every process to take it and would go stale after a
    kill -9; the lock SQLite already holds is released by the kernel when its holder dies.
    """
    db = Path(data_dir) / STORE_FILE
    if not db.exists():
        return False
    con = sqlite3.connect(f"file:{db}?mode=rw", uri=True, timeout=timeout_s,
                          isolation_level=None)
    try:
        con.execute("PRAGMA locking_mode=EXCLUSIVE")
        con.execute("BEGIN EXCLUSIVE")
        con.execute("ROLLBACK")
        return False
    except sqlite3.OperationalError as exc:
        if "locked" in str(exc) or "busy" in str(exc):
            return True
        raise
    finally:
        con.close()


def restore(backup_dir: str | os.PathLike, data_dir: str | os.PathLike, *,
            progress: Progress | None = None) -> RestoreResult:
    """Put the backup ``backup_dir`` in place as the data dir ``data_dir`` after verifying it
    (:func:`verify`). An existing data dir is renamed to ``<data_dir>.before-restore-<UTC
    stamp>``, never deleted; one that a process holds open is refused, and so is an existing
    folder that is neither empty nor a data dir. Raises :class:`BackupError` for bad input."""
    backup_dir, data_dir = Path(backup_dir).absolute(), Path(data_dir).absolute()
    if data_dir == backup_dir or backup_dir in data_dir.parents or data_dir in backup_dir.parents:
        raise BackupError(f"{data_dir}: the data dir and the backup {backup_dir} overlap")
    report = progress or (lambda _stage, _done, _total: None)
    manifest = verify(backup_dir, progress=report)
    if data_dir.is_symlink() or (data_dir.exists() and not data_dir.is_dir()):
        raise BackupError(f"{data_dir}: exists and is not a folder")
    if data_dir.is_dir() and not (data_dir / STORE_FILE).exists() and any(data_dir.iterdir()):
        raise BackupError(f"{data_dir}: not empty and not a burstlens data dir (no {STORE_FILE}); "
                          "name the data dir itself, or a new folder")
    if held_by_a_process(data_dir):
        raise BackupError(f"{data_dir}: a running burstlens process (serve, worker, tokens…) holds "
                          "its store open; stop the service first")
    with _Building(data_dir, "restore") as building:
        _copy_listed(backup_dir, building.path, manifest["files"], report)
        for folder in ("tmp", "blobs/corpora", "blobs/checkpoints", "blobs/results"):
            (building.path / folder).mkdir(parents=True, exist_ok=True)
        _fsync_tree(building.path)
        _reached("restore-copied")
        kept = None
        if data_dir.exists():
            if held_by_a_process(data_dir):   # again, just before the swap
                raise BackupError(f"{data_dir}: a burstlens process opened it during the "
                                  "restore; stop the service first")
            kept = _aside_name(data_dir)
            os.rename(data_dir, kept)
            _reached("data-dir-aside")
        os.rename(building.path, data_dir)
        fsync_dir(data_dir.parent)
    return RestoreResult(data_dir, kept, manifest)


def _copy_listed(backup_dir: Path, root: Path, files: dict, report: Progress) -> None:
    """Copy the manifest's files, checking each copy's sha256 again (the backup could change
    between the verification and the copy)."""
    total, done = sum(e["bytes"] for e in files.values()), 0
    report("restore", 0, total)
    for rel in sorted(files):
        digest, size = _copy_file(backup_dir / rel, root / rel)
        if digest != files[rel]["sha256"]:
            raise BackupError(f"{backup_dir / rel}: changed while it was restored (sha256 "
                              "differs from the manifest)")
        done += size
        report("restore", done, total)


def _aside_name(data_dir: Path) -> Path:
    base = data_dir.with_name(f"{data_dir.name}.before-restore-{_utc_stamp()}")
    candidate, n = base, 1
    while candidate.exists():
        n += 1
        candidate = base.with_name(f"{base.name}-{n}")
    return candidate

