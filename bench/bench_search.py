"""Benchmark of the search (issue 4): the default tune on demo_corpus/ against a by-hand choice.

Prints, from one run on this machine:

- the by-hand baseline: the best of 24 Gaussian spectrogram windows (time spreads log-spaced over
  the search's own bounds [4/fs, window/6]) by Rényi entropy (α = 3) over the same windows,
  each spectrogram computed with ``scipy.signal.ShortTimeFFT`` (hop 1, one column per sample as
  the learned representation has; window ``gaussian(L, std = σ_t·fs·√2)`` cut at ±4 std,
  ``mfft`` the next power of two ≥ L; rows in the search's default band). Entropies of
  different ``mfft`` are compared on the continuous plane, H + log2(Δt·Δf), since the grids
  differ;
- the default ``FilterbankSearch().fit`` wall time, its ratio to the baseline, both entropies;
- the time ratio for twice the windows (the demo windows plus a copy with fresh noise);
- peak resident memory of a search over 1000 windows × 1024 samples, in a child process
  (reduced budget: the arrays, hence the memory, have the same sizes as in a default run).

Each time is printed with the CPU seconds it used and the load average before it: on a shared
machine the wall-time ratios move with the other work, the CPU-time ratios much less.

Usage: ``python bench/bench_search.py [--quick]`` (``--quick``: smaller budgets, for a smoke run).
"""
from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import time

import numpy as np

ROOT = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))


def by_hand(windows: np.ndarray, fs: float, n_windows_grid: int = 24) -> dict:
    """Best of ``n_windows_grid`` Gaussian ShortTimeFFT spectrograms by mean Rényi entropy."""
    from scipy.signal import ShortTimeFFT
    from scipy.signal.windows import gaussian

    from burstlens.search.criteria import Criterion, continuous_entropy

    n = windows.shape[1]
    criterion = Criterion("renyi", alpha=3.0)
    results = []
    for sigma in np.geomspace(4.0 / fs, n / fs / 6.0, n_windows_grid):
        std = sigma * fs * math.sqrt(2.0)          # |h|² has time std σ_t (docs/design.md §3)
        half = int(math.ceil(4.0 * std))
        win = gaussian(2 * half + 1, std)
        mfft = 1 << int(math.ceil(math.log2(len(win))))
        stft = ShortTimeFFT(win, hop=1, fs=fs, mfft=mfft, scale_to=None)
        band = (stft.f >= fs / 100.0) & (stft.f <= 0.45 * fs)
        scores = np.empty(len(windows))
        for start in range(0, len(windows), 16):   # bounded memory, as a careful user would
            image = stft.spectrogram(windows[start:start + 16], p0=0, p1=n, axis=-1)
            scores[start:start + 16] = criterion.score(image[:, band, :])
        grid = float(np.mean(scores))
        results.append((continuous_entropy(grid, 1.0 / fs, fs / mfft), grid, float(sigma), mfft))
    best = min(results)
    return {"time_spread_s": best[2], "entropy_continuous_bits": best[0],
            "entropy_grid_bits": best[1], "mfft": best[3]}


def timed(fn, *args, **kwargs):
    """(result, wall seconds). The CPU seconds of the call (this process and its children,
    user + system) and the load average before it go to ``timed.last``: on a shared machine
    the wall time depends on what else runs, the CPU time much less."""
    load = os.getloadavg()[0]
    c0, t0 = _cpu(), time.perf_counter()
    out = fn(*args, **kwargs)
    wall = time.perf_counter() - t0
    timed.last = {"wall": wall, "cpu": _cpu() - c0, "load": load}
    return out, wall


def _cpu() -> float:
    t = os.times()
    return t.user + t.system + t.children_user + t.children_system


def _note() -> str:
    return f"[cpu {timed.last['cpu']:.1f} s, load {timed.last['load']:.1f}]"


def search(corpus, **options):
    from burstlens.search.optimize import FilterbankSearch

    return FilterbankSearch(**options).fit(corpus)


def with_copy(corpus, factor: int, seed: int = 1):
    """The corpus with ``factor``× the windows: the originals plus copies with fresh noise at
    5 % of each window's rms (the same kind of data, more of it)."""
    from dataclasses import replace

    rng = np.random.default_rng(seed)
    parts = [corpus.windows]
    for _ in range(factor - 1):
        rms = np.sqrt(np.mean(corpus.windows ** 2, axis=1, keepdims=True))
        parts.append(corpus.windows + 0.05 * rms * rng.standard_normal(corpus.windows.shape))
    windows = np.concatenate(parts)
    meta = list(corpus.window_meta) * factor
    return replace(corpus, windows=windows, window_meta=meta)


