"""How fast the corpus's arrivals sweep in frequency: a data-driven bound on |chirp|.

The search lets each channel's kernel shear along a sweep rate β (Hz/s, docs/design.md §3). Its bound
must cover the sweeps the corpus holds: band width / window duration is far below the rate of a
dispersive guided wave, which crosses hundreds of hertz in a few milliseconds.

Method: the ridge of the Wigner–Ville distribution follows the instantaneous frequency, exactly
on f0 + βt for a linear chirp (T. A. C. M. Claasen, W. F. G. Mecklenbräuker, "The Wigner
distribution — a tool for time-frequency signal analysis", Philips J. Res. 35, 1980; B. Boashash,
"Estimating and interpreting the instantaneous frequency of a signal", Proc. IEEE 80(4), 1992).
For each window, a smoothed pseudo-WVD (Gaussian lag window, Gaussian time smoothing against
cross terms) gives the ridge frequency in the band at regular time steps; straight lines are fitted
to runs of the ridge, and a run counts as a sweep only where it is loud (well above the window's
own quiet level) and straight (small residual), which noise ridges are not; each slope is read less
two standard errors. A window's sweep rate is a high quantile of its runs' slopes; the bound is a
high quantile of those over windows, times a safety factor, floored at band width / window
duration and capped where a sweep would cross the whole band in 4 samples.
"""
from __future__ import annotations

import math

import numpy as np

from burstlens.search.wvd import analytic_signal, autocorrelation, wvd_frequencies

MAX_WINDOWS = 256        # windows looked at, taken at a fixed stride beyond this
BATCH = 32               # windows per vectorised batch (bounds memory)
# Analysis scale, tied to the window length N (the reader sizes windows to a few burst durations):
# lag half-length N/64, time smoothing 0.375 × that, ridge sampled N/256 times, lines fitted over
# 5 ridge samples. Chosen on the demo site and on linear chirps: coarser scales miss short, fast
# guided waves; finer ones read impulsive arrivals as sweeps.
LAG_DIVISOR = 64
SMOOTH_PER_LAG = 0.375
TIME_STEPS = 256
FIT_STEPS = 5
STRAIGHT_TOL = 0.5       # largest rms residual of a straight run, × the lag window's resolution
SE_MULTIPLE = 2.0        # standard errors taken off each fitted slope
LOUD_RATIO = 16.0        # ridge value over the window's 25 % quantile for a loud run (12 dB)
WITHIN_QUANTILE = 0.9    # of the slopes along one window's loud, straight ridge runs
QUANTILE = 0.95          # over windows holding a sweep
SAFETY = 2.0             # headroom: curved sweeps read slower than their steepest part, and the
                         # fastest ones (brief, under a louder arrival) are seen only in part
CAP_SAMPLES = 4          # fastest sweep allowed: the whole band within this many samples


