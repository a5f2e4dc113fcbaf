"""``burstlens backup DATA_DIR DEST`` (service.backup; ``restore`` is in restore.py).

Exit status: 0 done, 2 bad input (no data dir, DEST exists, a backup that does not verify or
is of a newer schema, a data dir a running process holds), 1 a failure while working (disk
full, I/O error); every message names the path and the cause.
"""
from __future__ import annotations

import argparse
import sys

from tqdm import tqdm

from burstlens.service.backup import BackupError, backup


def register(p) -> None:
    p.description = ("Copy the store with SQLite's online backup API (one consistent snapshot, "
                     "while the service runs) and the blobs it names into the new folder DEST, "
                     "with a manifest of every file's sha256. DEST appears only once complete; "
                     "an interrupted run leaves at most a folder named "
                     ".burstlens-incomplete-backup.*, which the next run removes.")
    p.add_argument("data_dir", metavar="DATA_DIR", help="the service's data dir")
    p.add_argument("dest", metavar="DEST", help="the backup folder to create (must not exist)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run_backup)


class ProgressBar:
    """The ``progress`` callback of service.backup: one tqdm bar on stderr per stage of the
    work (the store's pages, then bytes of blobs, of verification, of restored files)."""

    def __init__(self, quiet: bool):
        self.quiet, self.bar, self.stage = quiet, None, None

    def __call__(self, stage: str, done: int, total: int) -> None:
        if self.quiet:
            return
        if stage != self.stage:
            self.close()
            unit = "page" if stage == "store" else "B"
            self.bar = tqdm(total=total, desc=stage, unit=unit, unit_scale=unit == "B",
                            file=sys.stderr)
            self.stage = stage
        self.bar.total = max(total, done)
        self.bar.update(done - self.bar.n)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()
            self.bar = None


def run_reporting(name: str, work, quiet: bool) -> int:
    """``work(progress)`` with a progress bar; its exit status, or 2 for bad input and 1 for a
    failure while working, with the message on stderr."""
    bar = ProgressBar(quiet)
    try:
        result = work(bar)
    except BackupError as exc:
        bar.close()
        print(f"burstlens {name}: {exc}", file=sys.stderr)
        return 2
    except OSError as exc:
        bar.close()
        where = f"{exc.filename}: " if exc.filename else ""
        print(f"burstlens {name}: {where}{exc.strerror or exc}; nothing was put in place",
              file=sys.stderr)
        return 1
    bar.close()
    return result


def run_backup(args: argparse.Namespace) -> int:
    def work(bar) -> int:
        done = backup(args.data_dir, args.dest, progress=bar)
        c = done.counts
        dropped = ""
        if c["dropped_checkpoints"]:
            dropped = (f"; {len(c['dropped_checkpoints'])} checkpoint(s) replaced during the "
                       "copy left out (those jobs start over after a restore)")
        print(f"backed up {args.data_dir} to {done.path}: schema version {done.schema_version}, "
              f"{c['jobs']} jobs, {c['corpora']} corpora, {c['tokens']} tokens, {c['files']} "
              f"files, {c['bytes']} bytes{dropped}")
        return 0

    return run_reporting("backup", work, args.quiet)
