"""``burstlens inspect PATH...``: what a corpus holds — traces, windows, defaults, rejections."""
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
    p.set_defaults(func=run)


def run(args) -> int:
    from burstlens.search.settings import read_corpus_as_given
    from burstlens.service.commands.options import corpus_options_from_args

    try:
        corpus = read_corpus_as_given(args.paths, corpus_options_from_args(args))
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


def render(corpus, limit: int | None = 20) -> str:
    """Plain-text report of a corpus for a person."""
    out = []
    w = out.append
    w(f"corpus: {corpus.n_windows} windows of {corpus.window_samples} samples "
      f"({corpus.window_s * 1000:g} ms) at {corpus.sampling_rate_hz:g} Hz, from {len(corpus.files)} files")
    w(f"source sha256: {corpus.source_hash}")
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
