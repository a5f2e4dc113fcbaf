"""Tests of search.wvd: autocorrelation, lag counts and the discrete pseudo-WVD's properties."""
from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.signal import hilbert

from burstlens.search.wvd import (analytic_signal, autocorrelation, lag_count, pseudo_wvd,
                        truncation_width, wvd_frequencies)

from burstlens.search.testing.reference import reference_wvd

FS = 1000.0


def _random_analytic(n, seed):
    return hilbert(np.random.default_rng(seed).standard_normal(n))


def test_autocorrelation_layouts_match_definition():
    """r[n, m] = z[n+m]·z*[n−m], zero where n±m leaves the window, in every layout, row range
    and lag range. Source: docs/design.md §3 (Claasen & Mecklenbräuker, Philips J. Res. 35, 1980)."""
    z = np.stack([_random_analytic(23, 0), _random_analytic(23, 1)])
    lags = 9
    expected = np.zeros((2, 23, lags + 1), dtype=complex)
    for w in range(2):
        for n in range(23):
            for m in range(lags + 1):
                if n - m >= 0 and n + m < 23:
                    expected[w, n, m] = z[w, n + m] * np.conj(z[w, n - m])
    np.testing.assert_allclose(autocorrelation(z, lags), expected, atol=1e-14)
    np.testing.assert_allclose(autocorrelation(z, lags, layout="lag"),
                               expected.transpose(0, 2, 1), atol=1e-14)
    np.testing.assert_allclose(autocorrelation(z.T, lags, layout="time-lag-window"),
                               expected.transpose(1, 2, 0), atol=1e-14)
    np.testing.assert_allclose(autocorrelation(z, lags, lag_start=3, rows=(5, 17)),
                               expected[:, 5:17, 3:], atol=1e-14)
    np.testing.assert_allclose(autocorrelation(z[1], lags), expected[1], atol=1e-14)


def test_lag_count_rule():
    """L_c = min(⌊(N−1)/2⌋, ⌈fs·√(2 ln(1/ε))/(4π σ_c)⌉): the lag weight
    exp(−2π²σ_c²τ²), τ = 2m/fs, is ≤ ε beyond L_c and > ε just before it. Source: docs/design.md §3."""
    eps = 1e-6

    def weight(m: int, spread: float) -> float:
        return math.exp(-2 * math.pi**2 * spread**2 * (2 * m / FS) ** 2)

    for spread in (0.7, 3.0, 40.0, 210.0):
        lags = lag_count(spread, FS, 100000, eps)
        assert weight(lags, spread) <= eps * (1 + 1e-12) < weight(lags - 1, spread)
    assert lag_count(0.7, FS, 64, eps) == 31
    both = lag_count(np.array([3.0, 40.0]), FS, 100000, eps)
    np.testing.assert_array_equal(both, [lag_count(s, FS, 100000, eps) for s in (3.0, 40.0)])
    assert truncation_width(1e-6) == pytest.approx(math.sqrt(2 * math.log(1e6)))
    with pytest.raises(ValueError, match="eps=1.5"):
        truncation_width(1.5)


def test_wvd_is_real_and_matches_explicit_sum():
    """The discrete WVD is real (r[n, −m] = conj r[n, m]): the explicit double sum has an
    imaginary part at round-off, and pseudo_wvd equals its real part. Source: T. A. C. M.
    Claasen, W. F. G. Mecklenbräuker, "The Wigner distribution — a tool for time-frequency
    signal analysis", Philips J. Res. 35, 1980."""
    z = _random_analytic(40, 2)
    explicit = reference_wvd(z, 80)
    assert np.abs(explicit.imag).max() < 1e-12 * np.abs(explicit.real).max()
    np.testing.assert_allclose(pseudo_wvd(z, 80), explicit.real,
                               atol=1e-12 * np.abs(explicit).max())


def test_time_marginal():
    """Σ_k W[n, k] = Nf·|z[n]|² for Nf ≥ 2L+1 (the frequency sum keeps only lag 0). Sources:
    Claasen & Mecklenbräuker 1980; L. Cohen, Time-Frequency Analysis, 1995 (marginals)."""
    z = _random_analytic(101, 3)
    for n_freqs in (101, 128, 333):
        w = pseudo_wvd(z, n_freqs)
        np.testing.assert_allclose(w.sum(axis=1), n_freqs * np.abs(z) ** 2, rtol=1e-10)


def test_moyal_formula():
    """Moyal's formula, discrete form: Σ_n Σ_k W_x W_y = (Nf/2)·(|Σ_n u[n]|² + |Σ_n (−1)^n
    u[n]|²), u = z_x·z_y*, for Nf ≥ 2L+1; the (−1)^n term is the discrete WVD's half-band
    alias and is small for analytic signals. The discrete form follows from the definition
    (Σ_k over Nf ≥ 2L+1 frequencies keeps equal lags only). Sources: J. E. Moyal, Proc. Camb.
    Phil. Soc. 45, 1949 (continuous formula); Claasen & Mecklenbräuker 1980 (discrete WVD)."""
    zx, zy = _random_analytic(64, 4), _random_analytic(64, 5)
    for n_freqs in (127, 256):
        wx, wy = pseudo_wvd(zx, n_freqs), pseudo_wvd(zy, n_freqs)
        u = zx * np.conj(zy)
        alternating = (-1.0) ** np.arange(64)
        expected = n_freqs / 2 * (abs(u.sum()) ** 2 + abs((alternating * u).sum()) ** 2)
        assert np.sum(wx * wy) == pytest.approx(expected, rel=1e-10)
        energy = np.sum(np.abs(zx) ** 2)
        self_term = n_freqs / 2 * (energy**2 + abs((alternating * np.abs(zx) ** 2).sum()) ** 2)
        assert np.sum(wx * wx) == pytest.approx(self_term, rel=1e-10)


def test_chirp_ridge_follows_instantaneous_frequency():
    """The WVD of a linear chirp z = exp(j2π(f0 t + βt²/2)) peaks on f = f0 + βt, within half a
    frequency bin at every time away from the ends. Sources: Claasen & Mecklenbräuker 1980;
    L. Cohen, Time-Frequency Analysis, 1995 (the WVD is exact for linear chirps)."""
    n_samples, f0, beta = 400, 40.0, 900.0
    t = np.arange(n_samples) / FS
    z = np.exp(2j * np.pi * (f0 * t + 0.5 * beta * t**2))
    n_freqs = 512
    w = pseudo_wvd(z, n_freqs)
    freqs = wvd_frequencies(n_freqs, FS)
    step = freqs[1]
    ridge = freqs[np.argmax(w, axis=1)]
    inner = slice(5, n_samples - 5)
    assert np.max(np.abs(ridge[inner] - (f0 + beta * t[inner]))) <= step / 2 + 1e-9


def test_inputs_are_checked():
    """Too-short, complex or non-finite windows and too few frequencies raise ValueError
    saying why. Common practice."""
    with pytest.raises(ValueError, match="at least 2 samples"):
        analytic_signal(np.zeros(1))
    with pytest.raises(ValueError, match="real"):
        analytic_signal(np.zeros(8, dtype=complex))
    with pytest.raises(ValueError, match=r"sample \(0, 3\) is not finite"):
        analytic_signal(np.array([[0.0, 1.0, 2.0, np.inf]]))
    with pytest.raises(ValueError, match="n_freqs=10"):
        pseudo_wvd(_random_analytic(20, 6), 10)
