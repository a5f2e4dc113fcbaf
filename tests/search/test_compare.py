"""search.compare: the user's own spectrogram (``compare_to``), parsed and imaged for the scorecard.

References: scipy.signal (``spectrogram``, ``stft``, ``windows``) as the reference STFT; the
analytic signal's spectrum is twice the real signal's at positive frequencies (D. Gabor, "Theory
of communication", J. IEE 93(26), 1946). Window conventions (Gaussian std L/6, FFT points the
next power of two ≥ L, 50 % default overlap) are common practice.
"""
from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy.signal import hilbert, spectrogram, stft
from scipy.signal.windows import gaussian, hann

from burstlens.search import compare
from burstlens.search.compare import UserSpectrogram, parse_compare_to

FS, N = 4000.0, 1024
BAND = [40.0, 1800.0]
SETTINGS = ["hann:256", "hann:200:150", "hann:64:0", "gaussian:128:96", "gaussian:65"]


def bursts(m, seed, noise=0.01):
    """Gaussian-envelope tones and a chirp at random times and frequencies plus white noise of
    standard deviation ``noise``."""
    rng = np.random.default_rng(seed)
    t = np.arange(N) / FS
    out = []
    for _ in range(m):
        t0, f0, s0 = rng.uniform(0.05, 0.2), rng.uniform(300, 1400), rng.uniform(0.003, 0.01)
        tone = np.exp(-(t - t0) ** 2 / (4 * s0**2)) * np.cos(2 * np.pi * f0 * (t - t0))
        chirp = 0.5 * np.exp(-(t - 0.06) ** 2 / (4 * 0.005**2)) * np.cos(
            2 * np.pi * (600 * (t - 0.06) + 4000 * (t - 0.06) ** 2))
        out.append(tone + chirp + noise * rng.standard_normal(N))
    return np.array(out)


def reference_window(kind, length):
    """The window straight from scipy.signal.windows: periodic Hann, symmetric Gaussian of std
    L/6 (common practice)."""
    return hann(length, sym=False) if kind == "hann" else gaussian(length, std=length / 6, sym=True)


def band_bins(nfft):
    """FFT bins k with k·fs/nfft inside BAND."""
    return np.arange(math.ceil(BAND[0] * nfft / FS), math.floor(BAND[1] * nfft / FS) + 1)


