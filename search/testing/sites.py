"""A generated site with known answers: Gaussian bursts under strong steady lines.

Bursts of known duration σ0 (``SIGMA0``) at ``F0`` Hz, steady lines (``LINES``: Hz, amplitude) that
carry at least 90 % of the energy, the same in every window with random phases, and a red
background. The matched spectrogram window of a Gaussian burst has time spread σ0 (closed form
from the determinant of the smoothed Gaussian; L. Cohen, "Time-Frequency Analysis", 1995). Used by
tests/search/test_site_noise.py and bench/bench_scorecard.py; made up for them, never site data.
"""
from __future__ import annotations

import numpy as np
from scipy.signal import lfilter

from burstlens.search.corpus import Corpus

__all__ = ["FS", "N", "SIGMA0", "F0", "LINES", "SETTINGS", "site", "corpus"]

FS, N, SIGMA0, F0 = 2000.0, 1024, 0.0061, 300.0
LINES = ((50.0, 1.0), (150.0, 0.5), (250.0, 0.35), (420.0, 0.4))
SETTINGS = dict(channels=24, band_hz=[200.0, 400.0], spacing="linear", evaluations=10,
                bootstrap=0, seed=0)


def site(with_lines: bool, m=48, k=32, seed=0):
    """(burst windows (m, N), noise windows (k, N), the lines' share of the bursts' energy)."""
    rng = np.random.default_rng(seed)
    t = np.arange(N) / FS

    def background(n):
        w = lfilter([1.0], [1.0, -0.9], rng.standard_normal((n, N + 256)), axis=1)[:, 256:]
        return 0.02 * w / w.std()

    def steady(n):
        if not with_lines:
            return np.zeros((n, N))
        return sum(a * np.cos(2 * np.pi * f * t[None] + rng.uniform(0, 2 * np.pi, (n, 1)))
                   for f, a in LINES)

    u = t[None] - rng.uniform(0.35, 0.65, (m, 1)) * N / FS
    bursts = np.exp(-u ** 2 / (4 * SIGMA0 ** 2)) * np.cos(2 * np.pi * F0 * u
                                                         + rng.uniform(0, 2 * np.pi, (m, 1)))
    hum = steady(m)
    windows = bursts + hum + background(m)
    return windows, steady(k) + background(k), float(np.sum(hum ** 2) / np.sum(windows ** 2))


def corpus(windows, noise):
    meta = [{"file": "generated", "trace_id": "XX.GEN..HHZ", "start": None,
             "offset_s": 2.0 * N / FS * i} for i in range(len(windows))]
    return Corpus(windows, FS, meta, [], [], {}, "generated",
                  noise_windows=noise if noise is not None else np.zeros((0, N)))
