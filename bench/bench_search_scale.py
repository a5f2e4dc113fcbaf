"""Benchmark of the search at site scale (issue 14): 1000 and 10 000 windows × 1024 samples.

Each size runs ``FilterbankSearch(...).fit`` in a fresh child process on windows made in memory
(the demo corpus plus copies with fresh noise, seeded, as bench_search.py makes them), with the
same settings for both sizes. Prints, from one run on this machine:

- wall time, CPU time and peak resident memory (the child's VmHWM) of each size;
- peak memory of the 10 000-window search against the target of 1 GB;
- the time ratio t(10 000) / (10 × t(1000)) against the target of 1.2: the work per window
  must not grow with the window count (stage 1 scores a fixed subset, so the ratio may be < 1).

Settings are modest so the large run ends in minutes: every stage runs (baselines, family
search, refinement, judgement, bootstrap) with fewer iterations than a default tune.

Usage: ``python bench/bench_search_scale.py [--windows M]`` (``--windows``: the large size,
the small one is a tenth of it; for a quick check, e.g. ``--windows 500``).
"""
from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import time

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

# the same for both sizes; jobs = 1 so the child's own peak memory is the whole search's
OPTIONS = dict(channels=48, evaluations=4, refine_maxiter=1, bootstrap=2, subset=64, jobs=1)
MEMORY_TARGET_MB = 1024.0
TIME_TARGET = 1.2


def peak_rss_mb() -> float:
    """Peak resident set size of this process (VmHWM of /proc/self/status), MB."""
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    raise RuntimeError("no VmHWM in /proc/self/status")


def make_corpus(n_windows: int):
    """The demo corpus's windows and copies of them with fresh noise (seeded), n_windows of them."""
    from dataclasses import replace

    from bench_search import with_copy

    from burstlens.search.corpus import read_corpus

    corpus = read_corpus([os.path.join(ROOT, "demo_corpus")])
    big = with_copy(corpus, -(-n_windows // corpus.n_windows))
    return replace(big, windows=big.windows[:n_windows], window_meta=big.window_meta[:n_windows])


def child(n_windows: int) -> None:
    """Run in a child: one search over n_windows windows; print seconds and peak RSS as JSON."""
    from burstlens.search.optimize import FilterbankSearch

    corpus = make_corpus(n_windows)
    t0, c0 = time.perf_counter(), time.process_time()
    est = FilterbankSearch(**OPTIONS).fit(corpus)
    seconds, cpu = time.perf_counter() - t0, time.process_time() - c0
    print(json.dumps({"windows": int(corpus.windows.shape[0]),
                      "samples": int(corpus.windows.shape[1]), "seconds": seconds, "cpu": cpu,
                      "peak_mb": peak_rss_mb(), "stages": est.diagnostics_["stage_seconds"]}))


def run_child(n_windows: int) -> dict:
    cmd = [sys.executable, os.path.abspath(__file__), "--child", str(n_windows)]
    done = subprocess.run(cmd, capture_output=True, text=True, check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--windows", type=int, default=10_000, help="the large size (default 10000)")
    parser.add_argument("--child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    sys.stdout.reconfigure(line_buffering=True)
    if args.child:
        child(args.child)
        return 0
    large = args.windows
    small = max(1, large // 10)
    print(f"search scale bench: {small} and {large} windows x 1024 samples, options {OPTIONS}, "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}")
    runs = {}
    for m in (small, large):
        r = runs[m] = run_child(m)
        stages = ", ".join(f"{k} {v:.0f} s" for k, v in r["stages"].items())
        print(f"  {r['windows']} windows: {r['seconds']:.1f} s (cpu {r['cpu']:.1f} s; {stages}), "
              f"peak memory {r['peak_mb']:.0f} MB")
    peak = runs[large]["peak_mb"]
    ratio = runs[large]["seconds"] / (large / small * runs[small]["seconds"])
    met = peak <= MEMORY_TARGET_MB and ratio <= TIME_TARGET
    print(f"  peak memory, {large} windows: {peak:.0f} MB (target <= {MEMORY_TARGET_MB:.0f} MB)")
    print(f"  RATIO time({large}) / ({large // small} x time({small})): {ratio:.2f} "
          f"(target <= {TIME_TARGET})")
    print("targets met" if met else "target NOT met")
    return 0


if __name__ == "__main__":
    sys.exit(main())
