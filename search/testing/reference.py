"""Naive references for the transform tests (test-only, deliberately slow and literal).

The WVD is the explicit double sum of docs/design.md §3 over every lag the window holds, and the channel
output is the explicit 2-D convolution of that full grid with the sampled kernel
G_c(u, ν) = g_t(u)·N(ν; βu, σ_f²(1−ρ²)), u = t′ − t (the kernel lies along an arrival sweeping
at β Hz/s) — nothing here shares code with search.tfd.
"""
from __future__ import annotations

import math

import numpy as np


def reference_wvd(z: np.ndarray, n_freqs: int) -> np.ndarray:
    """W[n, k] = Σ_{m=−L}^{L} z[n+m] z*[n−m] e^{−j2π(2m)k/(2Nf)}, L = ⌊(N−1)/2⌋, zero outside
    the window; (N, Nf) complex (its imaginary part is round-off)."""
    z = np.asarray(z, dtype=np.complex128)
    n_samples = z.size
    lags = (n_samples - 1) // 2
    m = np.arange(-lags, lags + 1)
    n = np.arange(n_samples)[:, None]
    plus, minus = n + m, n - m
    inside = (plus >= 0) & (plus < n_samples) & (minus >= 0) & (minus < n_samples)
    forward = z[np.clip(plus, 0, n_samples - 1)]
    backward = np.conj(z[np.clip(minus, 0, n_samples - 1)])
    r = np.where(inside, forward * backward, 0)
    k = np.arange(n_freqs)
    return r @ np.exp(-2j * np.pi * (2 * m[:, None]) * k[None, :] / (2 * n_freqs))


def reference_frequency_count(n_samples: int, channels, sampling_rate_hz: float, eps=1e-17) -> int:
    """Nf ≥ max(2L+1, L + L_ε): the lag weights of every channel have fallen below ε before the
    first alias of the frequency grid (docs/design.md §3)."""
    lags = (n_samples - 1) // 2
    k = math.sqrt(2.0 * math.log(1.0 / eps))
    widest = max(
        math.ceil(sampling_rate_hz * k / (4.0 * math.pi * c.conditional_freq_spread_hz))
        for c in channels
    )
    return max(2 * lags + 1, lags + widest)


def reference_channel(z: np.ndarray, channel, sampling_rate_hz: float, n_freqs: int,
                      wvd: np.ndarray | None = None) -> np.ndarray:
    """S_c[n] = Σ_{n'} Σ_k W[n', k] · G_c((n' − n)/fs, f_k − f_c) · Δf/fs, explicitly (N,).

    Time: every n' of the window (no truncation). Frequency: circular with period fs/2, the
    conditional Gaussian summed over enough periods to be exact in double precision.
    """
    fs = float(sampling_rate_hz)
    n_samples = len(z)
    w = (reference_wvd(z, n_freqs) if wvd is None else wvd).real
    df = fs / (2.0 * n_freqs)
    f = np.arange(n_freqs) * df
    sigma = channel.time_spread_s
    spread = channel.conditional_freq_spread_hz
    u = (np.arange(n_samples)[None, :] - np.arange(n_samples)[:, None]) / fs  # t′ − t, (n, n')
    g = np.exp(-0.5 * (u / sigma) ** 2) / (math.sqrt(2.0 * math.pi) * sigma)
    period = fs / 2.0
    nu = f[None, None, :] - channel.center_hz - channel.chirp_hz_per_s * u[:, :, None]
    nu = (nu + period / 2.0) % period - period / 2.0
    copies = int(math.ceil(10.0 * spread / period)) + 1
    density = np.zeros_like(nu)
    for p in range(-copies, copies + 1):
        density += np.exp(-0.5 * ((nu + p * period) / spread) ** 2)
    density /= math.sqrt(2.0 * math.pi) * spread
    kernel = g[:, :, None] * density  # (n, n', k)
    return np.einsum("ab,nab->n", w, kernel) * df / fs
