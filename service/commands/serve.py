"""``burstlens serve``: the HTTP API plus N local job worker processes over one data dir."""
from __future__ import annotations

import argparse
import logging
import sys

from pydantic import ValidationError

from burstlens.service.commands.options import service_settings_from
from burstlens.service.serving import serve


def register(p) -> None:
    p.description = ("Run the burstlens HTTP API (uvicorn) and N local worker processes sharing "
                     "the SQLite store under --data-dir. Without any token stored the server only "
                     "binds to loopback; add one with `burstlens tokens add NAME`. Every flag "
                     "defaults to its BURSTLENS_* environment variable.")
    p.add_argument("--host", help="address to bind (default $BURSTLENS_HOST, else 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default $BURSTLENS_PORT, else 8000)")
    p.add_argument("--data-dir", metavar="DIR",
                   help="store and blob folder (default $BURSTLENS_DATA_DIR, else ./burstlens-data)")
    p.add_argument("--workers", type=int, metavar="N",
                   help="local worker processes (default $BURSTLENS_WORKERS, else 1)")
    p.add_argument("--dask", metavar="ADDR",
                   help="Dask scheduler that scores the candidates, e.g. tcp://HOST:8786 (default "
                        "$BURSTLENS_DASK, else none: each worker scores on its own processes)")
    p.add_argument("--log-level", default="info", choices=["debug", "info", "warning", "error"],
                   help="least severe log messages shown (one of %(choices)s; default %(default)s)")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    try:
        settings = service_settings_from(args, "host", "port", "data_dir", "workers", "dask")
    except ValidationError as exc:
        print(f"burstlens serve: {exc}", file=sys.stderr)
        return 2
    logging.basicConfig(level=args.log_level.upper(),
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")

    return serve(settings, log_level=args.log_level)
