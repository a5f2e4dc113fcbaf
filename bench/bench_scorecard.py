"""Benchmark of what a tuning gives the pipeline: the scorecard beside the time it costs.

Prints, from one run on this machine:

- the demo site (demo_corpus/, 128 windows, the demo's settings): fit time, the time of each stage
  and the judgement's share of it, the steady lines found, the scorecard rows in numbers
  (estimate [low, high] of the result and each other representation against the best plain
  spectrogram) and in words (``service.verdict.scorecard_rows``);
- a generated site with known answers (Gaussian bursts of time spread 6.1 ms at 300 Hz, a red
  background and steady lines carrying more than 90 % of the energy; the generator of
  tests/search/test_site_noise.py), fitted with the default criterion and with the detection
  criterion: the same figures, the best-spectrogram window against the matched 6.1 ms, and the
  time ratio of the detection criterion's fit to the default's.

Usage: ``python bench/bench_scorecard.py``.
"""
from __future__ import annotations

import importlib.util
import os
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
sys.path.insert(0, ROOT)


def _generated_site():
    """The site generator of tests/search/test_site_noise.py, loaded by path."""
    path = os.path.join(ROOT, "tests", "search", "test_site_noise.py")
    spec = importlib.util.spec_from_file_location("site_noise", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def _interval(entry) -> str:
    if not entry or entry.get("estimate") is None:
        return "not measured"
    low, high = entry.get("low"), entry.get("high")
    span = f" [{low:+.2f}, {high:+.2f}]" if low is not None and high is not None else " [no interval]"
    return f"{entry['estimate']:+.2f}{span}"


def report(name: str, est, seconds: float) -> None:
    from burstlens.service import verdict

    d = est.diagnostics_
    card = d["judgement"]["scorecard"]
    stages = d.get("stage_seconds", {})
    print(f"{name}: fit {seconds:.1f} s; stages "
          + ", ".join(f"{k} {v:.1f} s" for k, v in stages.items())
          + f"; judgement {stages.get('judge', 0.0) / max(seconds, 1e-9):.0%} of the fit")
    print(f"  steady lines removed: {[round(f, 2) for f in d['noise']['lines']['lines_hz']]}")
    sigma = d["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
    print(f"  best plain spectrogram: time spread {1e3 * sigma:.2f} ms; origin of the result: "
          f"{d['origin']}" + (f" (fallback: {d['fallback']['reason']})" if d["fallback"] else ""))
    for row, unit in (("detection_db", "dB"), ("onset_ms", "ms"), ("sharpness_bits", "bits")):
        entries = card["rows"].get(row) or {}
        for rep, entry in entries.items():
            print(f"  {row:15s} {rep:9s} {_interval(entry)} {unit} (positive: better than the "
                  "best plain spectrogram)")
    def num(value, spec: str) -> str:
        return "—" if value is None else format(value, spec)

    for rep, figures in card["representations"].items():
        print(f"  {rep:11s} threshold {num(figures['detection_threshold_db'], '+.2f')} dB, onset "
              f"median {num(figures['onset_median_ms'], '.2f')} ms, p90 "
              f"{num(figures['onset_p90_ms'], '.2f')} ms, sharpness "
              f"{num(figures['sharpness_bits'], '.3f')} bits")
    for line in verdict.scorecard_rows(d):
        print(f"  | {line}")


def main() -> int:
    from burstlens.search.corpus import read_corpus
    from burstlens.search.optimize import FilterbankSearch

    corpus = read_corpus(os.path.join(ROOT, "demo_corpus"), max_windows=128, seed=7)
    t0 = time.perf_counter()
    est = FilterbankSearch(channels=96, evaluations=16, bootstrap=4, seed=7,
                           compare_to="hann:256:192").fit(corpus)
    report("demo site", est, time.perf_counter() - t0)

    site = _generated_site()
    windows, noise, share = site.site(True)
    print(f"generated site: {len(windows)} bursts, {len(noise)} noise windows, the lines carry "
          f"{share:.1%} of the energy; matched window {1e3 * site.SIGMA0:.2f} ms")
    times = {}
    for criterion in ("renyi", "detection"):
        t0 = time.perf_counter()
        est = FilterbankSearch(**site.SETTINGS, criterion=criterion).fit(site.corpus(windows, noise))
        times[criterion] = time.perf_counter() - t0
        report(f"generated site, criterion {criterion}", est, times[criterion])
    print(f"detection criterion / default fit time: {times['detection'] / times['renyi']:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
