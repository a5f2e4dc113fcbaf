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

from burstlens.search.optimize import FilterbankSearch
from burstlens.search.testing.sites import F0, LINES, SETTINGS, SIGMA0, corpus, site


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
