"""Benchmark of the continuous transform (search.continuous) over generated hours, one run.

Usage: python bench/bench_continuous.py [--hours H] [--jobs N]   (defaults: 0.5 h, 1 process;
--hours 1 is the issue's hour, about 5 minutes on the 2-core dev machine)

Data: H hours of 3 components (XX.BEN..HHZ/HHN/HHE) at fs = 4 kHz, white noise plus a 0.2 s
tone burst every 10 s, one float32 miniSEED file per component (obspy), in a temporary folder.
Filterbank (tuned-like, no chirp): C = 96 channels log-spaced over 40–1800 Hz, σ_t from 8 ms
(lowest centre) down to 2 ms (highest), cell area 1, ε = 1e-6; the step is the rule's
(search.timestep: 6 samples, 1.5 ms, for this filterbank).

Figures, all from this run:
- continuous: wall time of ``transform_continuous`` over all files (reading, preprocessing,
  the transform at the step, writing the Zarr store), ``--jobs`` processes;
- ShortTimeFFT: one scipy.signal.ShortTimeFFT (Gaussian window of the filterbank's median σ_t,
  std σ·fs, ±√(2 ln 10⁶)·σ support, mfft = next_fast_len(window length), one-sided, hop = the
  same step) over the same samples already in memory, in blocks of frames; |S|² at the FFT bins
  nearest the 96 centres kept as float32 (then dropped). Generous to it: no reading, no writing,
  one window where the filterbank has 96;
- bare product: (N × 2(L+1)) @ (2(L+1) × C) float64, L the largest lag count, N all samples of
  the run, timed on blocks of 2^16 rows and scaled by N / 2^16 (BLAS threads as in force);
- throughput: input samples per second of the continuous transform;
- peak memory: ru_maxrss of this process (and of its pool's processes, RUSAGE_CHILDREN) right
  after the continuous transform; it includes the data generation.
"""
from __future__ import annotations

import argparse
import math
import resource
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.fft as sfft
from scipy.signal import ShortTimeFFT
from scipy.signal.windows import gaussian

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from burstlens.search.continuous import transform_continuous  # noqa: E402
from burstlens.search.documents import FilterbankDocument  # noqa: E402
from burstlens.search.filterbank import Filterbank, center_grid  # noqa: E402
from burstlens.search.timestep import time_step  # noqa: E402
from burstlens.search.wvd import lag_count, truncation_width  # noqa: E402

FS = 4000.0
CHANNELS = 96
EPS = 1e-6
COMPONENTS = ("HHZ", "HHN", "HHE")
TARGET_STFT_RATIO = 0.5
GEMM_ROWS = 1 << 16


def filterbank() -> Filterbank:
    centers = center_grid((40.0, 1800.0), CHANNELS, "log")
    return Filterbank.constant_area(centers, np.geomspace(0.008, 0.002, CHANNELS), 1.0, FS)


def write_hours(folder: Path, hours: float, seed: int = 0) -> tuple[list[str], list[np.ndarray]]:
    """One float32 miniSEED file per component; returns the paths and the samples (float32)."""
    import obspy

    n = int(round(hours * 3600 * FS))
    rng = np.random.default_rng(seed)
    t = np.arange(int(0.2 * FS)) / FS
    burst = (20.0 * np.hanning(t.size) * np.sin(2 * np.pi * 300.0 * t)).astype(np.float32)
    paths, data = [], []
    for cha in COMPONENTS:
        x = rng.standard_normal(n, dtype=np.float32)
        for onset in range(int(5 * FS), n - burst.size, int(10 * FS)):
            x[onset:onset + burst.size] += burst
        tr = obspy.Trace(x, header={"network": "XX", "station": "BEN", "channel": cha, "sampling_rate": FS,
                                    "starttime": obspy.UTCDateTime(2024, 1, 1)})
        path = folder / f"XX.BEN..{cha}.mseed"
        tr.write(str(path), format="MSEED", encoding="FLOAT32")
        paths.append(str(path))
        data.append(x)
    return paths, data


