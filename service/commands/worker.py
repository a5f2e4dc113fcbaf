"""``burstlens worker``: job workers alone, against the same data dir as a ``serve``."""
from __future__ import annotations

import argparse
import logging
import sys

from pydantic import ValidationError

from burstlens.service.commands.options import service_settings_from
from burstlens.service.worker import run_worker


def register(p) -> None:
    p.description = ("Claim and run jobs (searches, checks, continuous transforms) from the store "
                     "under --data-dir until SIGTERM (then: checkpoint, release the job, exit 0).")
    p.add_argument("--data-dir", metavar="DIR",
                   help="store and blob folder (default $BURSTLENS_DATA_DIR, else ./burstlens-data)")
    p.add_argument("--dask", metavar="ADDR",
                   help="Dask scheduler that scores the candidates, e.g. tcp://HOST:8786 (default "
                        "$BURSTLENS_DASK, else none: the worker scores on its own processes)")
    p.add_argument("--parent-pid", type=int, help=argparse.SUPPRESS)  # set by `serve`
    p.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"],
                   help="least severe log messages shown (one of %(choices)s; default %(default)s)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    try:
        settings = service_settings_from(args, "data_dir", "dask")
    except ValidationError as exc:
        print(f"burstlens worker: {exc}", file=sys.stderr)
        return 2
    logging.basicConfig(level=args.log_level.upper(),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")

    return run_worker(settings, parent_pid=args.parent_pid)
