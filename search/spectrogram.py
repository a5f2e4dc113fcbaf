"""The plain Gaussian spectrogram on its own FFT grid: the baseline a person would pick by hand.

A filterbank's channel grid limits the kernels it can hold: a window longer than
1/(4π Δf_c) falls between the channel centres (``search.fit.space.SearchSpace.grid_cap_s``). The
plain spectrogram a person compares against has no such limit: its FFT grid is as fine as its
window needs. So the gain is measured against the spectrogram scored on an FFT grid whose bin
spacing is at most its window's frequency spread 1/(4π σ_t), over the search band. Scores are
bits on the t–f plane (cell size Δt·Δf), so they compare with the filterbank's own.

The image is ``|X_z(n, f)|² / (2‖h‖²)`` with ``X_z`` the hop-1, two-sided
``scipy.signal.ShortTimeFFT`` of the analytic signal z and ``h`` a Gaussian window of standard
deviation ``σ_t·fs·√2`` samples (|h|² has time std σ_t). That is a channel of cell area 1 and
no chirp (docs/design.md §3 identity; spectrogram as the WVD smoothed by the window's WVD: L. Cohen,
"Time-Frequency Analysis", 1995), without the alias term at f + fs/2, which the analytic
signal makes negligible inside the band.
"""
from __future__ import annotations

import math

import numpy as np


def fft_size(time_spread_s: float, sampling_rate_hz: float, n_samples: int,
             eps: float = 1e-6) -> tuple[int, int]:
    """(window length in samples, FFT length) for a Gaussian spectrogram of time spread σ_t (s)
    of windows of ``n_samples`` samples.

    The window reaches ε of its peak at its ends (±√(2 ln 1/ε) standard deviations), but never
    reaches past the data from any centre (at most 2N − 1 samples: the rest would only multiply
    the zero padding); the FFT has bins no wider than the window's frequency spread 1/(4π σ_t)
    and is at least as long as the window (``scipy.fft.next_fast_len``).
    """
    from scipy.fft import next_fast_len

    std = time_spread_s * sampling_rate_hz * math.sqrt(2.0)
    half = max(1, math.ceil(math.sqrt(2.0 * math.log(1.0 / eps)) * std))
    length = min(2 * half + 1, 2 * int(n_samples) - 1)
    bins = math.ceil(4.0 * math.pi * time_spread_s * sampling_rate_hz)
    return length, next_fast_len(max(length, bins))


def hop(time_spread_s: float, sampling_rate_hz: float) -> int:
    """Time step (samples) of the scoring grid: at most an eighth of the window's time spread
    σ_t, so the grid samples the image in time (and the cut at the window's ends) within a few
    thousandths of a bit of hop 1 (measured on the demo corpus)."""
    return max(1, int(time_spread_s * sampling_rate_hz / 8.0))


def spectrogram_images(analytic, sampling_rate_hz: float, time_spread_s: float, band_hz,
                       eps: float = 1e-6):
    """Yield ``(image (K, T) float64, cell_size (K, 1) s·Hz)`` for each analytic window.

    ``analytic`` (M, N) complex: analytic signals of the windows; ``band_hz`` [lo, hi]: the
    rows kept are the FFT bins inside the band. Time steps of ``hop_samples`` (:func:`hop`,
    T slices centred on samples hop/2, 3·hop/2, …): the image never varies faster in
    time than its window's spread, so a grid that samples it gives the same bits as hop 1. One
    window at a time: the image of a long window on a fine grid is large.
    """
    from scipy.signal import ShortTimeFFT
    from scipy.signal.windows import gaussian

    fs = float(sampling_rate_hz)
    z = np.atleast_2d(analytic)
    n = z.shape[1]
    length, nfft = fft_size(time_spread_s, fs, n, eps)
    window = gaussian(length, std=time_spread_s * fs * math.sqrt(2.0), sym=True)
    step = hop(time_spread_s, fs)
    stft = ShortTimeFFT(window, hop=step, fs=fs, mfft=nfft, fft_mode="twosided")
    freqs = np.arange(nfft) * fs / nfft
    rows = np.flatnonzero((freqs >= band_hz[0]) & (freqs <= band_hz[1]))
    if rows.size == 0:
        raise ValueError(f"band_hz={list(band_hz)!r} holds no FFT bin of a {nfft}-point FFT at "
                         f"{fs:g} Hz")
    cell = np.full((rows.size, 1), (step / fs) * (fs / nfft))
    norm = 2.0 * float(np.sum(window ** 2))
    for row in z:
        # midpoint rule: slices centred on step/2, 3·step/2, … so the image's cut at the
        # window's ends costs O(Δt²), not O(Δt)
        x = stft.stft(row, p0=0, p1=-(-(n - step // 2) // step),
                      k_offset=step // 2)[rows[0]:rows[-1] + 1]
        yield (x.real ** 2 + x.imag ** 2) / norm, cell


def spectrogram_scores(analytic, sampling_rate_hz: float, time_spread_s: float, band_hz,
                       criterion, eps: float = 1e-6) -> np.ndarray:
    """(M,) per-window scores of the plain spectrogram by ``criterion`` (search.criteria
    .Criterion), each image scored as a density on the plane (its FFT cells)."""
    return np.array([criterion.score(image[None], cell)[0]
                     for image, cell in spectrogram_images(analytic, sampling_rate_hz,
                                                           time_spread_s, band_hz, eps)],
                    dtype=np.float64)


def grid_description(time_spread_s: float, sampling_rate_hz: float, n_samples: int,
                     eps: float = 1e-6) -> dict:
    """The FFT grid a spectrogram of time spread σ_t is scored on, for the record."""
    length, nfft = fft_size(time_spread_s, sampling_rate_hz, n_samples, eps)
    return {"window_samples": length, "fft_points": nfft,
            "bin_hz": float(sampling_rate_hz) / nfft,
            "hop_samples": hop(time_spread_s, sampling_rate_hz),
            "grid": "FFT bins inside band_hz, time steps of hop_samples"}


def spectrogram_representation(time_spread_s: float, sampling_rate_hz: float, band_hz,
                               n_samples: int, eps: float = 1e-6, name: str = "spectrogram"):
    """The plain Gaussian spectrogram of time spread σ_t as a scorecard
    :class:`~search.representation.Representation`: the images and grid of
    :func:`spectrogram_images` (FFT bins inside ``band_hz``, time steps of :func:`hop` samples,
    column k centred on sample hop/2 + k·hop) for windows of ``n_samples`` samples."""
    from burstlens.search.representation import Representation
    from burstlens.search.wvd import analytic_signal

    fs = float(sampling_rate_hz)
    step = hop(time_spread_s, fs)
    length, nfft = fft_size(time_spread_s, fs, n_samples, eps)
    rows = np.flatnonzero((np.arange(nfft) * fs / nfft >= band_hz[0])
                          & (np.arange(nfft) * fs / nfft <= band_hz[1]))

    def images(windows):
        z = analytic_signal(np.atleast_2d(np.asarray(windows, dtype=np.float64)))
        return np.stack([image for image, _ in spectrogram_images(z, fs, time_spread_s,
                                                                  band_hz, eps)])

    return Representation(
        name=name, images=images, time_step_s=step / fs,
        cell_size=np.full((rows.size, 1), (step / fs) * (fs / nfft)),
        first_time_s=(step // 2) / fs,
        description={"kind": "Gaussian spectrogram", "time_spread_s": float(time_spread_s),
                     **grid_description(time_spread_s, fs, n_samples, eps)})
