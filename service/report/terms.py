"""A channel's window in the user's own terms: the Gaussian window's std in samples as
``scipy.signal.windows.gaussian`` takes it, its full width at half maximum, the nearest Hann
length, NFFT and hop, and a copyable ``scipy.signal.ShortTimeFFT`` line.

One window spread is used on the whole page: the standard deviation s of the Gaussian window
h(u) = exp(−u²/2s²) that multiplies the signal — the ``std`` of ``scipy.signal.windows.gaussian``.
The filterbank file stores the kernel's time spread σ_t = s/√2, the time std of |h|² (docs/design.md §3),
so s = √2·σ_t. The FWHM given beside it is of the same h: 2√(2 ln 2)·s ≈ 2.355·s (the full width
at half maximum of a Gaussian of std s; common practice). Units: s, Hz, samples.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

FWHM_PER_STD = 2.0 * math.sqrt(2.0 * math.log(2.0))  # FWHM of exp(−u²/2s²) over its std s


@dataclass(frozen=True)
class WindowTerms:
    """One Gaussian window in the user's terms.

    ``std_s``: s = √2·σ_t (s); ``fwhm_s``: FWHM of the same window (s); ``std_samples``: s·fs,
    the ``std`` argument of ``scipy.signal.windows.gaussian``; ``length``: its length in samples
    and ``nfft`` the FFT length, as burstlens' own spectrogram uses them
    (``search.spectrogram.fft_size``: the window reaches 10⁻⁶ of its peak at its ends, bins no
    wider than its frequency spread); ``hop`` (samples): the time step burstlens scores that
    spectrogram on (``search.spectrogram.hop``); ``hann``: the length L of the periodic Hann
    window ``scipy.signal.windows.hann(L, sym=False)`` with the nearest FWHM (L/2 samples).
    """

    std_s: float
    fwhm_s: float
    std_samples: float
    length: int
    nfft: int
    hop: int
    hann: int


def window_terms(time_spread_s: float, sampling_rate_hz: float, window_samples: int) -> WindowTerms:
    """:class:`WindowTerms` of the Gaussian spectrogram window of kernel time spread σ_t
    (``time_spread_s``, s) at ``sampling_rate_hz`` (Hz), for burst windows of
    ``window_samples`` samples. ValueError naming the argument for a non-positive value."""
    from burstlens.search.spectrogram import fft_size, hop

    for name, value in (("time_spread_s", time_spread_s), ("sampling_rate_hz", sampling_rate_hz),
                        ("window_samples", window_samples)):
        if not (isinstance(value, (int, float)) and math.isfinite(value) and value > 0):
            raise ValueError(f"{name}: expected a positive number, got {value!r}")
    fs = float(sampling_rate_hz)
    std = math.sqrt(2.0) * float(time_spread_s)
    fwhm = FWHM_PER_STD * std
    length, nfft = fft_size(float(time_spread_s), fs, int(window_samples))
    # a periodic Hann window of L samples is above half its peak over L/2 samples
    hann = max(3, round(2.0 * fwhm * fs))
    return WindowTerms(std, fwhm, std * fs, length, nfft, hop(float(time_spread_s), fs), hann)


def stft_line(time_spread_s: float, sampling_rate_hz: float, window_samples: int) -> str:
    """One copyable Python line that builds the spectrogram of time spread σ_t with
    ``scipy.signal.ShortTimeFFT`` (window, hop and FFT length as :func:`window_terms`); its
    ``spectrogram(x)`` is the power spectrogram of a real trace ``x`` at that rate."""
    terms = window_terms(time_spread_s, sampling_rate_hz, window_samples)
    return ("import scipy.signal; SFT = scipy.signal.ShortTimeFFT(scipy.signal.windows.gaussian("
            f"{terms.length}, std={terms.std_samples!r}), hop={terms.hop}, "
            f"fs={float(sampling_rate_hz):g}, mfft={terms.nfft})")
