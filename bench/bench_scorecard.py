"""Benchmark of what a tuning gives the pipeline: the scorecard beside the time it costs.

Prints, from one run on this machine:

- the demo site (demo_corpus/ read with ``max_windows`` 128 and ``seed`` 7, fitted with the demo's
  settings, ``service.demo.DEMO_SETTINGS``, split as the service splits them, and a user's own
  64 ms Hann spectrogram as ``compare_to``, so the card has its "yours" rows): the fit's wall
  time, each stage's seconds (``diagnostics_["stage_seconds"]``) and the judgement's share of the
  fit, broken down into its parts (held-out scoring, the scorecard and its 2000-resample
  bootstrap, the pipeline guard, the parameter stability refits); the steady lines found; the
  scorecard in numbers (each row's estimate [low, high], reference − representation, positive:
  better than the best plain spectrogram; each representation's absolute figures) and in words
  (``service.verdict.scorecard_rows``), then anything in it that was not measured;
- a generated site with known answers (burstlens.search.testing.sites, as in tests/search/test_site_noise.py:
  Gaussian bursts of time spread σ0 = 6.1 ms at 300 Hz, a red background, steady lines at 50,
  150, 250 and 420 Hz carrying more than 90 % of the energy), fitted with the default criterion
  and with ``{"name": "detection"}`` (both with a 64 ms Hann ``compare_to``): the same figures,
  the lines found against the lines put in, the best spectrogram window and the result's time
  spread at 300 Hz against σ0, and the ratio of the detection criterion's fit time to the
  default's.

Times are wall seconds, each with the load average before it: on a shared machine they move with
the other work, so compare the ratios printed within one run.

Usage: ``python bench/bench_scorecard.py``.
"""
from __future__ import annotations

import functools
import os
import sys
import time

import numpy as np

from burstlens.search.testing import sites

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

GENERATED_BURSTS, GENERATED_NOISE = 128, 64   # a held-out quarter of 32 bursts, as in the demo
# a user's own spectrogram scored beside the result (compare_to): 64 ms Hann windows, 75 % overlap
DEMO_COMPARE_TO, GENERATED_COMPARE_TO = "hann:256:192", "hann:128:96"
ROWS = (("detection_db", "dB"), ("onset_ms", "ms"), ("sharpness_bits", "bits"))


class Stopwatch:
    """Wall seconds and calls of module functions, wrapped for the duration of a ``with`` block.

    ``targets``: (module, function name) pairs. A call of ``scorecard`` is filed under its
    ``resamples`` keyword (the held-out card and the guard's card differ by it). Nested calls
    are timed each on their own, so a caller's seconds include its callees'.
    """

    def __init__(self, targets):
        self.targets = list(targets)
        self.seconds: dict[str, float] = {}
        self.calls: dict[str, int] = {}
        self._saved = []

    def _wrap(self, name, fn):
        @functools.wraps(fn)
        def timed(*args, **kwargs):
            key = f"{name}[{kwargs['resamples']}]" if "resamples" in kwargs else name
            t0 = time.perf_counter()
            try:
                return fn(*args, **kwargs)
            finally:
                self.seconds[key] = self.seconds.get(key, 0.0) + time.perf_counter() - t0
                self.calls[key] = self.calls.get(key, 0) + 1
        return timed

    def order(self, key: str) -> int:
        """Rank of ``key`` (a function name, with its resamples for a scorecard) in ``targets``."""
        return [name for _, name in self.targets].index(key.split("[")[0])

    def __enter__(self):
        for module, name in self.targets:
            fn = getattr(module, name)
            self._saved.append((module, name, fn))
            setattr(module, name, self._wrap(name, fn))
        return self

    def __exit__(self, *exc):
        for module, name, fn in reversed(self._saved):
            setattr(module, name, fn)
        self._saved.clear()
        return False


def timed_fit(options: dict, corpus):
    """(fitted FilterbankSearch, wall s, load average before, Stopwatch of the judgement's parts)."""
    from burstlens.search.fit import detect, judge
    from burstlens.search.optimize import FilterbankSearch

    parts = [(judge, n) for n in ("held_out_judgement", "pipeline_guard", "scorecard",
                                  "onset_timing", "stability")] + [(detect, "threshold")]
    load = os.getloadavg()[0]
    with Stopwatch(parts) as watch:
        t0 = time.perf_counter()
        est = FilterbankSearch(**options).fit(corpus)
        wall = time.perf_counter() - t0
    return est, wall, load, watch


