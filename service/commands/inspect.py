"""``burstlens inspect PATH...``: what a corpus holds — traces, windows, defaults, rejections.

While reading, a progress bar on stderr (not with ``--quiet``) shows the files read, the hours
of data and the windows found; ``read_with_progress`` is that reading, also used by ``tune``.
"""
from __future__ import annotations

import json
import os
import sys


def register(subparsers) -> None:
    from burstlens.service.commands.options import add_corpus_options, add_paths

    p = subparsers.add_parser(
        "inspect", help="show what the corpus holds: traces, rates, windows found, rejections",
        description="Read waveform files or folders as the tuner would, and show the traces, the "
                    "windows found per trace, every default chosen, and the rejected windows with reasons.")
    add_paths(p)
    add_corpus_options(p)
    p.add_argument("--json", action="store_true", help="print the corpus summary as JSON")
    p.add_argument("--all", action="store_true", help="list every window and rejection, not the first 20")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--jobs", dest="reading_jobs", type=int, default=1, metavar="N",
                   help="processes reading the files (default 1; -1: every core); the result is the same")
    p.set_defaults(func=run)


def run(args) -> int:
    from burstlens.service.commands.options import corpus_options_from_args

    try:
        corpus = read_with_progress(args.paths, corpus_options_from_args(args), quiet=args.quiet,
                                    jobs=args.reading_jobs)
    except ValueError as exc:  # a bad option, or a CorpusError (a ValueError) naming the file
        print(f"burstlens inspect: {exc}", file=sys.stderr)
        return 2
    text = json.dumps(corpus.to_json(), indent=1, ensure_ascii=False) if args.json else render(
        corpus, limit=None if args.all else 20)
    try:
        print(text)
        sys.stdout.flush()
    except BrokenPipeError:  # e.g. piped into head: the reader has seen enough
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return 0


def read_with_progress(paths, options: dict, *, quiet: bool = False, jobs: int | None = 1):
    """The corpus as ``search.settings.read_corpus_as_given(paths, options)`` reads it, with a
    tqdm bar on stderr unless ``quiet``: the reader's stage and its count (files, then segments),
    and after it the files read, hours of data (summed over traces) and, once cutting, the
    windows found before the ``max_windows`` cap. The bar is closed before this returns or raises;
    errors are the reader's. ``jobs`` other than 1 reads on that many local processes (joblib;
    -1: every core): one task per file, then per group of files joined by their traces, with the
    same result."""
    from burstlens.search.settings import read_corpus_as_given

    bar = None if quiet else _ReadingBar()
    try:
        return read_corpus_as_given(paths, options, progress=None if bar is None else bar.show,
                                    mapper=None if jobs in (None, 0, 1) else _on_processes(jobs))
    finally:
        if bar is not None:
            bar.close()


def _on_processes(jobs: int):
    """``read_corpus``'s ``mapper`` on ``jobs`` local processes: results in item order, handed
    over as they come (so the bar moves)."""
    from joblib import Parallel, delayed

    def mapper(fn, items):
        return Parallel(n_jobs=jobs, return_as="generator")(delayed(fn)(item) for item in items)
    return mapper


class _ReadingBar:
    """A tqdm bar drawing ``ReadProgress`` states: a stage's count of files or segments."""

    def __init__(self):
        self.bar = None  # drawn from the first state on, when the number of files is known

    def show(self, p) -> None:
        from tqdm import tqdm

        n, total = (p.files_read, p.files_total) if p.stage == "reading" else (p.segments_done, p.segments_total)
        if self.bar is None:
            self.bar = tqdm(total=total, desc=p.stage, file=sys.stderr,
                            bar_format="{desc} {n_fmt}/{total_fmt} |{bar}| {elapsed}<{remaining}{postfix}")
        elif p.stage != self.bar.desc:
            self.bar.set_description_str(p.stage, refresh=False)
            self.bar.reset(total=total)  # each stage its own count, elapsed time and rate
        words = f"{p.files_read} files, {_hours(p.hours_read)} h of data"
        if p.stage == "cutting":
            words += f", {p.windows_found} windows found"
        self.bar.set_postfix_str(words, refresh=False)
        self.bar.update(n - self.bar.n)  # draws at most every tqdm.mininterval

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _hours(hours: float) -> str:
    """Hours with three significant digits below 100, whole hours above (a month is 720)."""
    return f"{hours:.3g}" if hours < 100 else f"{hours:.0f}"


def noise_line(noise) -> str:
    """One line on the site's noise sample (``Corpus.defaults["noise"]``): how many windows and
    seconds, from where, or why there is none."""
    noise = noise if isinstance(noise, dict) else {}
    if not noise.get("source"):
        return f"noise sample: none ({noise.get('reason') or 'not recorded'})"
    return (f"noise sample: {noise.get('windows_kept', 0)} windows ({noise.get('duration_s', 0):g} s) "
            f"from {noise['source']} ({noise.get('windows_found', 0)} found)")


def render(corpus, limit: int | None = 20) -> str:
    """Plain-text report of a corpus for a person."""
    out = []
    w = out.append
    w(f"corpus: {corpus.n_windows} windows of {corpus.window_samples} samples "
      f"({corpus.window_s * 1000:g} ms) at {corpus.sampling_rate_hz:g} Hz, from {len(corpus.files)} files")
    w(f"source sha256: {corpus.source_hash}")
    w(noise_line(corpus.defaults.get("noise")))
    if corpus.skipped:
        w(f"skipped (not waveform files): {', '.join(s['file'] for s in corpus.skipped)}")
    w("")
    w("traces:")
    width = max(len(t["trace_id"]) for t in corpus.traces)
    for t in corpus.traces:
        w(f"  {t['trace_id']:<{width}}  {t['sampling_rate_hz']:>8g} Hz  {t['duration_s']:>9.3f} s  "
          f"{t['windows']:>4d} windows  start {t['start'] or '-'}  {t['file']}")
    w("")
    w("defaults chosen:")
    for key, value in corpus.defaults.items():
        w(f"  {key}: {value}")
    w("")
    shown = corpus.window_meta if limit is None else corpus.window_meta[:limit]
    w(f"windows ({len(shown)} of {corpus.n_windows} shown):")
    for i, m in enumerate(shown):
        extra = f"  triggers {m['triggers']}" if "triggers" in m else ""
        w(f"  {i:>4d}  {m['trace_id']:<{width}}  +{m['offset_s']:.4f} s  {m['start'] or ''}{extra}")
    w("")
    counts = corpus.rejected_by_reason()
    w("rejections: " + (", ".join(f"{k} {v}" for k, v in counts.items()) if counts else "none"))
    rej = corpus.rejections if limit is None else corpus.rejections[:limit]
    for r in rej:
        w(f"  {r['trace_id']:<{width}}  +{r['offset_s']:.4f} s  {r['reason']}: {r['detail']}  ({r['file']})")
    return "\n".join(out)
