"""The ``burstlens`` command line: one sub-command per module in ``service.commands``."""
from __future__ import annotations

import argparse
import sys
from importlib import import_module

# command name -> module under service.commands; each module defines register(subparsers)
COMMANDS = {
    "inspect": "inspect",
    "demo-corpus": "demo_corpus",
    "serve": "serve",
    "worker": "worker",
    "submit": "submit",
    "tokens": "tokens",
    "tune": "tune",
    "transform": "transform_cmd",
    "check": "check",
    "backup": "backup",
    "restore": "restore",
}


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="burstlens",
        description="Choose a time-frequency representation for microseismic bursts from the data.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for module in COMMANDS.values():
        import_module(f"burstlens.service.commands.{module}").register(sub)
    return parser


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    return int(args.func(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
