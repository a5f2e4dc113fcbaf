"""``burstlens restore BACKUP DATA_DIR`` (service.backup): exit status as for ``backup``."""
from __future__ import annotations

import argparse

from burstlens.service.backup import restore
from burstlens.service.commands.backup import run_reporting


def register(p) -> None:
    p.description = ("Verify BACKUP against its manifest, then put it in place as DATA_DIR. An "
                     "existing data dir is renamed to DATA_DIR.before-restore-<UTC time>, never "
                     "deleted. Refused while a burstlens process holds DATA_DIR open, for a "
                     "backup that does not verify, and for one of a newer schema.")
    p.add_argument("backup", metavar="BACKUP", help="a folder made by `burstlens backup`")
    p.add_argument("data_dir", metavar="DATA_DIR", help="the data dir to restore into")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    def work(progress) -> int:
        done = restore(args.backup, args.data_dir, progress=progress)
        kept = f"; the previous data dir is kept as {done.kept_aside}" if done.kept_aside else ""
        print(f"restored {args.backup} (made {done.manifest['created_utc']}, schema version "
              f"{done.manifest['schema_version']}) into {done.data_dir}{kept}")
        return 0

    return run_reporting("restore", work, args.quiet)
