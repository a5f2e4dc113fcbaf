"""Analytic signal, instantaneous autocorrelation, lag counts and the discrete pseudo-WVD.

Conventions (docs/design.md §3): a real window x[n], n = 0..N−1, sampled at fs; its analytic signal
z = scipy.signal.hilbert(x). The instantaneous autocorrelation is r[n, m] = z[n+m]·z*[n−m],
zero when n±m falls outside the window, at lag τ_m = 2m/fs; since r[n, −m] = conj r[n, m] only
m ≥ 0 is stored. The discrete pseudo-WVD is

    W[n, k] = Σ_{|m| ≤ L} r[n, m] · exp(−j2π·(2m)·k / (2·Nf)),   f_k = k·fs/(2·Nf), k = 0..Nf−1,

periodic in frequency with period fs/2, which is why the analytic signal is needed
(T. A. C. M. Claasen, W. F. G. Mecklenbräuker, "The Wigner distribution — a tool for
time-frequency signal analysis", Philips J. Res. 35, 1980).
"""
from __future__ import annotations

import math

import numpy as np
from numpy.lib.stride_tricks import as_strided


def truncation_width(eps: float) -> float:
    """k = √(2 ln(1/ε)): a Gaussian falls to ε of its peak at k standard deviations."""
    eps = float(eps)
    if not 0.0 < eps < 1.0:
        raise ValueError(f"eps={eps!r} must lie strictly between 0 and 1")
    return math.sqrt(2.0 * math.log(1.0 / eps))


