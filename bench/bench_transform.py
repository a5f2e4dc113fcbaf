"""Benchmark of search.tfd against the issue-2 targets, all figures from one run.

Set-up: fs = 4 kHz, C = 96 channels on a log grid over 20–1800 Hz, σ_t from 50 ms (lowest
centre) down to 2 ms (highest), a = 1; the chirped variant adds β = +1500 Hz/s to every channel.
Windows of N = 1024 and 4096 samples of white noise.

Timing: each candidate is run in turn, round-robin, and the best (minimum) of the rounds is kept,
so that the ratios come from the same moments of a shared machine. Transform times include the
analytic signal (raw windows in) and use cached per-filterbank weights ("warm"; the first call,
which builds them, is printed as "cold"). Two passes: one thread everywhere (BLAS limited with
threadpoolctl, FFT workers=1 — ShortTimeFFT is single-threaded, so this is like for like, and it
is how parallel search workers run), then the library defaults (all cores for BLAS and FFT).

Spectrogram reference (fair choice): one scipy.signal.ShortTimeFFT, hop 1, one-sided on the real
window, Gaussian window with the filterbank's median σ_t (std σ·fs·√2, ±√(2 ln 10⁶)·σ support),
mfft = next_fast_len(window length), full frequency grid, every sample a frame — the plain
spectrogram someone would compute instead.
It is generous to the spectrogram: it has one window where the transform has 96 different ones.
Bare product: (N × 2(L+1)) @ (2(L+1) × C) float64 with L the filterbank's largest lag count —
the fast path's shape without grouping.
Chirped path: the line for each size names the way the cost model chose (lag-major or Doppler
rows); a last section times both ways on a few filterbanks and single channels, one thread, and
counts how often the model picked the faster.
"""
from __future__ import annotations

import math
import resource
import time
import tracemalloc
from functools import partial
from pathlib import Path

import numpy as np
import scipy.fft as sfft
from scipy.signal import ShortTimeFFT
from scipy.signal.windows import gaussian
from threadpoolctl import threadpool_limits

ROOT = Path(__file__).resolve().parents[1]

from burstlens.search import Channel, Filterbank, center_grid, prepare, transform  # noqa: E402
from burstlens.search.tfd import auto_chirp_method, clear_plans  # noqa: E402
from burstlens.search.wvd import lag_count, truncation_width  # noqa: E402

FS = 4000.0
CHANNELS = 96
CHIRP = 1500.0
EPS = 1e-6
TARGETS = {"stft_1024": 0.4, "stft_4096": 0.6, "gemm": 3.0, "chirp": 3.0, "memory_mb": 512.0}


def filterbanks():
    centers = center_grid((20.0, 1800.0), CHANNELS, "log")
    sigma = np.geomspace(0.050, 0.002, CHANNELS)
    plain = Filterbank.constant_area(centers, sigma, 1.0, FS)
    chirped = Filterbank.constant_area(centers, sigma, 1.0, FS, chirp_hz_per_s=CHIRP)
    return plain, chirped


def best_times(candidates: dict, rounds: int) -> dict:
    """Minimum wall time (s) per candidate over ``rounds`` round-robin passes (after a warm-up)."""
    for run in candidates.values():
        run()
    best = {name: math.inf for name in candidates}
    for _ in range(rounds):
        for name, run in candidates.items():
            start = time.perf_counter()
            run()
            best[name] = min(best[name], time.perf_counter() - start)
    return best


def verdict(value, target, smaller=True):
    ok = value <= target if smaller else value >= target
    return f"(target ≤ {target:g}: {'met' if ok else 'MISSED'})"


