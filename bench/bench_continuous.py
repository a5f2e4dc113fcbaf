"""Benchmark of the continuous transform (search.continuous) over generated hours and a
generated week, one run.

Usage: python bench/bench_continuous.py [--hours H] [--jobs N] [--precision P] [--week-days D]
(defaults: 0.5 h, 1 process, 7 days; --hours 1 is the issue's hour; --week-days 0 skips the
week. The default run takes about 8 minutes on the 2-core dev machine.)

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
- bare product: (N × 2(L+1)) @ (2(L+1) × C) in the run's precision (float64, or float32 with
  ``--precision single``), L the largest lag count, N all samples of the run, timed on blocks of
  2^16 rows and scaled by N / 2^16 (BLAS threads as in force);
- throughput: input samples per second of the continuous transform;
- peak memory: ru_maxrss of this process (and of its pool's processes, RUSAGE_CHILDREN) right
  after the continuous transform; it includes the data generation.

Week scale (each scale in its own interpreter, so its peak memory is its own): one 3-C station
(XX.WEK..HHZ/HHN/HHE) at fs = 200 Hz, a common rate for a week-long surface or shallow-borehole
record, one float32 miniSEED file per component and UTC day (as a station's archive holds them),
white noise plus a 1 s tone burst every 60 s, generated a day at a time. Filterbank: C = 16
channels log-spaced over 2–80 Hz, σ_t from 0.1 s down to 0.04 s, cell area 1 (106 lags at
most; the narrowest σ_t·fs as the hour bench's, so the same step, 6 samples). Figures:
- week: wall time of ``transform_continuous`` over the 21 day files, and time per hour of data;
- one hour at the same rate and filterbank (the first hour of the same generator): time per hour;
- the ratio week / hour of the two per-hour times (goal ≤ 1.2);
- peak memory of the week's interpreter (VmHWM, its own since exec; ru_maxrss would carry the
  parent's over fork and exec on Linux), data generation included; goal ≤ 1 GB.
"""
from __future__ import annotations

import argparse
import json
import math
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import scipy.fft as sfft
from scipy.signal import ShortTimeFFT
from scipy.signal.windows import gaussian

ROOT = Path(__file__).resolve().parents[1]

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
WEEK_FS = 200.0
WEEK_CHANNELS = 16
TARGET_WEEK_MEMORY_MB = 1024
TARGET_WEEK_PER_HOUR = 1.2


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


def week_filterbank() -> Filterbank:
    centers = center_grid((2.0, 80.0), WEEK_CHANNELS, "log")
    return Filterbank.constant_area(centers, np.geomspace(0.1, 0.04, WEEK_CHANNELS), 1.0, WEEK_FS)


def write_days(folder: Path, days: float, seed: int = 2) -> list[str]:
    """One float32 miniSEED file per component and UTC day (the last one shorter for a
    fractional ``days``), generated a day at a time so memory holds one day of one component."""
    import obspy

    per_day = int(round(86_400 * WEEK_FS))
    total = int(round(days * per_day))
    t = np.arange(int(WEEK_FS)) / WEEK_FS
    burst = (20.0 * np.hanning(t.size) * np.sin(2 * np.pi * 12.0 * t)).astype(np.float32)
    every = int(60 * WEEK_FS)
    rng = np.random.default_rng(seed)
    paths = []
    for day, first in enumerate(range(0, total, per_day)):
        for cha in COMPONENTS:
            n = min(per_day, total - first)
            x = rng.standard_normal(n, dtype=np.float32)
            for onset in range(-first % every, n - burst.size, every):
                x[onset:onset + burst.size] += burst
            tr = obspy.Trace(x, header={"network": "XX", "station": "WEK", "channel": cha, "sampling_rate": WEEK_FS,
                                        "starttime": obspy.UTCDateTime(2024, 1, 1) + first / WEEK_FS})
            path = folder / f"XX.WEK..{cha}.2024.{day + 1:03d}.mseed"
            tr.write(str(path), format="MSEED", encoding="FLOAT32")
            paths.append(str(path))
    return paths


