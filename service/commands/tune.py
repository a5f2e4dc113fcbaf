"""``burstlens tune PATH... --out DIR``: fit a filterbank locally (no server), with a progress bar.

Writes ``filterbank.json``, ``diagnostics.json`` and ``report.html`` (docs/design.md §8) into DIR
through the one tuning pipeline (``service.tuning.tune``, which the worker's search jobs run
too); prints a short summary. Exit codes: 0 done (also when
cancelled with Ctrl-C: the best result so far is written), 2 bad input or bad settings.
"""
from __future__ import annotations

import argparse
import math
import os
import signal
import sys
from pathlib import Path

from tqdm import tqdm

from burstlens.search.corpus import CorpusError
from burstlens.service import tuning
from burstlens.service.commands.inspect import read_with_progress
from burstlens.service.commands.options import (add_corpus_options, add_job_settings, add_paths,
                                                settings_from_args)
from burstlens.service.energy_channels import lines_or_note
from burstlens.service.results import REPORT_HTML


def register(p) -> None:
    p.description = ("Read the waveform files, cut burst windows, search the filterbank whose "
                     "output is sharpest, and write filterbank.json, diagnostics.json and "
                     "report.html into --out.")
    add_paths(p)
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the results")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_corpus_options(p)
    add_job_settings(p)
    p.set_defaults(func=run)


def summary_lines(diagnostics) -> list[str]:
    """The few lines a person reads after a tune (also used by tests): the held-out gain and the
    warnings first (``service.verdict``), then the run in numbers. ``diagnostics``: the JSON
    object or ``search.diagnostics_doc.Diagnostics``."""
    from burstlens.search.diagnostics import wide_channels
    from burstlens.search.diagnostics_doc import Diagnostics
    from burstlens.service import verdict

    d = Diagnostics.of(diagnostics)
    lines = verdict.lines(d)
    lines += [f"windows used: {d.windows.used} (rejected {d.windows.rejected})",
              f"stop reason: {d.stop_reason}"]
    result = d.result
    if result is not None and result.objective is not None:
        iv = ""
        if result.low is not None and result.high is not None:
            iv = f" [{result.low:.4f}, {result.high:.4f}]"
        label = "held-out objective" if d.judgement is not None \
            and d.judgement.in_sample is False else "objective"
        lines.append(f"{label}: {result.objective:.4f} bits{iv}")
        spec = d.spectrogram
        if spec is not None and spec.objective is not None and spec.time_spread_s is not None:
            # the window's std s = √2·σ_t, as the report states it (service.report.terms)
            window_ms = 1e3 * math.sqrt(2.0) * spec.time_spread_s
            # the gain itself is the scorecard's sharpness row above: said once
            lines.append(f"best spectrogram: {spec.objective:.4f} bits (window std "
                         f"{window_ms:.3g} ms)")
    boot = d.bootstrap
    if boot is not None and boot.channels:
        # an entry the file does not record is no interval, so never a wide one
        recorded = {"channels": [{} if c is None else c.to_json() for c in boot.channels]}
        wide = wide_channels(recorded, chirp_bound_hz_per_s=d.settings.chirp_bound_hz_per_s or 0.0)
        lines.append(f"channels with wide stability intervals (refits on resamples of the fit "
                     f"windows): {len(wide)} of {len(boot.channels)}"
                     + (f" ({', '.join(map(str, wide[:12]))}{' …' if len(wide) > 12 else ''})"
                        if wide else ""))
        off = [i for i, ch in enumerate(boot.channels)
               if ch is not None and ch.at_optimum is False]
        if off:
            lines.append(f"channels whose resamples all move one way (against a bound, or not "
                         f"converged): {len(off)}")
    return lines