def speed(n_samples: int, n_windows: int, rounds: int, workers: int | None) -> dict:
    plain, chirped = filterbanks()
    windows = np.random.default_rng(n_samples).standard_normal((n_windows, n_samples))
    clear_plans()
    start = time.perf_counter()
    transform(windows, plain, workers=workers)
    cold = time.perf_counter() - start
    clear_plans()
    start = time.perf_counter()
    transform(windows, chirped, workers=workers)
    cold_chirp = time.perf_counter() - start

    sigma = float(np.median(plain.time_spread_s))
    half = int(math.ceil(truncation_width(EPS) * sigma * FS))
    window = gaussian(2 * half + 1, std=sigma * FS * math.sqrt(2.0))
    stft = ShortTimeFFT(window, hop=1, fs=FS, fft_mode="onesided",
                        mfft=sfft.next_fast_len(window.size, real=True))

    lags = int(lag_count(plain.conditional_freq_spread_hz, FS, n_samples, EPS).max())
    rng = np.random.default_rng(1)
    a = rng.standard_normal((n_samples, 2 * (lags + 1)))
    b = rng.standard_normal((2 * (lags + 1), CHANNELS))
    prepared = prepare(windows)

    times = best_times(
        {
            "transform": lambda: transform(windows, plain, workers=workers),
            "prepared": lambda: transform(prepared, plain, workers=workers),
            "chirped": lambda: transform(windows, chirped, workers=workers),
            "stft": lambda: [stft.spectrogram(w, p0=0, p1=n_samples) for w in windows],
            "gemm": lambda: [a @ b for _ in range(n_windows)],
        },
        rounds,
    )
    per = {name: t / n_windows * 1e3 for name, t in times.items()}  # ms per window
    tag = f"N={n_samples} [{'1 thread' if workers == 1 else 'all cores'}]"
    method = {"lag": "lag-major", "doppler": "Doppler rows"}[
        auto_chirp_method(chirped, n_samples, eps=EPS)]
    print(f"{tag}: per window  transform {per['transform']:.2f} ms (prepared windows "
          f"{per['prepared']:.2f} ms; cold first call {cold / n_windows * 1e3:.2f} ms), "
          f"chirped {per['chirped']:.2f} ms ({method}; cold {cold_chirp / n_windows * 1e3:.2f} "
          f"ms), "
          f"ShortTimeFFT {per['stft']:.2f} ms (window {2 * half + 1} samples, median "
          f"σ_t {sigma * 1e3:.1f} ms), bare matmul {per['gemm']:.2f} ms "
          f"({n_samples}×{2 * (lags + 1)} @ {2 * (lags + 1)}×{CHANNELS})")
    ratio_stft = per["transform"] / per["stft"]
    ratio_gemm = per["transform"] / per["gemm"]
    ratio_chirp = per["chirped"] / per["transform"]
    print(f"{tag}: transform / ShortTimeFFT = {ratio_stft:.3f} "
          f"{verdict(ratio_stft, TARGETS[f'stft_{n_samples}'])}")
    print(f"{tag}: transform / bare matmul = {ratio_gemm:.3f} "
          f"{verdict(ratio_gemm, TARGETS['gemm'])}")
    print(f"{tag}: chirped / unchirped = {ratio_chirp:.3f} "
          f"{verdict(ratio_chirp, TARGETS['chirp'])}")
    return per


def naive_ratio() -> None:
    """fast / naive on a size the naive full-grid reference can do (N = 128, 8 channels)."""
    from burstlens.search.testing.reference import reference_channel, reference_frequency_count, reference_wvd
    from scipy.signal import hilbert

    n_samples = 128
    centers = center_grid((40.0, 1800.0), 8, "log")
    fb = Filterbank.constant_area(centers, np.geomspace(0.008, 0.002, 8), 1.0, FS)
    x = np.random.default_rng(3).standard_normal(n_samples)

    def naive():
        z = hilbert(x)
        n_freqs = reference_frequency_count(n_samples, fb, FS, eps=EPS)
        w = reference_wvd(z, n_freqs)
        return [reference_channel(z, c, FS, n_freqs, wvd=w) for c in fb]

    times = best_times({"fast": lambda: transform(x, fb, workers=1), "naive": naive}, 2)
    print(f"N=128, C=8: fast {times['fast'] * 1e3:.2f} ms, naive full grid + explicit 2-D "
          f"convolution {times['naive'] * 1e3:.1f} ms: fast / naive = "
          f"{times['fast'] / times['naive']:.2e}")


