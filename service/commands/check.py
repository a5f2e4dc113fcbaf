"""``burstlens check --filterbank FILE PATH... [--json]``: does a tuned filterbank still fit?

Reads the new files as the filterbank's tuning read its corpus
(``FilterbankDocument.reading_options``, at most ``search.drift.MAX_WINDOWS`` windows), judges
the filterbank on them against the new data's best plain spectrogram and a quick refit, and
compares the site with the tuning's record (``search.drift.check_drift``). The tuning's
diagnostics are read from ``--diagnostics``, else from ``diagnostics.json`` beside the
filterbank file when there is one; without them the bursts' frequency and duration are not
compared (the answer says so).

Prints the answer in words, or with ``--json`` the object ``verdict``, ``moved``,
``not_compared``, ``scorecard``, ``refit``, ``figures``. Exit codes: 0 keep, 1 re-tune (for an
operator's cron), 2 bad input. A progress bar on stderr unless ``--quiet``.
"""
from __future__ import annotations

import argparse
import json
import os
import sys

from tqdm import tqdm

from burstlens.search.corpus import CorpusError
from burstlens.search.documents import FilterbankDocument, encode
from burstlens.search.drift import MAX_WINDOWS, check_drift
from burstlens.service.commands.inspect import read_with_progress
from burstlens.service.results import DIAGNOSTICS_JSON

EXIT_CODES = {"keep": 0, "retune": 1}


def register(p) -> None:
    p.description = ("Read new waveform files as the filterbank's tuning read its corpus, judge "
                     "the filterbank there against the new data's best plain spectrogram and a "
                     "quick refit, compare the site with the tuning's record, and answer keep "
                     "(exit 0) or re-tune (exit 1).")
    p.add_argument("--filterbank", required=True, metavar="FILE", help="filterbank.json from tune")
    p.add_argument("paths", nargs="+", metavar="PATH", help="new waveform files or folders")
    p.add_argument("--diagnostics", metavar="FILE",
                   help="the tuning's diagnostics.json (default: the one beside --filterbank)")
    p.add_argument("--json", action="store_true", help="print the answer as JSON (default: in words)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args: argparse.Namespace) -> int:
    def fail(message: str) -> int:
        print(f"burstlens check: {message}", file=sys.stderr)
        return 2

    try:
        with open(args.filterbank, encoding="utf-8") as fh:
            document = FilterbankDocument.read(json.load(fh))
        options = document.reading_options()
    except OSError as exc:
        return fail(f"--filterbank {args.filterbank}: {exc.strerror or exc}")
    except (ValueError, json.JSONDecodeError) as exc:
        return fail(f"--filterbank {args.filterbank}: {exc}")
    path = args.diagnostics
    if path is None:
        beside = os.path.join(os.path.dirname(os.path.abspath(args.filterbank)), DIAGNOSTICS_JSON)
        path = beside if os.path.isfile(beside) else None
    diagnostics = None
    if path is not None:
        try:
            with open(path, encoding="utf-8") as fh:
                diagnostics = json.load(fh)
        except OSError as exc:
            return fail(f"--diagnostics {path}: {exc.strerror or exc}")
        except json.JSONDecodeError as exc:
            return fail(f"--diagnostics {path}: not JSON ({exc})")
        if not isinstance(diagnostics, dict):
            return fail(f"--diagnostics {path}: must be a JSON object, got "
                        f"{type(diagnostics).__name__}")
    missing = [p for p in args.paths if not os.path.exists(p)]
    if missing:
        return fail(f"{missing[0]}: no such file or folder")
    options["max_windows"] = MAX_WINDOWS
    try:
        corpus = read_with_progress(args.paths, options, quiet=args.quiet)
    except (CorpusError, ValueError, OSError) as exc:
        return fail(str(exc))

    bar = None
    if not args.quiet:
        bar = tqdm(total=1000, desc="check", file=sys.stderr,
                   bar_format="{desc} {percentage:3.0f}%|{bar}| {elapsed}")

    def progress(fraction: float) -> None:
        if bar is not None:
            bar.n = int(round(1000 * fraction))
            bar.refresh()

    try:
        answer = check_drift(document, corpus, diagnostics, progress=progress)
    except ValueError as exc:
        return fail(str(exc))
    finally:
        if bar is not None:
            bar.close()
    if args.json:
        sys.stdout.write(encode(answer.to_json()).decode("utf-8"))
    else:
        for line in answer.words():
            print(line)
    return EXIT_CODES[answer.verdict]