def week_scale(days: float) -> dict:
    """Run the week-scale transform over ``days`` of generated day files (in this interpreter);
    its wall time, hours of data, steps and peak memory."""
    fb = week_filterbank()
    with tempfile.TemporaryDirectory(prefix="burstlens-bench-week-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        paths = write_days(folder, days)
        generated = time.perf_counter() - t0
        t0 = time.perf_counter()
        result = transform_continuous(paths, FilterbankDocument.of(fb), str(folder / "week.zarr"),
                                      reading={"sampling_rate_hz": WEEK_FS})
        seconds = time.perf_counter() - t0
    return {"seconds": seconds, "hours": days * 24, "files": len(paths), "generated_s": generated,
            "steps": sum(p.n_steps for p in result.parts), "step": result.step.samples,
            "peak_mb": peak_rss_mb()}


def peak_rss_mb() -> float:
    """This interpreter's peak resident set since it started (VmHWM of /proc/self/status, Linux;
    elsewhere ru_maxrss), MB."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) / 1024
    except OSError:
        pass
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def run_scale(days: float) -> dict:
    """:func:`week_scale` in a fresh interpreter (its own peak memory), as a dict."""
    done = subprocess.run([sys.executable, __file__, "--scale-days", repr(days)], capture_output=True, text=True,
                          check=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def print_week(days: float) -> None:
    hour, week = run_scale(1 / 24), run_scale(days)
    per_hour_hour, per_hour_week = hour["seconds"] / hour["hours"], week["seconds"] / week["hours"]
    ratio = per_hour_week / per_hour_hour
    print(f"week: {week['files']} day files ({len(COMPONENTS)} components x {days:g} days at {WEEK_FS:g} Hz, "
          f"C = {WEEK_CHANNELS}, step {week['step']} samples) in {week['seconds']:.1f} s "
          f"= {per_hour_week:.2f} s per hour of data; {week['steps']:,} steps written "
          f"(generated in {week['generated_s']:.0f} s)", flush=True)
    print(f"one hour at {WEEK_FS:g} Hz: {hour['seconds']:.2f} s; week / hour per-hour time = {ratio:.2f} "
          f"(goal <= {TARGET_WEEK_PER_HOUR}: {'met' if ratio <= TARGET_WEEK_PER_HOUR else 'NOT met'})", flush=True)
    print(f"week peak memory (VmHWM, generation included): {week['peak_mb']:.0f} MB "
          f"(goal <= {TARGET_WEEK_MEMORY_MB} MB: {'met' if week['peak_mb'] <= TARGET_WEEK_MEMORY_MB else 'NOT met'})",
          flush=True)


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


def gemm_seconds(fb: Filterbank, n_rows: int, dtype) -> tuple[float, int]:
    """Time of the bare (n_rows × 2(L+1)) @ (2(L+1) × C) product (best of 3 blocks, scaled)."""
    lags = int(np.max(lag_count(fb.conditional_freq_spread_hz, FS, 1 << 40, EPS)))
    rng = np.random.default_rng(1)
    a = rng.standard_normal((GEMM_ROWS, 2 * (lags + 1))).astype(dtype)
    b = rng.standard_normal((2 * (lags + 1), len(fb))).astype(dtype)
    a @ b
    best = math.inf
    for _ in range(3):
        t0 = time.perf_counter()
        a @ b
        best = min(best, time.perf_counter() - t0)
    return best * n_rows / GEMM_ROWS, lags


def print_hour(hours: float, jobs: int, precision: str) -> None:
    """The hour bench at 4 kHz (module docstring), printed."""
    fb = filterbank()
    document = FilterbankDocument.of(fb)
    step = time_step(fb, eps=EPS)
    with tempfile.TemporaryDirectory(prefix="burstlens-bench-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        paths, data = write_hours(folder, hours)
        n_total = sum(x.size for x in data)
        print(f"data: {len(paths)} components x {hours:g} h at {FS:g} Hz = {n_total:,} samples "
              f"(written in {time.perf_counter() - t0:.1f} s); filterbank C = {len(fb)}, "
              f"sigma_t {fb.time_spread_s.max() * 1e3:g}..{fb.time_spread_s.min() * 1e3:g} ms, "
              f"step {step.samples} samples ({step.seconds * 1e3:g} ms)", flush=True)
        t0 = time.perf_counter()
        result = transform_continuous(paths, document, str(folder / "out.zarr"), reading={"sampling_rate_hz": FS},
                                      jobs=jobs, precision=precision)
        continuous = time.perf_counter() - t0
        peak_self = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
        peak_children = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024
        steps = sum(p.n_steps for p in result.parts)
        print(f"continuous: {continuous:.1f} s ({jobs} process(es), {precision} precision), "
              f"{steps:,} steps x {len(fb)} channels "
              f"written; throughput {n_total / continuous / 1e6:.2f} M samples/s "
              f"({n_total / continuous / FS:.0f}x real time for one component)", flush=True)
        print(f"peak memory (ru_maxrss): {peak_self:.0f} MB this process, {peak_children:.0f} MB largest child",
              flush=True)
        stft, frames = stft_seconds(data, fb, step.samples)
        ratio = continuous / stft
        print(f"ShortTimeFFT: {stft:.1f} s for {frames:,} frames; continuous / ShortTimeFFT = {ratio:.2f} "
              f"(goal <= {TARGET_STFT_RATIO}: {'met' if ratio <= TARGET_STFT_RATIO else 'NOT met'})", flush=True)
        gemm, lags = gemm_seconds(fb, n_total, np.float32 if precision == "single" else np.float64)
        print(f"bare product ({n_total:,} x {2 * (lags + 1)}) @ ({2 * (lags + 1)} x {len(fb)}): {gemm:.1f} s; "
              f"continuous / product = {continuous / gemm:.2f}", flush=True)


def main(argv: list[str]) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--hours", type=float, default=0.5, help="hours of data per component (default 0.5; 0: skip)")
    parser.add_argument("--jobs", type=int, default=1, help="processes of the continuous transform (default 1)")
    parser.add_argument("--precision", choices=("double", "single"), default="double",
                        help="the continuous transform's precision (default double)")
    parser.add_argument("--week-days", type=float, default=7.0, help="days of the week-scale run (default 7; 0: skip)")
    parser.add_argument("--scale-days", type=float, help=argparse.SUPPRESS)  # one week-scale run, JSON out
    args = parser.parse_args(argv)
    if args.scale_days is not None:
        print(json.dumps(week_scale(args.scale_days)))
        return 0
    if args.hours < 0:
        parser.error(f"--hours {args.hours}: must be 0 (skip) or more")
    if args.week_days < 0:
        parser.error(f"--week-days {args.week_days}: must be 0 or more")
    if args.hours > 0:
        print_hour(args.hours, args.jobs, args.precision)
    if args.week_days > 0:
        print_week(args.week_days)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))