def _num(value, spec: str) -> str:
    return "None" if value is None else format(value, spec)


def _entry(entry) -> str:
    """'estimate [low, high]' of a scorecard row entry (None where not measured)."""
    if entry is None:
        return "None"
    text = f"{_num(entry.get('estimate'), '+.3f')} [{_num(entry.get('low'), '+.3f')}, " \
           f"{_num(entry.get('high'), '+.3f')}]"
    if entry.get("unreached_resamples"):
        text += f" (target not reached in {entry['unreached_resamples']} resamples)"
    return text


def unmeasured(card: dict) -> list[str]:
    """What the scorecard left out or could not bound: rows None, entries without an estimate
    or an interval, detection thresholds never reached, resamples where the target was not."""
    out = []
    for row, _ in ROWS:
        entries = card["rows"].get(row)
        if entries is None:
            out.append(f"row {row} is None")
            continue
        for rep, entry in entries.items():
            if entry.get("estimate") is None:
                out.append(f"{row} {rep}: no estimate")
            elif entry.get("low") is None or entry.get("high") is None:
                out.append(f"{row} {rep}: no interval")
            if entry.get("unreached_resamples"):
                out.append(f"{row} {rep}: target AUC not reached in "
                           f"{entry['unreached_resamples']} of {card['resamples']} resamples")
    for rep, figures in card["representations"].items():
        if figures.get("detection_threshold_db") is None and (
                rep in (card["rows"].get("detection_db") or {}) or rep == card["reference"]):
            out.append(f"{rep}: detection threshold never reached on the gain grid")
    return out


