"""Benchmark of ``burstlens transform`` on a site-scale input (issue 14): 10 000 windows of 1024
samples through a 96-channel filterbank, peak memory ≤ 1 GB although the image written is
M × C × N float32 (3.9 GB at the default size).

Set-up (generated here, into a temporary folder, deleted afterwards): one trace at 4 kHz in an
``.npz`` (``data``, ``sampling_rate_hz``) long enough for M sliding windows at the reader's
default hop (half a window): red-ish noise with a decaying 300–900 Hz burst every ~0.5 s (the
content does not change the transform's cost); a filterbank JSON from ``Filterbank.to_json``
with ``window_samples`` 1024: 96 constant-Q centres (4 cycles) from 40 to 1600 Hz, every other
channel chirped at +2000 Hz/s, so both ways of the transform run as in a tuned bank.

Measured: ``burstlens transform --windowing sliding --max-windows M --quiet`` as a child
process, its wall time (reading, transforming, writing) and its peak resident memory
(``ru_maxrss`` of the children, interpreter and libraries included). The output's header is
read back to check its shape.

Usage: ``python bench/bench_transform_out.py [--windows M]`` (default 10 000, the issue's size).
"""
from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
import zipfile
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]

FS = 4000.0
SAMPLES = 1024
CHANNELS = 96
TARGET_MB = 1024.0


def make_input(folder: Path, n_windows: int, seed: int = 0) -> tuple[Path, Path]:
    """Write the trace and the filterbank JSON; returns their paths."""
    from burstlens.search.filterbank import Filterbank, center_grid

    hop = SAMPLES // 2
    guard = int(FS)  # the reader's taper guard at each end is at most 1 s
    n = 2 * guard + (n_windows + 2) * hop + SAMPLES
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(n) * 20.0
    x[1:] += 0.6 * x[:-1]  # a little colour
    k = np.arange(int(0.15 * FS))
    for onset in np.arange(guard, n - guard - k.size, int(0.5 * FS)):
        f = rng.uniform(300, 900)
        x[onset: onset + k.size] += rng.uniform(100, 3000) * np.sin(2 * np.pi * f * k / FS) * np.exp(
            -k / (0.02 * FS))
    trace = folder / "site.npz"
    np.savez(trace, data=x, sampling_rate_hz=np.float64(FS))
    centres = center_grid((40.0, 1600.0), CHANNELS)
    chirps = np.where(np.arange(CHANNELS) % 2 == 1, 2000.0, 0.0)
    fb = Filterbank.constant_q(centres, 4.0, FS, chirp_hz_per_s=chirps)
    fb_path = folder / "filterbank.json"
    fb_path.write_text(json.dumps(fb.to_json(window_samples=SAMPLES)), encoding="utf-8")
    return trace, fb_path


def npy_shape(npz: Path, member: str) -> tuple[int, ...]:
    """The shape in the .npy header of one member, without reading its data."""
    with zipfile.ZipFile(npz) as archive, archive.open(member + ".npy") as fh:
        version = np.lib.format.read_magic(fh)
        read = (np.lib.format.read_array_header_1_0 if version == (1, 0)
                else np.lib.format.read_array_header_2_0)
        shape, _, _ = read(fh)
    return shape


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--windows", type=int, default=10_000, help="windows M (default 10000)")
    args = parser.parse_args()
    sys.stdout.reconfigure(line_buffering=True)
    m = args.windows
    with tempfile.TemporaryDirectory(prefix="bench-transform-out-") as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        trace, fb_path = make_input(folder, m)
        print(f"generated {os.path.getsize(trace) / 1e6:.0f} MB trace at {FS:g} Hz and a "
              f"{CHANNELS}-channel filterbank in {time.perf_counter() - t0:.1f} s")
        out = folder / "out.npz"
        command = [sys.executable, "-m", "burstlens.service.cli", "transform",
                   "--filterbank", str(fb_path), str(trace), "--windowing", "sliding",
                   "--max-windows", str(m), "--out", str(out), "--quiet"]
        load = os.getloadavg()[0]
        t0 = time.perf_counter()
        done = subprocess.run(command, cwd=ROOT, capture_output=True, text=True)
        wall = time.perf_counter() - t0
        if done.returncode:
            print(done.stdout + done.stderr)
            return 1
        usage = resource.getrusage(resource.RUSAGE_CHILDREN)
        peak_mb = usage.ru_maxrss / 1024.0  # kB on Linux
        shape = npy_shape(out, "representation")
        image_mb = 4 * int(np.prod(shape)) / 2**20
        file_mb = os.path.getsize(out) / 2**20
    if shape != (m, CHANNELS, SAMPLES):
        print(f"unexpected output shape {shape}, wanted {(m, CHANNELS, SAMPLES)}")
        return 1
    print(f"burstlens transform: {m} windows x {CHANNELS} channels x {SAMPLES} samples "
          f"({image_mb:.0f} MiB of images, NPZ {file_mb:.0f} MiB)")
    print(f"  wall {wall:.1f} s ({1e3 * wall / m:.1f} ms per window; cpu "
          f"{usage.ru_utime + usage.ru_stime:.1f} s, load {load:.1f} before)")
    print(f"  peak memory {peak_mb:.0f} MB (target <= {TARGET_MB:g} MB); RATIO peak / target "
          f"{peak_mb / TARGET_MB:.2f}, peak / image {peak_mb / image_mb:.3f}")
    print("target met" if peak_mb <= TARGET_MB else "TARGET MISSED")
    return 0


if __name__ == "__main__":
    sys.exit(main())