def stft_seconds(data: list[np.ndarray], fb: Filterbank, step: int) -> tuple[float, int]:
    """Wall time of ShortTimeFFT over all components (see the module docstring), frames made."""
    sigma = float(np.median(fb.time_spread_s))
    half = int(math.ceil(truncation_width(EPS) * sigma * FS))
    window = gaussian(2 * half + 1, std=sigma * FS)
    mfft = sfft.next_fast_len(window.size, real=True)
    sft = ShortTimeFFT(window, hop=step, fs=FS, mfft=mfft, fft_mode="onesided")
    bins = np.unique(np.clip(np.rint(fb.center_hz / sft.delta_f).astype(int), 0, sft.f.size - 1))
    frames, block = 0, 1 << 14
    t0 = time.perf_counter()
    for x in data:
        p_max = sft.p_max(x.size)
        for p0 in range(sft.p_min, p_max, block):
            p1 = min(p_max, p0 + block)
            s = sft.stft(x, p0=p0, p1=p1)
            power = (np.abs(s[bins]) ** 2).astype(np.float32)
            frames += power.shape[1]
    return time.perf_counter() - t0, frames


def gemm_seconds(fb: Filterbank, n_rows: int) -> tuple[float, int]:
    """Time of the bare (n_rows × 2(L+1)) @ (2(L+1) × C) product (best of 3 blocks, scaled)."""
    lags = int(np.max(lag_count(fb.conditional_freq_spread_hz, FS, 1 << 40, EPS)))
    rng = np.random.default_rng(1)
    a = rng.standard_normal((GEMM_ROWS, 2 * (lags + 1)))
    b = rng.standard_normal((2 * (lags + 1), len(fb)))
    a @ b
    best = math.inf
    for _ in range(3):
        t0 = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - t0)
    return best * n_rows / GEMM_ROWS, lags


def main(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=0.5, help="hours of data per component (default 0.5)")
    parser.add_argument("--jobs", type=int, default=1, help="processes of the continuous transform (default 1)")
    args = parser.parse_args(argv)
    if not args.hours > 0:
        parser.error(f"--hours {args.hours}: must be positive")
    fb = filterbank()
    document = FilterbankDocument.of(fb)
    step = time_step(fb, eps=EPS)
    with tempfile.TemporaryDirectory(prefix="burstlens-bench-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        paths, data = write_hours(folder, args.hours)
        n_total = sum(x.size for x in data)
        print(f"data: {len(paths)} components x {args.hours:g} h at {FS:g} Hz = {n_total:,} samples "
              f"(written in {time.perf_counter() - t0:.1f} s); filterbank C = {len(fb)}, "
              f"sigma_t {fb.time_spread_s.max() * 1e3:g}..{fb.time_spread_s.min() * 1e3:g} ms, "
              f"step {step.samples} samples ({step.seconds * 1e3:g} ms)", flush=True)
        t0 = time.perf_counter()
        result = transform_continuous(paths, document, str(folder / "out.zarr"), reading={"sampling_rate_hz": FS},
                                      n_jobs=args.jobs)
        continuous = time.perf_counter() - t0
        peak_self = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        peak_children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        steps = sum(p.n_steps for p in result.parts)
        print(f"continuous: {continuous:.1f} s ({args.jobs} process(es)), {steps:,} steps x {len(fb)} channels "
              f"written; throughput {n_total / continuous / 1e6:.2f} M samples/s "
              f"({n_total / continuous / FS:.0f}x real time for one component)", flush=True)
        print(f"peak memory (ru_maxrss): {peak_self:.0f} MB this process, {peak_children:.0f} MB largest child",
              flush=True)
        stft, frames = stft_seconds(data, fb, step.samples)
        ratio = continuous / stft
        print(f"ShortTimeFFT: {stft:.1f} s for {frames:,} frames; continuous / ShortTimeFFT = {ratio:.2f} "
              f"(goal <= {TARGET_STFT_RATIO}: {'met' if ratio <= TARGET_STFT_RATIO else 'NOT met'})", flush=True)
        gemm, lags = gemm_seconds(fb, n_total)
        print(f"bare product ({n_total:,} x {2 * (lags + 1)}) @ ({2 * (lags + 1)} x {len(fb)}): {gemm:.1f} s; "
              f"continuous / product = {continuous / gemm:.2f}", flush=True)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
