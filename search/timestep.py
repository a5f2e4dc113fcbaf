"""The output time step a filterbank allows: each channel's image is band-limited by its kernel.

Channel c's image is S_c = g_c ∗ y_c (:mod:`search.tfd`): the unsmoothed lag sum y_c
convolved over time with g_c, the N(0, σ_t²) density, whose spectrum over the time-frequency
variable θ (Hz) is ĝ_c(θ) = exp(−2π²σ_t²θ²). For a chirped channel (β ≠ 0) lag m's term is
shifted to θ = βτ_m (τ_m = 2m/fs, m ≤ L_c), so the kernel passes |θ| ≤ |β|τ_{L_c} + θ_ε with
θ_ε = √(2 ln 1/ε_a)/(2πσ_t), where ĝ has fallen to ε_a.

Rule: sample every Δ = ⌊fs / (2·max_c B_c)⌋ samples (at least 1), B_c = |β_c|·2L_c/fs +
√(2 ln 1/ε_a)/(2πσ_t,c); for unchirped channels Δ ≤ π·σ_t,min·fs/√(2 ln 1/ε_a), i.e. about
0.85·σ_t,min at ε_a = 10⁻³. One step serves all channels (the narrowest kernel decides). At the
step's Nyquist θ_N = fs/(2Δ) ≥ B_c every component of every row is attenuated by at least ε_a
relative to its level at θ = 0, so the part of the image that sampling aliases is at most ε_a
of the row it comes from.

Error bound: band-limited (Fourier) interpolation of a sampled function errs by at most twice
the L1 mass of its spectrum beyond Nyquist (J. L. Brown, "On the error in reconstructing a
non-bandlimited function by means of the bandpass sampling theorem", J. Math. Anal. Appl. 18,
1967). For an arrival shorter than σ_t (the sharpest image a channel draws, S ≈ A·g_c) that mass
is A·erfc(√(2)πσ_tθ_N)/(√(2π)σ_t) relative to the peak A/(√(2π)σ_t), so

    |S − S_interp| ≤ 2·erfc(√(ln 1/ε_a)) · max|S|     (≈ 3.8·10⁻⁴·max|S| at ε_a = 10⁻³);

longer arrivals have less spectrum beyond θ_N and err less. Units: s, Hz, samples.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from burstlens.search.filterbank import Filterbank
from burstlens.search.wvd import lag_count, truncation_width

ALIASING = 1e-3  # default ε_a: ĝ at the step's Nyquist
_NO_CAP = 1 << 62  # lag counts of an unbounded record (no window-length cap)


@dataclass(frozen=True)
class TimeStep:
    """The output step: ``samples`` input samples (``seconds`` = samples / fs), the kernels'
    largest gain at its Nyquist (``aliasing``, ε_a), the interpolation bound relative to the
    image's peak (``interpolation_bound``, 2·erfc(√ln(1/ε_a))) and ``rule`` in words."""

    samples: int
    seconds: float
    aliasing: float
    interpolation_bound: float
    rule: str

    def to_json(self) -> dict:
        return {"samples": self.samples, "seconds": self.seconds, "aliasing": self.aliasing,
                "interpolation_bound": self.interpolation_bound, "rule": self.rule}


RULE = ("step = floor(fs / (2 max_c B_c)), B_c = |beta_c| 2 L_c / fs + sqrt(2 ln(1/eps_a)) / "
        "(2 pi sigma_t,c): every channel's time kernel is below eps_a at the step's Nyquist")


def chirp_reach_hz(filterbank: Filterbank, *, eps: float = 1e-6) -> np.ndarray:
    """(C,) |β_c|·2L_c/fs, Hz: how far lag L_c's term is shifted in θ (0 for unchirped)."""
    fs = filterbank.sampling_rate_hz
    lags = np.atleast_1d(lag_count(filterbank.conditional_freq_spread_hz, fs, _NO_CAP, eps))
    return np.abs(filterbank.chirp_hz_per_s) * 2.0 * lags / fs


def bandwidth_hz(filterbank: Filterbank, aliasing: float = ALIASING, *, eps: float = 1e-6) -> np.ndarray:
    """(C,) B_c, Hz: the θ band outside which channel c's kernel is below ``aliasing``."""
    k = truncation_width(aliasing)
    return chirp_reach_hz(filterbank, eps=eps) + k / (2.0 * np.pi * filterbank.time_spread_s)


def aliasing_at(filterbank: Filterbank, step_samples: int, *, eps: float = 1e-6) -> float:
    """ε_a of a step: max over channels of ĝ_c(θ_N − |β_c|τ_{L_c}), θ_N = fs/(2·step) (1 when a
    chirped channel's shift reaches beyond θ_N)."""
    nyquist = filterbank.sampling_rate_hz / (2.0 * step_samples)
    spare = nyquist - chirp_reach_hz(filterbank, eps=eps)
    gains = np.where(spare > 0, np.exp(-2.0 * np.pi**2 * (filterbank.time_spread_s * spare) ** 2), 1.0)
    return float(gains.max())


def interpolation_bound(aliasing: float) -> float:
    """2·erfc(√ln(1/ε_a)): the interpolation error bound relative to the image's peak."""
    if aliasing >= 1.0:
        return math.inf
    if aliasing <= 0.0:  # underflow: nothing left beyond Nyquist at double precision
        return 0.0
    return 2.0 * math.erfc(math.sqrt(math.log(1.0 / aliasing)))


def time_step(filterbank: Filterbank, *, aliasing: float = ALIASING, step_s: float | None = None,
              eps: float = 1e-6) -> TimeStep:
    """The step of the module's rule for ``filterbank`` (ε_a = ``aliasing``), or the user's
    ``step_s`` (seconds, rounded to whole samples, ≥ 1 sample) with the ε_a it implies."""
    fs = filterbank.sampling_rate_hz
    if step_s is None:
        truncation_width(aliasing)  # validates 0 < aliasing < 1
        samples = max(1, int(math.floor(fs / (2.0 * float(bandwidth_hz(filterbank, aliasing, eps=eps).max())))))
        rule = RULE
    else:
        if not (isinstance(step_s, (int, float)) and math.isfinite(step_s) and step_s > 0):
            raise ValueError(f"time step {step_s!r} s must be a positive number of seconds")
        samples = int(round(step_s * fs))
        if samples < 1:
            raise ValueError(f"time step {step_s!r} s is shorter than one sample (1/{fs:g} s)")
        rule = "requested"
    level = aliasing_at(filterbank, samples, eps=eps)
    return TimeStep(samples, samples / fs, level, interpolation_bound(level), rule)
