"""``burstlens inspect PATH...``: what a corpus holds — traces, windows, defaults, rejections.

While reading, a progress bar on stderr (not with ``--quiet``) shows the files read, the
trace-hours read and the windows found; ``read_with_progress`` is that reading, also used by
``tune``. The summary counts the record both ways (:func:`record_hours`): station-hours (each
station's time on record) and trace-hours (every trace's length summed; a 3-component station
has three traces).
"""
from __future__ import annotations

import json
import os
import sys
from dataclasses import dataclass
from datetime import datetime, timedelta

from tqdm import tqdm

from burstlens.search.corpus.given import read_corpus_as_given
from burstlens.service.commands.options import add_corpus_options, add_paths, corpus_options_from_args


def register(p) -> None:
    p.description = ("Read waveform files or folders as the tuner would, and show the traces, the "
                     "windows found per trace, every default chosen, and the rejected windows with reasons.")
    add_paths(p)
    add_corpus_options(p)
    p.add_argument("--json", action="store_true", help="print the corpus summary as JSON (default: text)")
    p.add_argument("--all", action="store_true",
                   help="list every window and rejection (default: the first 20 of each)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--jobs", dest="reading_jobs", type=int, default=1, metavar="N",
                   help="processes reading the files (default 1; -1: every core); the result is the same")
    p.set_defaults(func=run)


def run(args) -> int:
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
    """The corpus as ``search.corpus.given.read_corpus_as_given(paths, options)`` reads it, with a
    tqdm bar on stderr unless ``quiet``: the reader's stage and its count (files, then segments),
    and after it the files read, hours of data (summed over traces) and, once cutting, the
    windows found before the ``max_windows`` cap. The bar is closed before this returns or raises;
    errors are the reader's. ``jobs`` other than 1 reads on that many local processes (joblib;
    -1: every core): one task per file, then per group of files joined by their traces, with the
    same result."""
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
        n, total = (p.files_read, p.files_total) if p.stage == "reading" else (p.segments_done, p.segments_total)
        if self.bar is None:
            self.bar = tqdm(total=total, desc=p.stage, file=sys.stderr,
                            bar_format="{desc} {n_fmt}/{total_fmt} |{bar}| {elapsed}<{remaining}{postfix}")
        elif p.stage != self.bar.desc:
            self.bar.set_description_str(p.stage, refresh=False)
            self.bar.reset(total=total)  # each stage its own count, elapsed time and rate
        words = f"{p.files_read} files, {_hours(p.hours_read)} trace-hours"
        if p.stage == "cutting":
            words += f", {p.windows_found} windows found"
        self.bar.set_postfix_str(words, refresh=False)
        self.bar.update(n - self.bar.n)  # draws at most every tqdm.mininterval

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def _hours(hours: float) -> str:
    """Hours with three significant digits below 100, whole hours above (a month is 720 per
    trace)."""
    return f"{hours:.3g}" if hours < 100 else f"{hours:.0f}"


@dataclass(frozen=True)
class RecordHours:
    """How much record a corpus holds. ``station_hours``: summed over stations, the time
    covered by at least one of the station's traces (h); ``trace_hours``: every trace's length
    summed (h); ``first``/``last``: the earliest start and latest end (UTC), None when no trace
    carries a start time."""

    stations: int
    traces: int
    station_hours: float
    trace_hours: float
    first: datetime | None
    last: datetime | None


def station_of(trace_id: str) -> str:
    """The station of a SEED id ``NET.STA.LOC.CHA``: ``NET.STA`` (its components and location
    codes are one station); an id of another shape is a station of its own."""
    parts = trace_id.split(".")
    return ".".join(parts[:2]) if len(parts) == 4 else trace_id


def record_hours(traces) -> RecordHours:
    """:class:`RecordHours` of ``Corpus.traces`` (dicts with ``trace_id``, ``start`` (ISO 8601
    UTC or None) and ``duration_s``). A station's time is the union of its traces' spans
    [start, start + duration], so three components over the same minute count one minute; a
    trace without a start time spans [0, duration] of its station's own clock."""
    spans: dict[str, list[tuple[float, float]]] = {}
    ends = []
    for t in traces:
        start = _utc(t.get("start"))
        duration = float(t.get("duration_s") or 0.0)
        offset = start.timestamp() if start is not None else 0.0
        spans.setdefault(station_of(str(t.get("trace_id"))), []).append((offset, offset + duration))
        if start is not None:
            ends.append((start, start + timedelta(seconds=duration)))
    station_s = sum(_union_length(s) for s in spans.values())
    trace_s = sum(float(t.get("duration_s") or 0.0) for t in traces)
    return RecordHours(len(spans), len(traces), station_s / 3600.0, trace_s / 3600.0,
                       min(e[0] for e in ends) if ends else None,
                       max(e[1] for e in ends) if ends else None)


def _utc(text) -> datetime | None:
    return datetime.fromisoformat(text) if isinstance(text, str) and text else None


def _union_length(spans: list[tuple[float, float]]) -> float:
    """Total length (s) of the union of intervals [a, b]."""
    total, reach = 0.0, -float("inf")
    for a, b in sorted(spans):
        if b > reach:
            total += b - max(a, reach)
            reach = b
    return total


def record_lines(traces) -> list[str]:
    """Two lines on the record: stations and traces with the UTC span when the traces carry
    start times, then station-hours and trace-hours, each named."""
    r = record_hours(traces)
    head = f"record: {r.stations} station{'s' * (r.stations != 1)}, {r.traces} trace{'s' * (r.traces != 1)}"
    if r.first is not None:
        head += f", {_stamp(r.first)} to {_stamp(r.last)} UTC"
    return [head, f"  {_hours(r.station_hours)} station-hours (each station's time on record), "
                  f"{_hours(r.trace_hours)} trace-hours (every trace's length summed)"]


def _stamp(t: datetime) -> str:
    return t.strftime("%Y-%m-%d %H:%M:%S.%f").rstrip("0").rstrip(".")


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
    out += record_lines(corpus.traces)
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
