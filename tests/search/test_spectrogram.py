"""search.spectrogram: the plain Gaussian spectrogram baseline on its own FFT grid.

Source of the identity: a channel of cell area 1 and no chirp is the Gaussian-window
spectrogram (L. Cohen, "Time-Frequency Analysis", 1995: the spectrogram is the WVD smoothed by
the window's WVD; docs/design.md §3), computed here with the reference library's
scipy.signal.ShortTimeFFT. Rényi entropy on the plane: Baraniuk, Flandrin, Janssen & Michel,
IEEE Trans. Inf. Theory 47(4), 2001.
"""
import math

import numpy as np
import pytest

from burstlens.search import transform
from burstlens.search.criteria import Criterion, cell_sizes
from burstlens.search.filterbank import Filterbank, center_grid
from burstlens.search.spectrogram import fft_size, hop, spectrogram_scores
from burstlens.search.tfd import prepare

FS, N = 4000.0, 1024


def bursts(m, seed):
    rng = np.random.default_rng(seed)
    t = np.arange(N) / FS
    out = []
    for _ in range(m):
        t0, f0, s0 = rng.uniform(0.05, 0.2), rng.uniform(200, 1400), rng.uniform(0.002, 0.01)
        out.append(np.exp(-(t - t0) ** 2 / (4 * s0**2)) * np.cos(2 * np.pi * f0 * (t - t0))
                   + 0.02 * rng.standard_normal(N))
    return np.array(out)


@pytest.mark.parametrize("sigma", [0.002, 0.005, 0.02, 0.0427])
def test_fft_grid_scores_equal_the_filterbank_on_the_same_bins(sigma):
    """Scored on its FFT grid (bins ≤ 1/(4πσ_t), time steps ≤ σ_t/8, midpoint rule), the plain
    spectrogram gives the H3 of search.tfd's a = 1 channels at the same bin centres and
    hop 1 within 0.01 bit (Cohen 1995 identity; ShortTimeFFT as the reference STFT)."""
    windows = bursts(3, seed=1)
    crit = Criterion()
    plain = spectrogram_scores(prepare(windows).analytic, FS, sigma, [40.0, 1800.0], crit)
    bin_hz = FS / fft_size(sigma, FS, N)[1]
    centers = np.arange(math.ceil(40.0 / bin_hz), math.floor(1800.0 / bin_hz) + 1) * bin_hz
    images = transform(windows, Filterbank.constant_window(centers, sigma, FS), dtype=np.float64)
    ref = crit.score(images, cell_sizes(centers, FS))
    assert np.allclose(plain, ref, atol=0.01, rtol=0)


def test_the_fft_grid_samples_the_window():
    """Bins no wider than the window's frequency spread 1/(4πσ_t), FFT at least as long as the
    window, which never reaches past the data from any centre; time step ≤ σ_t/8 (common
    practice: sample a density finer than its spread)."""
    for sigma in (0.0005, 0.004, 0.04):
        length, nfft = fft_size(sigma, FS, N)
        assert FS / nfft <= 1 / (4 * math.pi * sigma) and nfft >= length and length <= 2 * N - 1
        assert hop(sigma, FS) / FS <= sigma / 8 or hop(sigma, FS) == 1


def test_fft_grid_and_a_log_filterbank_grid_give_the_same_bits():
    """Bits on the plane do not depend on the grid: a 1 ms window, sampled by the default 96
    log channels in the burst band, scores the same on its FFT grid within 0.05 bit."""
    windows = bursts(4, seed=2)
    sigma = 0.001
    crit = Criterion()
    plain = spectrogram_scores(prepare(windows).analytic, FS, sigma, [40.0, 1800.0], crit)
    centers = center_grid([40.0, 1800.0], 96, "log")
    images = transform(windows, Filterbank.constant_window(centers, sigma, FS), dtype=np.float64)
    assert np.allclose(plain, crit.score(images, cell_sizes(centers, FS)), atol=0.05, rtol=0)