def _ridges(z, fs, lo, hi, lags, n_freqs, hop, smooth_samples):
    """Ridge frequency (Hz) and ridge value of the smoothed pseudo-WVD, each (B, T)."""
    from scipy.ndimage import gaussian_filter1d

    b, n = z.shape
    m = np.arange(lags + 1)
    r = autocorrelation(z, lags)                                      # (B, N, L+1)
    # Gaussian lag window reaching 1e-3 at the last lag; half weight at m = 0 so W = 2 Re FFT
    h = np.exp(-0.5 * (m / (lags / 3.7)) ** 2)
    h[0] = 0.5
    r *= h
    # time smoothing, decimated: means over blocks of `hop` samples, then a Gaussian on the
    # block grid (together close to one Gaussian of std smooth_samples, far cheaper)
    steps = n // hop
    r = r[:, :steps * hop].reshape(b, steps, hop, lags + 1).mean(axis=2)
    sigma = math.sqrt(max(smooth_samples ** 2 - hop ** 2 / 12.0, 0.0)) / hop
    if sigma > 0:
        r = gaussian_filter1d(r.real, sigma, axis=1, mode="constant") \
            + 1j * gaussian_filter1d(r.imag, sigma, axis=1, mode="constant")
    w = 2.0 * np.fft.fft(r, n=n_freqs, axis=2).real                   # f_k = k fs / (2 Nf)
    freqs = wvd_frequencies(n_freqs, fs)
    k = np.flatnonzero((freqs >= lo) & (freqs <= hi))
    wb = w[:, :, k]
    peak = np.argmax(wb, axis=2)
    inner = np.clip(peak, 1, k.size - 2)
    y0, y1, y2 = (np.take_along_axis(wb, (inner + d)[..., None], axis=2)[..., 0] for d in (-1, 0, 1))
    # sub-bin peak from a parabola through the logarithms: exact for the Gaussian profile that the
    # Gaussian lag window gives a chirp's ridge; plain bin where a neighbour is not positive
    tiny = np.finfo(float).tiny
    positive = (y0 > 0) & (y2 > 0) & (peak == inner)
    l0, l1, l2 = (np.log(np.maximum(y, tiny)) for y in (y0, y1, y2))
    denom = l0 - 2 * l1 + l2
    valid = positive & (denom < 0)
    shift = np.where(valid, 0.5 * (l0 - l2) / np.where(valid, denom, -1.0), 0.0)
    shift = np.clip(shift, -0.5, 0.5)
    ridge_hz = freqs[k[0]] + (peak + shift) * (fs / (2.0 * n_freqs))
    return ridge_hz, np.take_along_axis(wb, peak[..., None], axis=2)[..., 0]


def _window_rates(ridge, energy, dt, tol_hz):
    """Each window's sweep rate (Hz/s): the WITHIN_QUANTILE quantile of the slopes of its loud,
    straight ridge runs; −1 where it has none. ``ridge``, ``energy`` (B, T), ``dt`` s per step.

    Lines are fitted over runs of FIT_STEPS, 2·FIT_STEPS − 1, … ridge samples centred on each
    sample; at each centre the longest loud, straight run gives the slope, because a longer run
    measures a slow sweep with far less scatter, while short runs still catch brief fast sweeps.
    """
    b, steps = ridge.shape
    quiet = np.maximum(np.quantile(energy, 0.25, axis=1, keepdims=True), np.finfo(float).tiny)
    best = np.full((b, steps), np.nan)
    span = FIT_STEPS
    while span <= steps:
        half = (span - 1) // 2
        t = (np.arange(span) - half) * dt
        runs = np.lib.stride_tricks.sliding_window_view(ridge, span, axis=1)          # (B, R, S)
        loud = np.lib.stride_tricks.sliding_window_view(energy, span, axis=1).min(axis=2)
        slope = runs @ t / (t @ t)
        resid = runs - runs.mean(axis=2, keepdims=True) - slope[..., None] * t
        rms = np.sqrt(np.sum(resid ** 2, axis=2) / (span - 2))
        ok = (rms <= tol_hz) & (loud >= LOUD_RATIO * quiet)
        # the slope less SE_MULTIPLE standard errors (ordinary least squares): scatter alone
        # must not pass for a sweep
        low = np.maximum(np.abs(slope) - SE_MULTIPLE * rms / np.sqrt(t @ t), 0.0)
        centre = best[:, half:steps - half]
        centre[ok] = low[ok]                                                            # longer wins
        span = 2 * span - 1
    held = ~np.all(np.isnan(best), axis=1)
    out = np.full(b, -1.0)
    if held.any():
        out[held] = np.nanquantile(best[held], WITHIN_QUANTILE, axis=1)
    return out