def peak_memory(workers: int | None, n_samples: int = 4096, n_windows: int = 8) -> None:
    """Peak traced allocation (numpy arrays, plan included) of one cold transform call."""
    plain, chirped = filterbanks()
    windows = np.random.default_rng(4).standard_normal((n_windows, n_samples))
    for name, fb in (("unchirped", plain), ("chirped", chirped)):
        clear_plans()
        tracemalloc.start()
        base, _ = tracemalloc.get_traced_memory()
        image = transform(windows, fb, workers=workers)
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
        extra = (peak - base) / 2**20
        out = image.nbytes / 2**20
        threads = "1 thread" if workers == 1 else "all cores"
        print(f"N={n_samples}, C={CHANNELS}, M={n_windows}, {name} [{threads}]: peak memory "
              f"{extra:.0f} MB "
              f"(of which output {out:.0f} MB; tracemalloc, plan build included) "
              f"{verdict(extra, TARGETS['memory_mb'])}")
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    print(f"process max RSS so far {rss:.0f} MB (interpreter, libraries and BLAS buffers included)")


def chirp_method_choice(rounds: int = 3) -> None:
    """The chirped path's cost model against the clock: for a few filterbanks (the bench's at
    three chirp rates, and one channel alone as refinement computes it), each way of forming
    the ambiguity samples timed, and whether the model's pick is the faster (or within 15 %)."""
    centers = center_grid((20.0, 1800.0), CHANNELS, "log")
    sigma = np.geomspace(0.050, 0.002, CHANNELS)
    cases = [(f"C={CHANNELS}, β={beta:+g} Hz/s",
              Filterbank.constant_area(centers, sigma, 1.0, FS, chirp_hz_per_s=beta))
             for beta in (300.0, CHIRP, 6000.0)]
    cases += [(f"one channel, σ_t={s * 1e3:g} ms, a={a:g}",
               Filterbank([Channel(500.0, s, a, CHIRP)], FS))
              for s, a in ((0.002, 1.0), (0.01, 0.3), (0.01, 1.0), (0.04, 1.0))]
    chosen_right = total = 0
    for n_samples, n_windows in ((1024, 16), (4096, 4)):
        windows = np.random.default_rng(5).standard_normal((n_windows, n_samples))
        for name, fb in cases:
            pick = auto_chirp_method(fb, n_samples, eps=EPS)
            clear_plans()  # room in the cache for the two forced ways' weights
            runs = {method: partial(transform, windows, fb, eps=EPS, workers=1, chirp_method=method)
                    for method in ("lag", "doppler")}
            times = {m: t / n_windows * 1e3 for m, t in best_times(runs, rounds).items()}
            clear_plans()
            good = times[pick] <= 1.15 * min(times.values())
            chosen_right += good
            total += 1
            print(f"N={n_samples}, {name}: lag-major {times['lag']:.2f} ms, Doppler rows "
                  f"{times['doppler']:.2f} ms per window; model picks {pick} "
                  f"({'ok' if good else 'SLOWER'})")
    print(f"chirped cost model: the faster way (or within 15 %) in {chosen_right} of {total} cases")


def main() -> None:
    print(f"burstlens.search.tfd benchmark: fs={FS:g} Hz, C={CHANNELS}, σ_t 2–50 ms, a=1, "
          f"chirp {CHIRP:+g} Hz/s for the chirped filterbank, eps={EPS:g}")
    with threadpool_limits(1):
        peak_memory(workers=1)
        speed(1024, 16, rounds=7, workers=1)
        speed(4096, 4, rounds=5, workers=1)
        naive_ratio()
        chirp_method_choice()
    peak_memory(workers=None)
    speed(1024, 16, rounds=7, workers=None)
    speed(4096, 4, rounds=5, workers=None)


if __name__ == "__main__":
    main()