class ProgressWords:
    """The progress bar's words: the stage, its round and evaluations, and the fit's best
    objective (bits, lower is sharper; on the fit windows, and in the family stage on their
    subset), kept apart from the judgement, which scores the result on the held-out windows:
    other windows, so its number is no continuation of the fit's best."""

    def __init__(self):
        self.fit_best = None

    def during(self, msg: dict) -> str:
        """Words for one progress message of ``FilterbankSearch.fit``."""
        if msg["stage"] == "judge":
            return "judging on the held-out windows" + self.fit_best_words()
        best = msg.get("best_objective")
        if best is not None:
            self.fit_best = best
        return (f"{msg['stage']} round {msg['round']}, {msg['evaluations']} of "
                f"{msg['budget']} evaluations" + self.fit_best_words())

    def after(self, diagnostics: dict) -> str:
        """Words once the fit has returned: the fit's best and the judgement, named apart."""
        judged = diagnostics.get("judgement") or {}
        result = (judged.get("result") or {}).get("objective")
        if result is None:
            return f"stopped ({diagnostics.get('stop_reason')}), not judged" + self.fit_best_words()
        where = ("on the fit windows (none held out)" if judged.get("in_sample")
                 else f"on {judged.get('held_out_windows')} held-out windows")
        return f"done{self.fit_best_words()}; judged {result:.4f} bits {where}"

    def fit_best_words(self) -> str:
        """The words "; fit best X bits", or nothing before the fit has a best."""
        return "" if self.fit_best is None else f"; fit best {self.fit_best:.4f} bits"


def run(args: argparse.Namespace) -> int:
    def fail(message: str) -> int:
        print(f"burstlens tune: {message}", file=sys.stderr)
        return 2

    try:
        settings = settings_from_args(args)
    except ValueError as exc:
        return fail(str(exc))
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        return fail(f"--out {out}: exists and is not a folder")
    missing = [p for p in args.paths if not os.path.exists(p)]
    if missing:
        return fail(f"{missing[0]}: no such file or folder")
    try:
        corpus = read_with_progress(args.paths, settings.read_options(), quiet=args.quiet,
                                    jobs=settings.jobs)
    except (CorpusError, ValueError, OSError) as exc:
        return fail(str(exc))

    bar = None
    if not args.quiet:
        bar = tqdm(total=1000, desc="tune", file=sys.stderr, bar_format="{desc} {percentage:3.0f}%"
                   "|{bar}| {elapsed}<{remaining}{postfix}")
    shown = ProgressWords()

    def progress(msg: dict) -> None:
        if bar is None:
            return
        bar.n = int(round(1000 * msg["fraction"]))
        bar.set_postfix_str(shown.during(msg), refresh=False)
        bar.refresh()

    def fitted(search) -> bool:
        if bar is not None:
            bar.n = 1000
            bar.set_postfix_str(shown.after(search.diagnostics_), refresh=False)
            bar.close()
        return True

    interrupted = []

    def should_stop() -> bool:
        return bool(interrupted)

    previous = signal.getsignal(signal.SIGINT)

    def on_sigint(signum, frame):  # first Ctrl-C: stop after the round; second: abort
        if interrupted:
            raise KeyboardInterrupt
        interrupted.append(True)

    signal.signal(signal.SIGINT, on_sigint)
    try:
        # burstlens tune has always written its JSON files without a final newline
        tuned = tuning.tune(corpus, settings, out, progress=progress, should_stop=should_stop,
                            fitted=fitted, final_newline=False, extra=(REPORT_HTML,))
    except tuning.ResultsNotWritten as exc:
        return fail(f"--out {out}: the results could not be written ({exc})")
    except ValueError as exc:
        return fail(str(exc))
    finally:
        signal.signal(signal.SIGINT, previous)
        if bar is not None:
            bar.close()

    for line in summary_lines(tuned.diagnostics.typed) + lines_or_note(tuned.search.filterbank_,
                                                                       corpus):
        print(line)
    print(f"wrote {', '.join(tuned.written)} to {out}")
    return 0