def sweep_rate_bound(windows, sampling_rate_hz: float, band_hz) -> dict:
    """Bound on the sweep rates |β| (Hz/s) the windows hold, from their WVD ridges.

    Parameters: ``windows`` (M, N) float64 (or (N,), one window) at ``sampling_rate_hz`` fs Hz;
    ``band_hz`` [lo, hi] Hz, the band searched. Rates are |df/dt| of an arrival's frequency,
    whatever its direction (the bound is symmetric in β).

    Returns a JSON-ready dict: ``chirp_bound_hz_per_s`` (the bound), ``source`` (how it was
    found, in words), ``floor_hz_per_s`` (band width / window duration, never undercut),
    ``cap_hz_per_s`` (band width × fs / 4: a sweep crossing the whole band in 4 samples),
    ``quantile_hz_per_s`` (the quantile over windows before the safety factor, or None),
    ``quantile``, ``within_quantile``, ``safety_factor``, ``windows_examined``,
    ``windows_with_sweeps``, and the analysis grid: ``lag_samples`` (lag half-length L),
    ``time_step_s``, ``smoothing_s`` (std of the time smoothing), ``shortest_fit_s``.

    Deterministic: windows are taken at a fixed stride (at most MAX_WINDOWS), no randomness.
    """
    x = np.asarray(windows, dtype=np.float64)
    if x.ndim == 1:
        x = x[None]
    if x.ndim != 2:
        raise ValueError(f"windows must be (M, N), got shape {x.shape}")
    fs = float(sampling_rate_hz)
    lo, hi = (float(v) for v in band_hz)
    if not 0.0 <= lo < hi <= fs / 2.0:
        raise ValueError(f"band_hz={list(band_hz)!r} must satisfy 0 ≤ lo < hi ≤ fs/2 = {fs / 2:g} Hz")
    n_windows, n = x.shape
    floor = (hi - lo) * fs / n
    cap = max((hi - lo) * fs / CAP_SAMPLES, floor)
    hop = max(1, n // TIME_STEPS)
    lags = max(4, min((n - 1) // 2, n // LAG_DIVISOR))
    n_freqs = 1 << math.ceil(math.log2(4 * lags))
    smooth = max(1.0, SMOOTH_PER_LAG * lags)
    stride = max(1, math.ceil(n_windows / MAX_WINDOWS))
    picked = x[::stride]
    dt = hop / fs
    tol_hz = STRAIGHT_TOL * fs / (4.0 * lags)                         # of the lag window's resolution
    fastest = []
    for start in range(0, picked.shape[0], BATCH):
        z = analytic_signal(picked[start:start + BATCH])
        ridge, energy = _ridges(z, fs, lo, hi, lags, n_freqs, hop, smooth)
        rates = _window_rates(ridge, energy, dt, tol_hz)
        fastest.extend(rates[rates >= 0.0].tolist())
    common = {"floor_hz_per_s": floor, "cap_hz_per_s": cap, "quantile": QUANTILE,
              "within_quantile": WITHIN_QUANTILE,
              "safety_factor": SAFETY, "windows_examined": int(picked.shape[0]),
              "windows_with_sweeps": len(fastest), "lag_samples": int(lags), "time_step_s": dt,
              "smoothing_s": smooth / fs, "shortest_fit_s": (FIT_STEPS - 1) * dt}
    if not fastest:
        return {"chirp_bound_hz_per_s": floor, "quantile_hz_per_s": None,
                "source": "band width / window duration: no window holds a loud, straight "
                          "WVD ridge to measure a sweep on", **common}
    q = float(np.quantile(np.asarray(fastest), QUANTILE))
    bound = float(min(max(SAFETY * q, floor), cap))
    how = (f"{SAFETY:g} × the {QUANTILE:.0%} quantile over {len(fastest)} windows of each "
           f"window's sweep rate ({q:.4g} Hz/s; the {WITHIN_QUANTILE:.0%} quantile of its WVD "
           f"ridge slopes), within [band width / window duration, band width × fs / {CAP_SAMPLES}]")
    return {"chirp_bound_hz_per_s": bound, "quantile_hz_per_s": q, "source": how, **common}

