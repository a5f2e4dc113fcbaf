"""The ``burstlens`` command line: one sub-command per module in ``service.commands``.

A command's module is imported only when that command runs (or its ``--help`` is asked for):
``burstlens --help`` lists the commands from :data:`COMMANDS` alone, so the modules may import
what they need (numpy, scipy, the service) at their top.
"""
from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Iterable, Sequence
from importlib import import_module
from typing import NamedTuple


class Command(NamedTuple):
    """A sub-command: its module under ``service.commands`` and its one-line help. The module
    defines ``register(p)``, which declares the command's description and arguments on the
    sub-parser ``p`` this module makes (named, with this help)."""

    module: str
    help: str


# in the order --help lists them
COMMANDS = {
    "inspect": Command("inspect",
                       "show what the corpus holds: traces, rates, windows found, rejections"),
    "demo-corpus": Command("demo_corpus", "write the synthetic demo site (miniSEED) into a folder"),
    "serve": Command("serve", "run the HTTP API and local job workers"),
    "worker": Command("worker", "run a job worker against a data dir"),
    "submit": Command("submit", "tune on a server: upload, queue, follow, download"),
    "tokens": Command("tokens", "manage API bearer tokens"),
    "tune": Command("tune", "fit a filterbank to a corpus on this machine"),
    "transform": Command("transform_cmd", "apply a filterbank to waveform files, write an NPZ"),
    "check": Command("check", "judge a tuned filterbank on new files: keep it or re-tune"),
    "backup": Command("backup", "back up a data dir, also while the service runs"),
    "restore": Command("restore", "restore a data dir from a backup (service stopped)"),
}


def build_parser(commands: Iterable[str] | None = None) -> argparse.ArgumentParser:
    """The ``burstlens`` parser. The sub-parsers of ``commands`` (default: every command) are
    filled by their modules' ``register``; any other command is only listed, by name and
    one-line help, so its module is not imported. A ValueError names an unknown command."""
    built = set(COMMANDS if commands is None else commands)
    unknown = sorted(built - set(COMMANDS))
    if unknown:
        raise ValueError(f"commands: unknown {', '.join(unknown)} (known: {', '.join(COMMANDS)})")
    parser = argparse.ArgumentParser(
        prog="burstlens",
        description="Choose a time-frequency representation for microseismic bursts from the data.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name, command in COMMANDS.items():
        p = sub.add_parser(name, help=command.help)
        if name in built:
            import_module(f"burstlens.service.commands.{command.module}").register(p)
    return parser


def _named_command(argv: Sequence[str]) -> str | None:
    """The command ``argv`` names: its first word that is not an option (the top-level parser
    takes no option with a value), or None when there is none or it is no command."""
    word = next((a for a in argv if not a.startswith("-")), None)
    return word if word in COMMANDS else None


def main(argv: Sequence[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else list(argv)
    command = _named_command(argv)
    parser = build_parser([] if command is None else [command])
    args = parser.parse_args(argv)
    if not getattr(args, "func", None):
        parser.print_help()
        return 2
    try:
        return int(args.func(args) or 0)
    except BrokenPipeError:
        # the reader of the output went away (`burstlens inspect … | head`): stop quietly, and
        # point stdout at /dev/null so the interpreter's final flush fails no more (Python
        # docs, "Note on SIGPIPE")
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
        return 1


if __name__ == "__main__":
    sys.exit(main())
