"""``make reliability``: run every experiment with its full counts and print one table.

    python -m reliability.run [--only crash_faults restarts ...] [--seed N] [--log FILE]

The servers' and workers' own output goes to a log file (named at the end), so the terminal shows
only the table and, under it, the findings behind every goal that was not met. Exit status 0 when
every goal is met (a skipped experiment says why), 1 otherwise.
"""
from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time

EXPERIMENTS = ("crash_faults", "restarts", "disk_full", "bad_input", "tenants", "load",
               "token_guessing", "transform_kills")


def table(rows) -> str:
    """The rows as a Markdown table (pasted as is into the README)."""
    def cell(text) -> str:
        return str(text).replace("|", "\\|").replace("\n", " ")

    lines = ["| Experiment | Counts | Result | Goal | Goal met |", "|---|---|---|---|---|"]
    for row in rows:
        met = "skipped" if row.met is None else ("yes" if row.met else "NO")
        lines.append(f"| {cell(row.experiment)} | {cell(row.counts)} | {cell(row.result)} | "
                     f"{cell(row.goal)} | {met} |")
    return "\n".join(lines)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--only", nargs="+", choices=EXPERIMENTS, default=list(EXPERIMENTS))
    parser.add_argument("--seed", type=int, default=20261202)
    parser.add_argument("--log", help="file for the servers' output (default: a temp file)")
    args = parser.parse_args(argv)
    import importlib

    log_path = args.log or os.path.join(tempfile.gettempdir(),
                                        f"burstlens-reliability-{os.getpid()}.log")
    terminal = os.fdopen(os.dup(sys.stdout.fileno()), "w", buffering=1)
    sys.stdout.flush()
    sys.stderr.flush()
    with open(log_path, "w") as log:  # only its descriptor is used: stdout and stderr take it over
        os.dup2(log.fileno(), sys.stdout.fileno())  # children inherit these descriptors
        os.dup2(log.fileno(), sys.stderr.fileno())
    started = time.monotonic()
    rows = []
    try:
        for name in args.only:
            t0 = time.monotonic()
            print(f"reliability: {name} ...", end="", file=terminal, flush=True)
            module = importlib.import_module(f"reliability.{name}")
            kwargs = {"seed": args.seed} if "seed" in module.run.__code__.co_varnames else {}
            try:
                new = module.run(**kwargs)
            except Exception as exc:  # an experiment that breaks is a failed row, not a crash
                from reliability.harness import Row

                new = [Row(name, "-", "experiment crashed", "-", False,
                           [f"{type(exc).__name__}: {exc}"])]
            rows += new
            print(f" {time.monotonic() - t0:.0f} s", file=terminal, flush=True)
    finally:
        sys.stdout.flush()
        sys.stderr.flush()
    print(file=terminal)
    print(table(rows), file=terminal)
    findings = [(row.experiment, d) for row in rows for d in row.details]
    if findings:
        print("\nFindings:", file=terminal)
        for experiment, detail in findings:
            print(f"- [{experiment}] {detail}", file=terminal)
    ok = all(row.met is not False for row in rows)
    print(f"\n{len(rows)} rows, goals {'all met' if ok else 'NOT all met'}; "
          f"{time.monotonic() - started:.0f} s; server output in {log_path}", file=terminal)
    terminal.close()
    return 0 if ok else 1


if __name__ == "__main__":
    raise SystemExit(main())