def memory_child(n_windows: int, quick: bool) -> None:
    """Run in a child: a search over n_windows × 1024 samples, print peak RSS (MB) as JSON."""
    import resource

    from burstlens.search.corpus import read_corpus

    corpus = read_corpus([os.path.join(ROOT, "demo_corpus")])
    reps = -(-n_windows // corpus.n_windows)
    big = with_copy(corpus, reps)
    from dataclasses import replace

    big = replace(big, windows=big.windows[:n_windows], window_meta=big.window_meta[:n_windows])
    # Fewer iterations than the default: every stage still runs on all 1000 windows with the
    # default 96 channels, so the arrays (and the peak memory) are those of a default run.
    options = dict(evaluations=4, refine_maxiter=1, bootstrap=2, channels=48 if quick else 96)
    _, seconds = timed(search, big, **options)
    peak_mb = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
    print(json.dumps({"windows": int(big.windows.shape[0]), "samples": int(big.windows.shape[1]),
                      "peak_mb": peak_mb, "seconds": seconds, "options": options}))


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    parser.add_argument("--memory-child", type=int, help=argparse.SUPPRESS)
    args = parser.parse_args()
    sys.stdout.reconfigure(line_buffering=True)      # each figure shows as soon as it is measured
    if args.memory_child:
        memory_child(args.memory_child, args.quick)
        return 0

    from burstlens.search.corpus import read_corpus

    corpus = read_corpus([os.path.join(ROOT, "demo_corpus")])
    fs = corpus.sampling_rate_hz
    m, n = corpus.windows.shape
    print(f"search bench: demo_corpus, {m} windows x {n} samples at {fs:g} Hz, "
          f"{os.cpu_count()} CPUs, load average {os.getloadavg()[0]:.1f}")
    options = dict(evaluations=8, refine_maxiter=3) if args.quick else {}

    hand, t_hand = timed(by_hand, corpus.windows, fs)
    cpu_hand = timed.last["cpu"]
    print(f"  by hand (24 ShortTimeFFT Gaussian windows): {t_hand:.1f} s {_note()}; best window std "
          f"{hand['time_spread_s'] * 1e3:.2f} ms, H3 {hand['entropy_grid_bits']:.3f} bits on its "
          f"grid (mfft {hand['mfft']}), {hand['entropy_continuous_bits']:.3f} bits continuous")

    est, t_search = timed(search, corpus, **options)
    cpu_search = timed.last["cpu"]
    d = est.diagnostics_
    spec = d["baselines"]["spectrogram"]
    print(f"  default search: {t_search:.1f} s {_note()} (stop: {d['stop_reason']}; stages "
          + ", ".join(f"{k} {v:.0f} s" for k, v in d["stage_seconds"].items()) + ")")
    j = d["judgement"]
    g = j["gain_bits"]
    print(f"    gain on windows the fit never saw: {g['estimate']:.3f} [{g['low']:.3f}, {g['high']:.3f}]"
          f" bits ({j['held_out_windows']} held-out windows, {j['fit_windows']} fitted); result H3 "
          f"{d['result']['objective']:.3f} bits on the plane, best spectrogram "
          f"{spec['objective']:.3f} (std {spec['parameters']['time_spread_s'] * 1e3:.2f} ms); "
          f"negative share {j['negative_share']['overall']:.4f}; bounds hit {j['bounds_hit'] or 'none'}")
    print(f"  RATIO search / by hand: {t_search / t_hand:.2f} wall, {cpu_search / cpu_hand:.2f} cpu"
          f"  (target <= 1.5)")

    _, t_double = timed(search, with_copy(corpus, 2), **options)
    print(f"  2x windows: {t_double:.1f} s {_note()}; RATIO 2x / 1x: {t_double / t_search:.2f} wall, "
          f"{timed.last['cpu'] / cpu_search:.2f} cpu  (target <= 2.1)")

    cmd = [sys.executable, os.path.abspath(__file__), "--memory-child", "1000"] + \
        (["--quick"] if args.quick else [])
    child = subprocess.run(cmd, capture_output=True, text=True, check=True)
    mem = json.loads(child.stdout.strip().splitlines()[-1])
    print(f"  peak memory, {mem['windows']} windows x {mem['samples']} samples: "
          f"{mem['peak_mb']:.0f} MB in {mem['seconds']:.0f} s (options {mem['options']}; "
          f"target <= 2048 MB)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
