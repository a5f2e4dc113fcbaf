"""Benchmark of search.read_corpus against the issue-3 target: one hour of 3-component 4 kHz
miniSEED read in under 30 s and under 2 GB.

Set-up (generated here, into a temporary folder): one station, channels GPZ/GPN/GPE, 3600 s at
4 kHz (14.4 M samples per channel), STEIM2 int32 counts: red-ish background noise (rms ≈ 20
counts) with a decaying 300–900 Hz burst every ~10 s (360 per channel). Reading uses the defaults
(bursts windowing: derived dominant frequency, trigger band, STA/LTA, window length).

Measured in a fresh interpreter so that the figures are the reader's alone: wall time of
``read_corpus`` and the child's peak resident memory (``ru_maxrss``, which includes the
interpreter and the imported libraries).
"""
from __future__ import annotations

import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
FS = 4000.0
SECONDS = 3600
TARGET_S = 30.0
TARGET_MB = 2048.0

CHILD = """
import json, sys, time
from burstlens.search.corpus import read_corpus
t0 = time.perf_counter()
corpus = read_corpus({path!r})
seconds = time.perf_counter() - t0
print(json.dumps({{"seconds": seconds, "windows": corpus.n_windows, "window_samples": corpus.window_samples,
                   "triggers": corpus.defaults["triggers"], "traces": len(corpus.traces)}}))
"""


def make_hour(path: Path, seed: int = 0) -> int:
    """Write the test hour; returns its size in bytes."""
    from obspy import Stream, Trace, UTCDateTime

    rng = np.random.default_rng(seed)
    n = int(SECONDS * FS)
    stream = Stream()
    k = np.arange(int(0.15 * FS))
    for channel in ("GPZ", "GPN", "GPE"):
        x = rng.standard_normal(n).astype(np.float32) * 20.0
        x[1:] += 0.6 * x[:-1]  # a little colour
        for onset in np.arange(5.0, SECONDS - 5.0, 10.0) + rng.uniform(-2, 2, SECONDS // 10 - 1):
            f = rng.uniform(300, 900)
            i = int(onset * FS)
            x[i: i + k.size] += rng.uniform(100, 3000) * np.sin(2 * np.pi * f * k / FS) * np.exp(-k / (0.02 * FS))
        stream.append(Trace(np.rint(x).astype(np.int32), header={
            "network": "XB", "station": "H1", "location": "00", "channel": channel,
            "sampling_rate": FS, "starttime": UTCDateTime(2026, 3, 1)}))
    stream.write(str(path), format="MSEED", encoding="STEIM2", reclen=4096)
    return path.stat().st_size


def main() -> int:
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "XB.H1.00.hour.mseed"
        t0 = time.perf_counter()
        size = make_hour(path)
        print(f"generated 1 h × 3 channels × 4 kHz STEIM2: {size / 1e6:.1f} MB in {time.perf_counter() - t0:.1f} s")
        done = subprocess.run([sys.executable, "-c", CHILD.format(path=str(path))],
                              capture_output=True, text=True)
        if done.returncode:
            print(done.stderr)
            return 1
        peak_mb = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss / 1024.0  # kB on Linux
        result = json.loads(done.stdout.strip().splitlines()[-1])
    print(f"read_corpus: {result['seconds']:.1f} s (target < {TARGET_S:g} s), "
          f"peak memory {peak_mb:.0f} MB (target < {TARGET_MB:g} MB)")
    print(f"  {result['traces']} traces, {result['triggers']} triggers, "
          f"{result['windows']} windows of {result['window_samples']} samples")
    ok = result["seconds"] < TARGET_S and peak_mb < TARGET_MB
    print("targets met" if ok else "TARGETS MISSED")
    return 0


if __name__ == "__main__":
    sys.exit(main())