@pytest.mark.parametrize("text", SETTINGS)
def test_images_equal_scipy_spectrogram_of_the_analytic_signal(text):
    """The image is scipy.signal.spectrogram (two-sided, 'spectrum' scaling |X|²/(Σh)², no
    detrend) of the analytic signal with the same window, hop and nfft, rescaled to
    |X|²/(2‖h‖²), on the bins inside the band, to round-off. scipy's frames start at sample 0,
    so the signal is led by L//2 zeros to centre frame k on sample k·hop. Source: scipy.signal
    as the reference spectrogram; analytic signal by scipy.signal.hilbert."""
    u = parse_compare_to(text)
    windows = bursts(3, seed=1)
    images = u.representation(FS, BAND).images(windows)
    h = reference_window(u.kind, u.length)
    z = hilbert(windows, axis=-1)
    padded = np.pad(z, ((0, 0), (u.length // 2, u.length)))
    _, _, sxx = spectrogram(padded, window=h, nperseg=u.length, noverlap=u.length - u.hop,
                            nfft=u.fft_points, detrend=False, return_onesided=False,
                            scaling="spectrum", mode="psd", axis=-1)
    t = images.shape[-1]
    assert t == math.ceil((N - 1) / u.hop) + 1 and sxx.shape[-1] >= t
    ref = sxx[:, band_bins(u.fft_points), :t] * np.sum(h) ** 2 / (2 * np.sum(h**2))
    assert images.shape == ref.shape and images.dtype == np.float64
    assert np.allclose(images, ref, rtol=1e-9, atol=1e-12 * ref.max())


@pytest.mark.parametrize("text, tol", [("hann:256", 5e-6), ("hann:200:150", 5e-6),
                                       ("gaussian:128:96", 1e-3)])
def test_real_input_positive_bins_are_twice_scipy_stft(text, tol):
    """For a real x band-limited inside (0, fs/2), |Z(f)| = 2|X(f)| for 0 < f < fs/2 (Gabor
    1946), so the image is
    |2·X_stft|²/(2‖h‖²) with X_stft scipy.signal.stft of the real signal (zero boundary, same
    window, hop, nfft; 'spectrum' scaling undone by Σh) on the bins away from DC and Nyquist.
    The tolerance (relative to the image peak) is the window's leakage from the mirror image at
    −f: the Hann window's sidelobes fall as 1/f³ (≤ 6e-7 measured), the Gaussian truncated at
    ±3σ steps by e^(−4.5) at its ends, so its sidelobes fall only as 1/f (8e-5 measured)."""
    u = parse_compare_to(text)
    x = bursts(2, seed=3, noise=0.0)  # band-limited: white noise would leak from −f
    images = u.representation(FS, [0.0, FS / 2]).images(x)
    h = reference_window(u.kind, u.length)
    _, _, xs = stft(x, window=h, nperseg=u.length, noverlap=u.overlap, nfft=u.fft_points,
                    detrend=False, return_onesided=True, boundary="zeros", padded=True,
                    scaling="spectrum", axis=-1)
    t = images.shape[-1]
    ref = np.abs(2 * xs[..., :t] * np.sum(h)) ** 2 / (2 * np.sum(h**2))
    inner = slice(1, u.fft_points // 2)
    assert np.max(np.abs(images[:, inner] - ref[:, inner])) <= tol * images.max()


@pytest.mark.parametrize("length", [4, 65, 128, 1000])
def test_gaussian_window_has_std_of_a_sixth_of_its_length(length):
    """A Gaussian window of length L has standard deviation L/6 samples (±3σ inside the window,
    common practice): the window used is scipy.signal.windows.gaussian(L, L/6, sym=True), and
    a parabola fitted to its log over the sample offsets from the centre (L−1)/2 gives
    −1/(2σ²) with σ = L/6 (definition of the Gaussian)."""
    u = parse_compare_to(f"gaussian:{length}")
    assert u.std_samples == pytest.approx(length / 6, rel=1e-15)
    assert u.to_json()["std_samples"] == u.std_samples
    w = u.window()
    assert np.allclose(w, gaussian(length, std=length / 6, sym=True), rtol=0, atol=1e-15)
    offsets = np.arange(length) - (length - 1) / 2
    curvature = np.polyfit(offsets**2, np.log(w), 1)[0]
    assert math.sqrt(-1 / (2 * curvature)) == pytest.approx(length / 6, rel=1e-9)
    # ±3σ inside the window: its end samples reach e^(−4.5·((L−1)/L)²) of the peak
    assert w[0] == pytest.approx(math.exp(-4.5 * ((length - 1) / length) ** 2), rel=1e-9)


@pytest.mark.parametrize("text, kind, length, overlap, std, fft", [
    ("hann:256", "hann", 256, 128, None, 256),
    ("  HANN:256:192 ", "hann", 256, 192, None, 256),
    ("Gaussian:100:75", "gaussian", 100, 75, 100 / 6, 128),
    ("gaussian : 5", "gaussian", 5, 2, 5 / 6, 8),
    ("hann:257:0", "hann", 257, 0, None, 512),
    ("hann:4", "hann", 4, 2, None, 4),
])
def test_parsing_gives_the_canonical_form_and_defaults(text, kind, length, overlap, std, fft):
    """KIND:LENGTH[:OVERLAP], kind in any case, spaces ignored; overlap defaults to LENGTH // 2
    (50 %), hop = LENGTH − OVERLAP, FFT points the next power of two ≥ LENGTH (common
    practice)."""
    u = parse_compare_to(text)
    assert (u.kind, u.length, u.overlap, u.fft_points) == (kind, length, overlap, fft)
    assert u.std_samples == (None if std is None else pytest.approx(std))
    assert u.hop == length - overlap
    assert u.text == f"{kind}:{length}:{overlap}"
    assert parse_compare_to(u.text) == u
    record = u.to_json()
    assert (record["compare_to"], record["window_samples"], record["overlap_samples"],
            record["hop_samples"], record["fft_points"]) == (u.text, length, overlap, u.hop, fft)


def test_fft_points_are_the_next_power_of_two():
    """fft_points = 2^⌈log₂ L⌉ for every length 4..5000 (common practice)."""
    for length in range(4, 5001):
        assert UserSpectrogram("hann", length, 0).fft_points == 2 ** math.ceil(math.log2(length))


def test_description_in_words():
    """describe(fs) gives the window, its duration in ms, hop and FFT size in words."""
    assert (parse_compare_to("hann:256").describe(FS)
            == "Hann window of 256 samples (64 ms at 4000 Hz), hop 128 samples, 256-point FFT")
    words = parse_compare_to("gaussian:120:90").describe(FS)
    assert words == ("Gaussian window of 120 samples (30 ms at 4000 Hz), standard deviation "
                     "20 samples (5 ms), hop 30 samples, 128-point FFT")


@pytest.mark.parametrize("text, cause", [
    ("hann:0", "window length must be an integer ≥ 4 samples"),
    ("hann:-3", "window length must be an integer ≥ 4 samples"),
    ("hann:3", "window length must be an integer ≥ 4 samples"),
    ("hann:abc", "window length must be an integer ≥ 4 samples"),
    ("hann:64.0", "window length must be an integer ≥ 4 samples"),
    ("box:64", "unknown window 'box'; use hann or gaussian"),
    ("hann:64:64", "overlap 64 must be below the window length 64"),
    ("hann:64:100", "overlap 100 must be below the window length 64"),
    ("hann:64:-1", "overlap must be an integer ≥ 0 samples"),
    ("hann:64:x", "overlap must be an integer ≥ 0 samples"),
    ("", "empty; use KIND:LENGTH[:OVERLAP]"),
    ("   ", "empty; use KIND:LENGTH[:OVERLAP]"),
    ("hann", "missing the window length; use KIND:LENGTH[:OVERLAP]"),
    ("hann:64:10:3", "too many fields (4); use KIND:LENGTH[:OVERLAP]"),
    (256, "must be text of the form KIND:LENGTH[:OVERLAP]"),
])
def test_every_parse_error_names_the_text_and_the_cause(text, cause):
    """Bad input gets a ValueError that starts with the exact text given and says why."""
    with pytest.raises(ValueError, match="^" + re.escape(f"compare_to={text!r}: {cause}")):
        parse_compare_to(text)


def test_direct_construction_is_checked_too():
    """UserSpectrogram(kind, length, overlap) refuses what the parser refuses."""
    with pytest.raises(ValueError, match=re.escape("compare_to='hann:8:8': overlap 8 must be")):
        UserSpectrogram("hann", 8, 8)
    with pytest.raises(ValueError, match="unknown window 'Hann'"):
        UserSpectrogram("Hann", 8, 4)


def test_check_names_both_lengths_in_samples_and_seconds():
    """A window longer than the burst windows is refused, naming both in samples and seconds;
    one exactly as long is allowed; images() applies the same check."""
    u = parse_compare_to("hann:4096")
    with pytest.raises(ValueError) as err:
        u.check(1024, FS)
    assert str(err.value) == ("compare_to='hann:4096:2048': the window of 4096 samples (1.024 s) "
                              "is longer than the 1024-sample burst windows (0.256 s)")
    parse_compare_to("hann:1024").check(1024, FS)
    with pytest.raises(ValueError, match="1024-sample burst windows"):
        u.representation(FS, BAND).images(np.zeros((1, N)))
    with pytest.raises(ValueError, match="sampling_rate_hz=0"):
        u.check(1024, 0)


@pytest.mark.parametrize("text", SETTINGS)
def test_an_impulse_peaks_in_the_column_at_its_time(text):
    """Time axis: an impulse at sample n0 in a zero window puts its energy peak (summed over the
    band) in the column at time first_time_s + k·time_step_s within half a hop of n0/fs, for
    impulses at the first and last samples too (the columns cover the window). Source: the STFT
    of δ[n − n0] is the window centred on n0 (definition of the STFT, common practice)."""
    u = parse_compare_to(text)
    rep = u.representation(FS, BAND)
    assert rep.first_time_s == 0.0 and rep.time_step_s == pytest.approx(u.hop / FS)
    starts = [0, 1, 300, 511, 777, N - 1]
    windows = np.zeros((len(starts), N))
    windows[np.arange(len(starts)), starts] = 1.0
    energy = rep.images(windows).sum(axis=1)
    times = rep.first_time_s + np.argmax(energy, axis=1) * rep.time_step_s
    assert np.all(np.abs(times - np.array(starts) / FS) <= 0.5 * u.hop / FS + 1e-12)


def test_band_rows_are_the_fft_bins_inside_the_band():
    """Rows are exactly the FFT bins k·fs/nfft inside band_hz: a stationary tone on bin k0
    peaks in row k0 − k_lo; cell size hop/fs × fs/nfft s·Hz (t–f cell area, common practice);
    a band holding no bin is refused, naming the band and the FFT size."""
    u = parse_compare_to("hann:256:192")
    rep = u.representation(FS, BAND)
    bins = band_bins(u.fft_points)
    k0 = 100
    tone = np.cos(2 * np.pi * k0 * FS / u.fft_points * np.arange(N) / FS)
    image = rep.images(tone[None])[0]
    assert image.shape[0] == bins.size == rep.cell_size.shape[0]
    middle = image[:, image.shape[1] // 2]
    assert np.argmax(middle) == k0 - bins[0]
    assert rep.cell_size.shape == (bins.size, 1)
    assert np.allclose(rep.cell_size, (u.hop / FS) * (FS / u.fft_points))
    assert rep.description["summary"] == u.describe(FS) and rep.name == "yours"
    with pytest.raises(ValueError, match=re.escape("band_hz=[1001.0, 1010.0] holds no FFT bin "
                                                   "of a 256-point FFT at 4000 Hz")):
        u.representation(FS, [1001.0, 1010.0])


def test_blocks_of_windows_give_the_images_one_window_at_a_time(monkeypatch):
    """The images are computed a block of windows at a time to bound memory; the blocks change
    nothing: a one-window budget gives the same images as one window per call."""
    windows = bursts(5, seed=4)
    rep = parse_compare_to("gaussian:128:120").representation(FS, BAND)
    monkeypatch.setattr(compare, "_STFT_BYTES", 1)
    blocked = rep.images(windows)
    single = np.stack([rep.images(w[None])[0] for w in windows])
    assert np.array_equal(blocked, single)
