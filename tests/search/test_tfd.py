"""Tests of search.tfd against naive references, published identities and libraries."""
from __future__ import annotations

import math

import numpy as np
import pytest
import pywt
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize import minimize_scalar
from scipy.signal import ShortTimeFFT, hilbert
from scipy.signal.windows import gaussian

from burstlens.search import Channel, Filterbank, prepare, transform
from burstlens.search.criteria import renyi_entropy
from burstlens.search import tfd as tfd_module
from burstlens.search.tfd import CHIRP_METHODS, PreparedWindows, auto_chirp_method, clear_plans

from burstlens.search.testing.reference import reference_channel, reference_frequency_count, reference_wvd

FS = 1000.0


def _relative_error(a, b):
    """max |a − b| / max |b| per channel (rows of the last-but-one axis), the worst one."""
    a, b = np.atleast_2d(a), np.atleast_2d(b)
    return float(np.max(np.abs(a - b).max(axis=-1) / np.abs(b).max(axis=-1)))


# Edge channels near 0 and fs/2, kernels shorter and longer than the window, every kind of a.
CHANNELS = [
    Channel(3.0, 0.004, 1.0),
    Channel(497.0, 0.006, 2.0),
    Channel(120.0, 0.020, 0.5),
    Channel(250.0, 0.100, 1.0),
    Channel(60.0, 0.002, 3.0),
]
CHIRPED = [
    Channel(3.0, 0.004, 1.0, 3000.0),
    Channel(497.0, 0.006, 2.0, -5000.0),
    Channel(120.0, 0.020, 0.5, 800.0),
    Channel(250.0, 0.100, 1.0, 200.0),
    Channel(60.0, 0.002, 3.0, -7000.0),
    Channel(300.0, 0.003, 0.25, 2000.0),  # lag shifts 2L beyond the kernel's half width
]


@pytest.fixture(scope="module")
def naive_case():
    """One random window, its full-grid WVD and the naive outputs of every test channel."""
    n_samples = 64
    x = np.random.default_rng(1).standard_normal(n_samples)
    z = hilbert(x)
    channels = CHANNELS + CHIRPED
    n_freqs = reference_frequency_count(n_samples, channels, FS)
    wvd = reference_wvd(z, n_freqs)
    expected = np.array([reference_channel(z, c, FS, n_freqs, wvd=wvd) for c in channels])
    return x, expected


@pytest.fixture(params=CHIRP_METHODS)
def chirp_method(request):
    """Each way of forming the chirped path's ambiguity samples: the cost model's choice, and
    each of the two forced (both must be exact, whichever the model picks)."""
    return request.param


@pytest.mark.parametrize("chirped", [False, True], ids=["beta=0", "beta!=0"])
def test_fast_matches_naive_full_grid(naive_case, chirped, chirp_method):
    """The fast (β = 0) and banded ambiguity-domain (β ≠ 0, lag-major or Doppler rows) paths
    equal the defining double sum S_c[n] = Σ_n' Σ_k W[n',k] G_c((n'−n)/fs, f_k−f_c) Δf/fs (the
    kernel centred on ν = β·(t′ − t)) on a full WVD grid with an explicit 2-D convolution, to
    relative error < 1e-10, channels near 0 and fs/2 included. Source: the definition in
    docs/design.md §3 (discrete WVD after Claasen & Mecklenbräuker, Philips J. Res. 35, 1980)."""
    x, expected = naive_case
    channels = CHIRPED if chirped else CHANNELS
    rows = slice(len(CHANNELS), None) if chirped else slice(0, len(CHANNELS))
    image = transform(x, Filterbank(channels, FS), eps=1e-15, dtype=np.float64,
                      chirp_method=chirp_method)
    assert image.shape == (len(channels), x.size)
    assert _relative_error(image, expected[rows]) < 1e-10


def test_mixed_filterbank_keeps_channel_order(naive_case):
    """A filterbank mixing chirped and unchirped channels returns every row in the filterbank's
    order, each equal to the naive reference (< 1e-10). Source: docs/design.md §3 definition."""
    x, expected = naive_case
    channels = CHANNELS + CHIRPED
    order = np.random.default_rng(5).permutation(len(channels))
    image = transform(x, Filterbank([channels[i] for i in order], FS), eps=1e-15,
                      dtype=np.float64)
    assert _relative_error(image, expected[order]) < 1e-10