def report(name: str, est, wall: float, load: float, watch: Stopwatch) -> None:
    """Print one fit's times, lines, scorecard in numbers and in words, and what it left out."""
    from burstlens.service import verdict

    d = est.diagnostics_
    stages = d["stage_seconds"]
    judge_s = stages.get("judge", 0.0)
    print(f"{name}: fit {wall:.1f} s [load {load:.1f}]; stages "
          + ", ".join(f"{k} {v:.1f} s" for k, v in stages.items()))
    print(f"  RATIO judgement / fit: {judge_s / wall:.2f} ({judge_s:.1f} s of {wall:.1f} s)")
    parts = {k: v for k, v in watch.seconds.items() if k != "threshold"}
    print("  judgement parts (a caller's seconds include its callees'; scorecard[B]: B resamples): "
          + ", ".join(f"{k} {parts[k]:.1f} s" + (f" x{watch.calls[k]}" if watch.calls[k] > 1 else "")
                      for k in sorted(parts, key=watch.order)))
    cards = sum(v for k, v in parts.items() if k.startswith("scorecard"))
    print(f"  RATIO scorecards / judgement: {cards / judge_s:.2f} ({cards:.1f} s; the rest: held-out "
          f"scoring, onsets, stability refits, the record)")
    if "threshold" in watch.seconds:
        print(f"  detection criterion: {watch.calls['threshold']} detection thresholds, "
              f"{watch.seconds['threshold']:.1f} s; RATIO thresholds / fit "
              f"{watch.seconds['threshold'] / wall:.2f}")
    lines = d["noise"]["lines"]
    print(f"  steady lines removed (found in {lines['found_in']}): "
          f"{[round(f, 2) for f in lines['lines_hz']]} Hz, levels {lines['levels_db']} dB; "
          f"{d['noise']['noise_windows']} noise windows")
    sigma = d["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
    fallback = d.get("fallback")
    print(f"  best plain spectrogram: time spread {1e3 * sigma:.3f} ms; result from {d['origin']}"
          + (f" (fallback: {fallback['reason']})" if fallback else "")
          + f"; held-out gain {_num(d['gain_bits'], '+.3f')} bits; stop {d['stop_reason']}")
    card = d["judgement"]["scorecard"]
    print(f"  scorecard on {card['bursts']} held-out bursts, {card['noise_windows']} noise windows, "
          f"{card['resamples']} resamples, level {card['level']}, reference {card['reference']}, "
          f"target AUC {card['target_auc']}")
    for row, unit in ROWS:
        entries = card["rows"].get(row)
        if entries is None:
            print(f"    {row:15s} None")
            continue
        for rep, entry in entries.items():
            print(f"    {row:15s} {rep:12s} {_entry(entry)} {unit}")
    for rep, x in card["representations"].items():
        print(f"    {rep:12s} detection threshold {_num(x['detection_threshold_db'], '+.1f')} dB, "
              f"onset median {_num(x['onset_median_ms'], '.3f')} ms, p90 "
              f"{_num(x['onset_p90_ms'], '.3f')} ms, sharpness {_num(x['sharpness_bits'], '.3f')} bits")
    for sentence in verdict.scorecard_rows(d):
        print(f"    | {sentence}")
    for warning in verdict.warnings(d):
        print(f"    | warning: {warning}")
    missing = unmeasured(card)
    print("  not measured: " + ("; ".join(missing) if missing else "nothing"))


def demo() -> None:
    from burstlens.search.corpus import read_corpus
    from burstlens.search.settings import split_settings
    from burstlens.service.demo import DEMO_SETTINGS

    corpus_options, options = split_settings(dict(DEMO_SETTINGS))
    # the service's rule (service.worker): no more jobs than the machine has cores
    options["jobs"] = min(int(options["jobs"]), os.cpu_count() or 1)
    options["compare_to"] = DEMO_COMPARE_TO
    t0 = time.perf_counter()
    corpus = read_corpus([os.path.join(ROOT, "demo_corpus")], **corpus_options)
    read_s = time.perf_counter() - t0
    m, n = corpus.windows.shape
    print(f"demo site: {m} windows x {n} samples at {corpus.sampling_rate_hz:g} Hz read in "
          f"{read_s:.1f} s ({corpus_options}); channels {options['channels']}, evaluations "
          f"{options['evaluations']}, bootstrap {options['bootstrap']}, jobs {options['jobs']}, "
          f"compare_to {DEMO_COMPARE_TO}")
    report("demo site", *timed_fit(options, corpus))


def generated() -> None:
    windows, noise, share = sites.site(True, m=GENERATED_BURSTS, k=GENERATED_NOISE)
    jobs = min(2, os.cpu_count() or 1)
    print(f"generated site: {len(windows)} burst windows, {len(noise)} noise windows, "
          f"{sites.N} samples at {sites.FS:g} Hz; bursts sigma0 {1e3 * sites.SIGMA0:.2f} ms at "
          f"{sites.F0:g} Hz; lines {[f for f, _ in sites.LINES]} Hz carry {share:.1%} of the energy; "
          f"settings {sites.SETTINGS}, jobs {jobs}, compare_to {GENERATED_COMPARE_TO}")
    walls = {}
    for label, criterion in (("default criterion", None), ("criterion detection", {"name": "detection"})):
        est, wall, load, watch = timed_fit({**sites.SETTINGS, "criterion": criterion, "jobs": jobs,
                                            "compare_to": GENERATED_COMPARE_TO},
                                           sites.corpus(windows, noise))
        walls[label] = wall
        report(f"generated site, {label}", est, wall, load, watch)
        d, fb = est.diagnostics_, est.filterbank_
        found = np.asarray(d["noise"]["lines"]["lines_hz"], dtype=np.float64)
        put = np.array([f for f, _ in sites.LINES])
        miss = [float(f) for f in put if found.size == 0 or np.min(np.abs(found - f)) > 1.0]
        extra = [float(f) for f in found if np.min(np.abs(put - f)) > 1.0]
        sigma = d["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
        at_f0 = float(fb.time_spread_s[int(np.argmin(np.abs(fb.center_hz - sites.F0)))])
        print(f"  known answers: lines put in {put.tolist()} Hz, missed {miss}, extra {extra}; "
              f"best spectrogram {1e3 * sigma:.3f} ms = {sigma / sites.SIGMA0:.3f} sigma0; result at "
              f"{sites.F0:g} Hz {1e3 * at_f0:.3f} ms = {at_f0 / sites.SIGMA0:.3f} sigma0")
    print(f"  RATIO detection / default criterion fit time: "
          f"{walls['criterion detection'] / walls['default criterion']:.2f}")


def main() -> int:
    sys.stdout.reconfigure(line_buffering=True)      # each figure shows as soon as it is measured
    print(f"scorecard bench: {os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}")
    demo()
    generated()
    return 0


if __name__ == "__main__":
    sys.exit(main())
