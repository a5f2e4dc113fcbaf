"""The search scores the bursts, not the site's steady sound.

A generated site: Gaussian bursts of known duration σ0, steady lines carrying at least 90 % of
the energy (the same in every window, random phases) and a red background. The matched
spectrogram window of a Gaussian burst has time spread σ0 (closed form from the determinant of
the smoothed Gaussian; L. Cohen, "Time-Frequency Analysis", 1995; Rényi entropy as in R. G.
Baraniuk et al., IEEE Trans. IT 47(4), 2001). Each property is checked with the noise sample
taken from quiet stretches (``Corpus.noise_windows``) and, as for event files, from the burst
windows themselves.
"""
import numpy as np
import pytest
from scipy.signal import lfilter

from burstlens.search.corpus import Corpus
from burstlens.search.optimize import FilterbankSearch

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


@pytest.fixture(scope="module")
def sites():
    with_lines = site(True)
    assert with_lines[2] >= 0.9          # the lines carry at least 90 % of the energy
    return {"lines": with_lines, "quiet": site(False)}


@pytest.mark.parametrize("noise_from", ["quiet stretches", "the windows themselves"])
def test_matched_window_survives_strong_lines(sites, noise_from):
    """With lines carrying ≥ 90 % of the energy and a red background, the best-spectrogram
    baseline and the fitted spectrogram family (cell area 1, no chirp) both land within 10 %
    of the bursts' matched window σ0 (closed form, module docstring)."""
    windows, noise, _ = sites["lines"]
    est = FilterbankSearch(**SETTINGS, cell_area=[1, 1], chirp=False, refine=False).fit(
        corpus(windows, noise if noise_from == "quiet stretches" else None))
    baseline = est.diagnostics_["baselines"]["spectrogram"]["parameters"]["time_spread_s"]
    assert baseline == pytest.approx(SIGMA0, rel=0.10)
    fb = est.filterbank_
    assert fb.time_spread_s[int(np.argmin(abs(fb.center_hz - F0)))] == pytest.approx(SIGMA0, rel=0.10)
    assert len(est.diagnostics_["noise"]["lines"]["lines_hz"]) == len(LINES)


@pytest.mark.parametrize("noise_from", ["quiet stretches", "the windows themselves"])
def test_held_out_gain_does_not_depend_on_the_lines(sites, noise_from):
    """The held-out gain over the best spectrogram with the lines stays within 0.1 bit of the
    gain on the same site without them (the site's steady sound must not decide the answer)."""
    gains = {}
    for name in ("lines", "quiet"):
        windows, noise, _ = sites[name]
        est = FilterbankSearch(**SETTINGS).fit(
            corpus(windows, noise if noise_from == "quiet stretches" else None))
        gains[name] = est.diagnostics_["gain_bits"]
    assert gains["lines"] == pytest.approx(gains["quiet"], abs=0.1)