def _gaussian_stft(z, sigma, chirp, mfft):
    """Two-sided hop-1 scipy ShortTimeFFT of z with window exp(−u²/4σ²)·exp(+jπβu²) (std of
    the real part's gaussian = σ·fs·√2), frames centred on samples 0..N−1; returns X, ‖h‖².
    ShortTimeFFT multiplies by conj(win) = exp(−jπβu²)·…, which dechirps an arrival sweeping
    at +β Hz/s."""
    half = int(math.ceil(9.0 * sigma * FS * math.sqrt(2.0)))
    envelope = gaussian(2 * half + 1, std=sigma * FS * math.sqrt(2.0))
    u = (np.arange(2 * half + 1) - half) / FS
    window = envelope * np.exp(1j * np.pi * chirp * u**2)
    stft = ShortTimeFFT(window, hop=1, fs=FS, fft_mode="twosided", mfft=mfft)
    return stft.stft(z, p0=0, p1=z.size), float(np.sum(envelope**2))


def _stft_image(z, sigma, chirp, centers, mfft):
    """(|X_z(n, f_c)|² + |X_z(n, f_c + fs/2)|²) / (2‖h‖²) at the given centres (multiples of
    fs/mfft): the spectrogram identity's right-hand side, on the channel grid (C, N)."""
    stft, norm = _gaussian_stft(z, sigma, chirp, mfft)
    bins = np.rint(np.asarray(centers) * mfft / FS).astype(int)
    return (np.abs(stft[bins]) ** 2 + np.abs(stft[bins + mfft // 2]) ** 2) / (2.0 * norm)


@pytest.mark.parametrize("chirp", [0.0, 2500.0, -4000.0])
def test_spectrogram_identity(chirp, chirp_method):
    """a = 1, σ_t = s: 2‖h‖²·S_c[n] = |X_z(n, f_c)|² + |X_z(n, f_c + fs/2)|², X_z the two-sided
    hop-1 ShortTimeFFT of the analytic signal with window gaussian(std = s·fs·√2), exact to
    round-off (< 1e-9), including channels at 2 Hz and fs/2 − 2 Hz where the second term
    matters. With β ≠ 0 the window is exp(−u²/4s²)·exp(+jπβu²): ShortTimeFFT multiplies by
    conj(win), which dechirps arrivals sweeping at +β, i.e. the kernel lies along
    f′ = f_c + β·(t′ − t); the opposite sign must not match. Sources: L. Cohen,
    Time-Frequency Analysis, 1995 (spectrogram = WVD smoothed by the window's WVD);
    scipy.signal.ShortTimeFFT."""
    s, n_samples, mfft = 0.008, 256, 500
    x = np.random.default_rng(2).standard_normal(n_samples)
    z = hilbert(x)
    centers = [2.0, 100.0, 250.0, 498.0]
    image = transform(x, Filterbank([Channel(f, s, 1.0, chirp) for f in centers], FS),
                      eps=1e-14, dtype=np.float64, chirp_method=chirp_method)
    stft, norm = _gaussian_stft(z, s, chirp, mfft)
    bins = [int(round(f * mfft / FS)) for f in centers]
    spectrogram = np.array([np.abs(stft[k]) ** 2 + np.abs(stft[k + mfft // 2]) ** 2
                            for k in bins])
    assert _relative_error(2.0 * norm * image, spectrogram) < 1e-9
    # the second (fs/2-shifted) term is not negligible at the band edges
    assert _relative_error(2.0 * norm * image[[0, 3]],
                           np.abs(stft[[bins[0], bins[3]]]) ** 2) > 1e-3
    if chirp:
        wrong, _ = _gaussian_stft(z, s, -chirp, mfft)
        mirrored = np.array([np.abs(wrong[k]) ** 2 + np.abs(wrong[k + mfft // 2]) ** 2
                             for k in bins])
        assert _relative_error(2.0 * norm * image, mirrored) > 1e-2


def test_upward_chirp_is_sharpest_at_positive_channel_chirp():
    """An upward linear chirp of +β Hz/s (instantaneous frequency f0 + βu under a Gaussian
    envelope) has its lowest Rényi entropy (α = 3) over spectrogram channels (a = 1) at channel
    chirp +β, not −β: a coarse scan over [−1.5β, 1.5β] finds it next to +β and far below −β
    (> 1 bit), and a bounded refinement lands within 3 % of +β. The same scan through scipy's
    ShortTimeFFT with the chirped window exp(−u²/4s²)·exp(+jπβ_w u²) gives the same entropies
    (< 1e-6 bits), so its minimum is at +β too. Why +β: the WVD of the chirp and the kernel
    are Gaussians of covariances Σ_x, Σ_k, and det(Σ_x + Σ_k) exceeds its minimum by
    σ0²s²(β − β_w)², so the sharpest channel has the sweep's own rate. Sources: Baraniuk,
    Flandrin, Janssen, Michel, "Measuring time-frequency information content using the Rényi
    entropies", IEEE Trans. Inf. Theory 47(4), 2001 (H_α of a Gaussian density by det Σ);
    L. Cohen, Time-Frequency Analysis, 1995 (spectrogram = WVD smoothed by the window's WVD);
    scipy.signal.ShortTimeFFT."""
    beta, sigma0, f0, s, n_samples, mfft = 500.0, 0.06, 250.0, 0.025, 512, 1000
    u = (np.arange(n_samples) - n_samples / 2) / FS
    x = np.exp(-u**2 / (4 * sigma0**2)) * np.cos(2 * np.pi * (f0 * u + 0.5 * beta * u**2))
    z = hilbert(x)
    centers = np.arange(60.0, 441.0, 2.0)  # the sweep ±3σ0 (±90 Hz) plus the kernels' spread

    def entropy(chirp):
        bank = Filterbank.constant_window(centers, s, FS, chirp_hz_per_s=chirp)
        return renyi_entropy(transform(x, bank, dtype=np.float64), 3.0)

    grid = np.linspace(-1.5, 1.5, 31) * beta
    scan = np.array([entropy(b) for b in grid])
    best = int(np.argmin(scan))
    assert abs(grid[best] - beta) <= 0.1 * beta
    assert scan[np.argmin(np.abs(grid + beta))] > scan[best] + 1.0
    refined = minimize_scalar(entropy, bounds=(grid[best - 1], grid[best + 1]), method="bounded",
                              options={"xatol": 1e-3 * beta})
    assert refined.x == pytest.approx(beta, rel=0.03)
    stft_scan = np.array([renyi_entropy(_stft_image(z, s, b, centers, mfft), 3.0) for b in grid])
    np.testing.assert_allclose(stft_scan, scan, rtol=0, atol=1e-6)
    assert renyi_entropy(_stft_image(z, s, refined.x, centers, mfft), 3.0) == pytest.approx(
        refined.fun, abs=1e-6)


@pytest.mark.parametrize("wavelet_b, wavelet_c", [(1.5, 1.0), (4.0, 2.0)])
def test_constant_q_matches_morlet_scalogram(wavelet_b, wavelet_c):
    """σ_t = C√B/(2f), a = 1 is the complex-Morlet scalogram: S = 2√(2πB)·|W|²/sinc²(f/fs)
    with W = pywt.cwt(x, scales, 'cmorB-C'), within 10 % pointwise where the scalogram exceeds a
    quarter of its channel peak, at least 4σ_t from the window ends (there the FFT-based
    analytic signal differs from a zero-padded convolution). The constant follows from
    ψ(t) = (πB)^{-1/2} e^{−t²/B} e^{j2πCt} and pywt's √scale factor; sinc² undoes pywt's
    first difference of the integrated wavelet. Scales are k/16 with k odd so that pywt's
    output is centred on the sample (no half-sample shift). Source: pywt.cwt (PyWavelets)."""
    n_samples = 1024
    t = np.arange(n_samples) / FS
    rng = np.random.default_rng(3)

    def atom(t0, f0, d):
        return np.exp(-((t - t0) / d) ** 2 / 4) * np.cos(2 * np.pi * f0 * t)

    x = (atom(0.25, 60, 0.03) + 0.7 * atom(0.5, 120, 0.015) + 0.5 * atom(0.75, 90, 0.05)
         + 0.3 * rng.standard_normal(n_samples))
    scales = np.array([161, 241, 321, 481, 641]) / 16.0
    freqs = wavelet_c * FS / scales
    coef, coef_freqs = pywt.cwt(x, scales, f"cmor{wavelet_b}-{wavelet_c}",
                                sampling_period=1.0 / FS, precision=14)
    np.testing.assert_allclose(coef_freqs, freqs)
    scalogram = (np.abs(coef) ** 2 * 2.0 * np.sqrt(2.0 * np.pi * wavelet_b)
                 / np.sinc(freqs[:, None] / FS) ** 2)
    cycles = wavelet_c * math.sqrt(wavelet_b) / 2.0
    fb = Filterbank.constant_q(freqs, cycles, FS)
    image = transform(x, fb, dtype=np.float64)
    n = np.arange(n_samples)
    for row, sigma in enumerate(fb.time_spread_s):
        margin = 4.0 * sigma * FS
        mask = ((scalogram[row] > 0.25 * scalogram[row].max())
                & (n >= margin) & (n < n_samples - margin))
        assert mask.sum() > 50
        ratio = image[row, mask] / scalogram[row, mask]
        assert np.max(np.abs(ratio - 1.0)) < 0.10, (freqs[row], np.max(np.abs(ratio - 1.0)))


@settings(max_examples=25, deadline=None, derandomize=True)
@given(
    seed=st.integers(0, 2**32 - 1),
    area=st.floats(1.0, 4.0),
    sigma_samples=st.floats(2.0, 40.0),
    chirp=st.sampled_from([0.0, 1500.0, -3000.0]),
)
def test_cell_area_at_least_one_is_non_negative(seed, area, sigma_samples, chirp):
    """a ≥ 1: the kernel is a spectrogram kernel further smoothed by a positive Gaussian, so the
    output is ≥ 0 for any signal (here random ones) beyond round-off (−1e-10 of the peak).
    Sources: N. G. de Bruijn, "Uncertainty principles in Fourier analysis", Inequalities,
    1967; A. J. E. M. Janssen, "Positivity properties of phase-plane distribution functions",
    J. Math. Phys. 25, 1984 (Gaussian smoothing of cell area ≥ the Heisenberg minimum gives
    non-negative distributions)."""
    rng = np.random.default_rng(seed)
    x = rng.standard_normal(128) * rng.uniform(0.1, 10.0, 128)
    centers = [5.0, 77.0, 240.0, 495.0]
    fb = Filterbank([Channel(f, sigma_samples / FS, area, chirp) for f in centers], FS)
    image = transform(x, fb, eps=1e-13, dtype=np.float64)
    assert image.min() >= -1e-10 * np.abs(image).max()


def test_super_resolution_goes_negative():
    """a = 0.5 (below the Heisenberg minimum) gives clearly negative values on two atoms, whose
    WVD cross term the narrower kernel does not smooth away; a = 1 on the same signal does not.
    Sources: de Bruijn 1967; Janssen 1984; L. Cohen, Time-Frequency Analysis, 1995."""
    t = np.arange(512) / FS
    x = sum(np.exp(-((t - t0) / 0.02) ** 2 / 4) * np.cos(2 * np.pi * 100 * t)
            for t0 in (0.18, 0.33))
    centers = np.linspace(90.0, 110.0, 21)  # the cross term oscillates along f, period 1/Δt
    low = transform(x, Filterbank.constant_area(centers, 0.02, 0.5, FS), dtype=np.float64)
    assert low.min() < -0.05 * low.max()
    heisenberg = transform(x, Filterbank.constant_window(centers, 0.02, FS), dtype=np.float64)
    assert heisenberg.min() >= -1e-9 * heisenberg.max()


def test_prepared_windows_and_blocks_agree():
    """transform on prepared windows, on the array, window by window, and with a one-channel
    filterbank (refinement recomputing one row) give the same numbers; shapes are (M, C, N) for
    2-D input and (C, N) for a 1-D window; float32 output by default. Common practice."""
    rng = np.random.default_rng(7)
    windows = rng.standard_normal((5, 300))
    fb = Filterbank([Channel(40.0, 0.01), Channel(200.0, 0.004, 0.7, 900.0),
                     Channel(350.0, 0.03, 2.0)], FS)
    prepared = prepare(windows)
    assert isinstance(prepared, PreparedWindows) and prepared.analytic.shape == (5, 300)
    full = transform(prepared, fb, dtype=np.float64)
    assert full.shape == (5, 3, 300)
    np.testing.assert_allclose(transform(windows, fb, dtype=np.float64), full, rtol=0, atol=1e-12)
    for i in range(5):
        np.testing.assert_allclose(transform(windows[i], fb, dtype=np.float64), full[i],
                                   rtol=0, atol=1e-12)
    for c in range(3):
        row = transform(prepared, Filterbank([fb[c]], FS), dtype=np.float64)
        np.testing.assert_allclose(row[:, 0], full[:, c], rtol=0, atol=1e-12)
    single = transform(windows, fb)
    assert single.dtype == np.float32
    np.testing.assert_allclose(single, full, rtol=1e-5, atol=1e-6 * np.abs(full).max())


def test_long_windows_are_processed_in_blocks(monkeypatch, chirp_method):
    """With tiny block budgets (forcing row blocks, lag blocks, Doppler-row blocks and window
    chunks) the output is unchanged, and bit-identical on one thread and on two, and for one
    window at a time (runs must not depend on how work is spread, docs/design.md §5): memory is bounded
    by blocking, not by M·N·N arrays. Common practice."""
    module = tfd_module

    rng = np.random.default_rng(8)
    windows = rng.standard_normal((3, 400))
    fb = Filterbank([Channel(50.0, 0.02), Channel(150.0, 0.01, 1.0, -1200.0),
                     Channel(300.0, 0.005, 0.6), Channel(420.0, 0.03, 0.8, 2500.0)], FS)
    expected = transform(windows, fb, dtype=np.float64, chirp_method=chirp_method)
    monkeypatch.setattr(module, "BLOCK_BYTES", 1 << 16)
    monkeypatch.setattr(module, "GEMM_BLOCK_BYTES", 1 << 14)
    monkeypatch.setattr(module, "ROW_BLOCK_BYTES", 1 << 14)
    clear_plans()  # the cached weights were cut for the default blocks
    blocked = transform(windows, fb, dtype=np.float64, workers=2, chirp_method=chirp_method)
    serial = transform(windows, fb, dtype=np.float64, workers=1, chirp_method=chirp_method)
    one_by_one = np.stack([transform(w, fb, dtype=np.float64, workers=2,
                                     chirp_method=chirp_method) for w in windows])
    clear_plans()  # and these for the tiny ones, which the next tests must not reuse
    np.testing.assert_allclose(blocked, expected, rtol=0, atol=1e-12 * np.abs(expected).max())
    np.testing.assert_array_equal(serial, blocked)  # bit-identical however threads share work
    np.testing.assert_array_equal(one_by_one, blocked)


def test_chirp_methods_agree_on_long_windows():
    """Lag-major and Doppler-row ambiguity samples give the same chirped rows (< 1e-12 of the
    peak) on windows long enough that lag counts are not capped by the window, with cell areas
    below and above 1 and both chirp signs, for the whole filterbank and for each channel alone
    (as refinement computes them, where 2L exceeds the kernel's half width): two independent
    derivations of the same R(θ, m). Source: docs/design.md §3 (R the FFT over time of r); the
    cross-correlation theorem (common practice)."""
    windows = np.random.default_rng(9).standard_normal((2, 700))
    fb = Filterbank([Channel(40.0, 0.012, 0.3, 900.0), Channel(230.0, 0.006, 1.0, -3000.0),
                     Channel(470.0, 0.05, 2.5, 150.0)], FS)
    for bank in [fb] + [Filterbank([channel], FS) for channel in fb]:
        rows = {method: transform(windows, bank, dtype=np.float64, eps=1e-12,
                                  chirp_method=method) for method in ("lag", "doppler")}
        np.testing.assert_allclose(rows["doppler"], rows["lag"], rtol=0,
                                   atol=1e-12 * np.abs(rows["lag"]).max())


def test_auto_chirp_method_is_the_forced_one_it_names():
    """``chirp_method="auto"`` gives, bit for bit, the image of the way ``auto_chirp_method``
    names, whichever that is (both ways occur below: the cost model picks Doppler rows for a
    gentle sweep over long kernels and lag by lag for one short kernel at a steep sweep), and
    None for an unchirped filterbank. Source: the transform's contract (DEVELOPERS.md)."""
    windows = np.random.default_rng(11).standard_normal((2, 512))
    cases = [Filterbank([Channel(100.0, 0.04, 1.0, 300.0), Channel(300.0, 0.01, 0.3, 300.0)],
                        FS),
             Filterbank([Channel(250.0, 0.002, 1.0, 6000.0)], FS)]
    picked = []
    for fb in cases:
        method = auto_chirp_method(fb, windows.shape[1])
        picked.append(method)
        np.testing.assert_array_equal(transform(windows, fb, dtype=np.float64),
                                      transform(windows, fb, dtype=np.float64,
                                                chirp_method=method))
    assert sorted(picked) == ["doppler", "lag"]
    assert auto_chirp_method(Filterbank([Channel(100.0, 0.01)], FS), 512) is None


def test_bad_input_is_named():
    """Non-finite samples, wrong shapes, complex input, bad eps and a non-filterbank each raise a
    ValueError that says what is wrong. Common practice."""
    fb = Filterbank([Channel(100.0, 0.01)], FS)
    x = np.zeros(64)
    x[10] = np.nan
    with pytest.raises(ValueError, match="sample .*10.* not finite"):
        transform(x, fb)
    with pytest.raises(ValueError, match="shape"):
        transform(np.zeros((2, 3, 4)), fb)
    with pytest.raises(ValueError, match="real"):
        transform(np.zeros(64, dtype=complex), fb)
    with pytest.raises(ValueError, match="eps"):
        transform(np.zeros(64), fb, eps=0.0)
    with pytest.raises(ValueError, match="Filterbank"):
        transform(np.zeros(64), [Channel(100.0, 0.01)])
    with pytest.raises(ValueError, match="chirp_method='lags'.*'auto', 'lag', 'doppler'"):
        transform(np.zeros(64), fb, chirp_method="lags")
