"""``burstlens tune PATH... --out DIR``: fit a filterbank locally (no server), with a progress bar.

Writes ``filterbank.json`` and ``diagnostics.json`` (docs/design.md §8) into DIR, and ``report.html``
when the report module is available; prints a short summary. Exit codes: 0 done (also when
cancelled with Ctrl-C: the best result so far is written), 2 bad input or bad settings.
"""
from __future__ import annotations

import argparse


def register(subparsers) -> None:
    from burstlens.service.commands.options import add_corpus_options, add_job_settings, add_paths

    p = subparsers.add_parser(
        "tune", help="fit a filterbank to a corpus on this machine",
        description="Read the waveform files, cut burst windows, search the filterbank whose "
                    "output is sharpest, and write filterbank.json, diagnostics.json and "
                    "report.html into --out.")
    add_paths(p)
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the results")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_corpus_options(p)
    add_job_settings(p)
    p.set_defaults(func=run)


def summary_lines(diagnostics: dict) -> list[str]:
    """The few lines a person reads after a tune (also used by tests): the held-out gain and the
    warnings first (``service.verdict``), then the run in numbers."""
    from burstlens.search.diagnostics import wide_channels
    from burstlens.service import verdict

    d = diagnostics
    lines = verdict.lines(d)
    lines += [f"windows used: {d['windows']['used']} (rejected {d['windows']['rejected']})",
              f"stop reason: {d['stop_reason']}"]
    result = d.get("result")
    if result:
        iv = ""
        if result.get("low") is not None:
            iv = f" [{result['low']:.4f}, {result['high']:.4f}]"
        label = "held-out objective" if (verdict.judgement(d) or {}).get("in_sample") is False \
            else "objective"
        lines.append(f"{label}: {result['objective']:.4f} bits{iv}")
        spec = d["baselines"]["spectrogram"]
        window_ms = 1e3 * spec["parameters"]["time_spread_s"]
        # the gain itself is the scorecard's sharpness row above: said once
        lines.append(f"best spectrogram: {spec['objective']:.4f} bits (window std {window_ms:.3g} ms)")
    boot = d.get("bootstrap") or {}
    if boot.get("channels"):
        wide = wide_channels(boot, chirp_bound_hz_per_s=d["settings"].get("chirp_bound_hz_per_s", 0.0))
        lines.append(f"channels with wide stability intervals (refits on resamples of the fit "
                     f"windows): {len(wide)} of {len(boot['channels'])}"
                     + (f" ({', '.join(map(str, wide[:12]))}{' …' if len(wide) > 12 else ''})"
                        if wide else ""))
        off = [i for i, ch in enumerate(boot["channels"]) if ch.get("at_optimum") is False]
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
    import os
    import sys
    from pathlib import Path

    from burstlens.service.commands.options import settings_from_args

    def fail(message: str) -> int:
        print(f"burstlens tune: {message}", file=sys.stderr)
        return 2

    try:
        from burstlens.search.settings import split_settings

        corpus_options, search_options = split_settings(settings_from_args(args))
    except ValueError as exc:
        return fail(str(exc))
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        return fail(f"--out {out}: exists and is not a folder")

    from burstlens.search.corpus import CorpusError
    from burstlens.search.optimize import FilterbankSearch
    from burstlens.service.commands.inspect import read_with_progress

    missing = [p for p in args.paths if not os.path.exists(p)]
    if missing:
        return fail(f"{missing[0]}: no such file or folder")
    try:
        corpus = read_with_progress(args.paths, corpus_options, quiet=args.quiet, jobs=args.jobs)
    except (CorpusError, ValueError, OSError) as exc:
        return fail(str(exc))

    bar = None
    if not args.quiet:
        from tqdm import tqdm

        bar = tqdm(total=1000, desc="tune", file=sys.stderr, bar_format="{desc} {percentage:3.0f}%"
                   "|{bar}| {elapsed}<{remaining}{postfix}")
    shown = ProgressWords()

    def progress(msg: dict) -> None:
        if bar is None:
            return
        bar.n = int(round(1000 * msg["fraction"]))
        bar.set_postfix_str(shown.during(msg), refresh=False)
        bar.refresh()

    interrupted = []

    def should_stop() -> bool:
        return bool(interrupted)

    import signal

    previous = signal.getsignal(signal.SIGINT)

    def on_sigint(signum, frame):  # first Ctrl-C: stop after the round; second: abort
        if interrupted:
            raise KeyboardInterrupt
        interrupted.append(True)

    signal.signal(signal.SIGINT, on_sigint)
    try:
        search = FilterbankSearch(**search_options)
        search.fit(corpus, progress=progress, should_stop=should_stop)
        if bar is not None:
            bar.n = 1000
            bar.set_postfix_str(shown.after(search.diagnostics_), refresh=False)
            bar.refresh()
    except ValueError as exc:
        return fail(str(exc))
    finally:
        signal.signal(signal.SIGINT, previous)
        if bar is not None:
            bar.close()

    out.mkdir(parents=True, exist_ok=True)
    from burstlens.search.documents import DiagnosticsDocument, FilterbankDocument
    from burstlens.search.safe_io import atomic_write

    filterbank_doc = FilterbankDocument.of(search.filterbank_)
    diagnostics_doc = DiagnosticsDocument(search.diagnostics_)
    fb_json = filterbank_doc.to_json()
    for name, doc in (("filterbank.json", filterbank_doc), ("diagnostics.json", diagnostics_doc)):
        atomic_write(out / name, lambda fh, doc=doc: fh.write(doc.encode(final_newline=False)))
    wrote = ["filterbank.json", "diagnostics.json"]
    report = _render_report(fb_json, search.diagnostics_, corpus)
    if report is not None:
        atomic_write(out / "report.html", lambda fh: fh.write(report.encode("utf-8")))
        wrote.append("report.html")
    from burstlens.service.energy_channels import lines_or_note

    for line in summary_lines(search.diagnostics_) + lines_or_note(fb_json, corpus):
        print(line)
    print(f"wrote {', '.join(wrote)} to {out}")
    return 0


def _render_report(fb_json: dict, diagnostics: dict, corpus):
    """report.html text if ``service.report.render_report`` exists, else None."""
    try:
        from burstlens.service.report import render_report
    except ImportError:
        return None
    return render_report(fb_json, diagnostics, corpus.windows, corpus.sampling_rate_hz)