def lag_count(conditional_freq_spread_hz, sampling_rate_hz, window_samples, eps=1e-6):
    """Largest lag index L_c kept for a channel (docs/design.md §3), int or int array like the input:

        L_c = min(⌊(N−1)/2⌋, ⌈fs·√(2 ln(1/ε)) / (4π·σ_f√(1−ρ²))⌉).

    Beyond it the lag weight w_c(τ) = exp(−2π² σ_f²(1−ρ²) τ²), τ = 2m/fs, is below ε; the first
    bound is where r[n, m] is zero for every n of an N-sample window.
    """
    spread = np.asarray(conditional_freq_spread_hz, dtype=np.float64)
    lags = np.ceil(sampling_rate_hz * truncation_width(eps) / (4.0 * np.pi * spread))
    lags = np.minimum((int(window_samples) - 1) // 2, lags).astype(np.int64)
    return int(lags) if lags.ndim == 0 else lags


def analytic_signal(windows) -> np.ndarray:
    """z = scipy.signal.hilbert(x) along the last axis; real finite input, complex128 output."""
    x = np.asarray(windows)
    if x.ndim == 0 or x.shape[-1] < 2:
        raise ValueError(f"windows: need at least 2 samples per window, got shape {x.shape}")
    if np.iscomplexobj(x):
        raise ValueError("windows: samples must be real (the analytic signal is formed here)")
    x = x.astype(np.float64, copy=False)
    if not np.all(np.isfinite(x)):
        bad = np.argwhere(~np.isfinite(x))[0]
        raise ValueError(f"windows: sample {tuple(int(i) for i in bad)} is not finite")
    from scipy.signal import hilbert  # here: scipy.signal is slow to import, `import search` not

    return hilbert(x, axis=-1)


def autocorrelation(z, max_lag: int, *, lag_start: int = 0, rows=None, layout="time", out=None):
    """Instantaneous autocorrelation r[n, m] = z[n+m]·z*[n−m] (zero outside the window).

    z: analytic signal, (N,) or (M, N); with ``layout='time-lag-window'`` z is (N, M) (windows
    innermost). Lags m = lag_start..max_lag, rows n in ``rows`` = (n0, n1) (default all).
    Output shape by ``layout``: 'time' (..., n1−n0, lags), 'lag' (..., lags, n1−n0),
    'time-lag-window' (n1−n0, lags, M). ``out``, if given, receives the result (complex128, that
    shape). Built from two strided views of a zero-padded copy, no Python loop.
    """
    z = np.asarray(z, dtype=np.complex128)
    windows_last = layout == "time-lag-window"
    if layout not in ("time", "lag", "time-lag-window"):
        raise ValueError(f"layout={layout!r} must be 'time', 'lag' or 'time-lag-window'")
    single = z.ndim == 1
    z2 = z[:, None] if single and windows_last else z[None] if single else z
    if z2.ndim != 2:
        raise ValueError(f"z must be 1-D or 2-D, got shape {z.shape}")
    n_samples = z2.shape[0] if windows_last else z2.shape[1]
    n0, n1 = (0, n_samples) if rows is None else rows
    if not (0 <= n0 <= n1 <= n_samples and 0 <= lag_start <= max_lag):
        raise ValueError(f"bad rows {rows!r} or lags {lag_start}..{max_lag} for N={n_samples}")
    n_lags, n_rows, pad = max_lag - lag_start + 1, n1 - n0, max_lag
    if windows_last:
        padded = np.zeros((n_samples + 2 * pad, z2.shape[1]), dtype=np.complex128)
        padded[pad:pad + n_samples] = z2
        conj = np.conj(padded)
        step, other = padded.strides  # time step, window step
        forward_base = padded[pad + n0 + lag_start:]
        backward_base = conj[pad + n0 - lag_start:]
        shape = (n_rows, n_lags, z2.shape[1])
        forward_strides, backward_strides = (step, step, other), (step, -step, other)
    else:
        padded = np.zeros((z2.shape[0], n_samples + 2 * pad), dtype=np.complex128)
        padded[:, pad:pad + n_samples] = z2
        conj = np.conj(padded)
        other, step = padded.strides  # window step, time step
        forward_base = padded[:, pad + n0 + lag_start:]
        backward_base = conj[:, pad + n0 - lag_start:]
        if layout == "time":
            shape = (z2.shape[0], n_rows, n_lags)
            forward_strides, backward_strides = (other, step, step), (other, step, -step)
        else:
            shape = (z2.shape[0], n_lags, n_rows)
            forward_strides, backward_strides = (other, step, step), (other, -step, step)
    # forward[..n, m..] = z[n0 + n + lag_start + m], backward[..n, m..] = z*[n0 + n − lag_start − m]
    forward = as_strided(forward_base, shape, forward_strides, writeable=False)
    backward = as_strided(backward_base, shape, backward_strides, writeable=False)
    if out is None:
        out = np.empty(shape, dtype=np.complex128)
    np.multiply(forward, backward, out=out.reshape(shape))
    if single:
        return out[:, :, 0] if windows_last else out[0]
    return out


def wvd_frequencies(n_freqs: int, sampling_rate_hz: float) -> np.ndarray:
    """f_k = k·fs/(2·Nf), k = 0..Nf−1 (Hz): the frequency grid of :func:`pseudo_wvd`."""
    return np.arange(int(n_freqs)) * (float(sampling_rate_hz) / (2.0 * int(n_freqs)))


def pseudo_wvd(z, n_freqs: int, max_lag: int | None = None) -> np.ndarray:
    """Discrete pseudo-WVD W[n, k] of one analytic signal z (N,), shape (N, Nf), real.

    Lags |m| ≤ L (default ⌊(N−1)/2⌋, every lag the window holds); needs Nf ≥ 2L+1 so that the
    lags do not alias. Evaluated with one FFT over the lag axis per time sample.
    """
    z = np.asarray(z, dtype=np.complex128)
    if z.ndim != 1:
        raise ValueError(f"z must be 1-D, got shape {z.shape}")
    n_samples = z.shape[0]
    lags = (n_samples - 1) // 2 if max_lag is None else int(max_lag)
    if n_freqs < 2 * lags + 1:
        raise ValueError(f"n_freqs={n_freqs} must be ≥ 2·max_lag+1 = {2 * lags + 1}")
    r = autocorrelation(z, lags)  # (N, L+1)
    kernel = np.zeros((n_samples, n_freqs), dtype=np.complex128)
    kernel[:, : lags + 1] = r
    if lags:
        kernel[:, n_freqs - lags:] = np.conj(r[:, :0:-1])  # r[n, −m] = conj r[n, m]
    return np.fft.fft(kernel, axis=1).real  # Hermitian in m, so the imaginary part is round-off
